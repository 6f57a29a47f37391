"""Stateful FIR filtering and polyphase decimation, chunk by chunk.

One kernel serves both: ``fir_decimate`` with ``factor = 1`` is a plain FIR filter. The state
is the filter's input history, so a stream fed in pieces gives the output of one long
convolution, and a decimator keeps its output phase tied to the absolute input index (output
``m`` is the filter output at input index ``m * factor``) whatever the piece lengths.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import signal

from blocks._scratch import work_array

__all__ = ["FirState", "antialias_taps", "fir_decimate", "fir_filter"]


@dataclass(frozen=True)
class FirState:
    """History of a stateful FIR filter or decimator.

    Attributes
    ----------
    tail : numpy.ndarray
        The last ``padded_taps - 1`` input samples (zeros before the stream starts), where
        ``padded_taps`` is the tap count rounded up to a multiple of the factor.
    skip : int
        Input samples still to pass before the next kept output, ``0 .. factor - 1``.
    phase : int
        Outputs produced so far, modulo the outputs of one matrix product of the computation
        (its period), so each output is summed in the same order whatever the chunking.
    """

    tail: np.ndarray
    skip: int = 0
    phase: int = 0


def antialias_taps(factor: int, cutoff: float | None = None,
                   numtaps: int | None = None) -> np.ndarray:
    """Linear-phase low-pass taps for decimation by ``factor``.

    Parameters
    ----------
    factor : int
        Decimation factor (>= 1).
    cutoff : float, optional
        Cut-off as a fraction of the *input* Nyquist frequency, ``0 < cutoff <= 1``.
        Default ``1 / factor`` (the output Nyquist frequency).
    numtaps : int, optional
        Number of taps (>= 1). Default ``20 * factor + 1``.

    Returns
    -------
    numpy.ndarray
        float64 taps with unit gain at DC.

    Notes
    -----
    The defaults are the design of ``scipy.signal.resample_poly`` for a down-sampling factor
    ``q``: a Kaiser window with beta = 5, half-length ``10 q``, cut-off ``1 / q`` [1]_. With
    them, ``fir_decimate`` equals ``resample_poly(x, 1, factor)`` delayed by 10 output samples.

    References
    ----------
    .. [1] SciPy reference guide, ``scipy.signal.resample_poly`` and ``scipy.signal.firwin``.
    """
    if int(factor) != factor or factor < 1:
        raise ValueError(f"factor must be an integer >= 1 (got {factor!r})")
    cutoff = 1.0 / factor if cutoff is None else float(cutoff)
    if not 0.0 < cutoff <= 1.0:
        raise ValueError(f"cutoff must be in (0, 1] of the input Nyquist (got {cutoff!r})")
    numtaps = 20 * int(factor) + 1 if numtaps is None else int(numtaps)
    if numtaps < 1:
        raise ValueError(f"numtaps must be >= 1 (got {numtaps!r})")
    if cutoff >= 1.0:
        return np.ones(1)
    return signal.firwin(numtaps, cutoff, window=("kaiser", 5.0))


# Block layout of the polyphase product (see ``_BlockPlan``): block rows of B = b M samples and
# depth d cost 2 d B real multiply-adds per complex output; the layout takes the fewest, with
# at least _MIN_BLOCK samples per block row (the product's inner dimension: shorter rows ran
# the BLAS product markedly slower on the 2-core test machine) and at most _MAX_BLOCK.
_MIN_BLOCK = 10
_MAX_BLOCK = 64
# Outputs per matrix product, at most; each product handles the same number of block rows.
_PERIOD = 4096
# Largest m * n * k of one matrix product. OpenBLAS threads a product above 4 * 65536
# multiply-adds (interface/gemm.c with the default GEMM_MULTITHREAD_THRESHOLD = 4, from its
# source); every block already runs in its own thread, so a threaded product only contends
# for the cores. Smaller products also keep their operands in cache.
_PRODUCT_LIMIT = 1 << 18


@dataclass(frozen=True)
class _BlockPlan:
    """Taps rearranged once for the blocked polyphase product of ``fir_decimate``.

    The input is cut into block rows of ``block = outs * factor`` samples; output
    ``i * outs + t`` needs rows ``i .. i + depth - 1``, weighted by ``matrix[q * outs + t]``
    for row ``i + q``. Each matrix product takes ``rows`` block rows, and ``period`` outputs
    fill one product.
    """

    factor: int
    block: int
    outs: int
    depth: int
    length: int
    rows: int
    matrix: np.ndarray

    @property
    def period(self) -> int:
        """Outputs per matrix product; the stream's output count modulo this aligns them."""
        return self.rows * self.outs


@functools.lru_cache(maxsize=64)
def _block_plan(key: bytes, factor: int) -> _BlockPlan:
    h = np.frombuffer(key, dtype=np.float32)
    length = -(-h.shape[0] // factor) * factor           # taps padded to a multiple of M
    reversed_taps = np.zeros(length, np.float32)
    reversed_taps[length - h.shape[0]:] = h[::-1]       # g[j] = h_padded[length - 1 - j]

    def depth_of(outs: int) -> int:
        return -(-(length + (outs - 1) * factor) // (outs * factor))

    low = -(-_MIN_BLOCK // factor)
    outs = min(range(low, max(low, _MAX_BLOCK // factor) + 1),
               key=lambda b: (depth_of(b) * b * factor, depth_of(b)))
    block = outs * factor
    depth = depth_of(outs)
    q, t, c = np.meshgrid(np.arange(depth), np.arange(outs), np.arange(block), indexing="ij")
    j = q * block + c - t * factor
    inside = (j >= 0) & (j < length)
    matrix = np.where(inside, reversed_taps[np.clip(j, 0, length - 1)], np.float32(0))
    matrix = matrix.reshape(depth * outs, block).astype(np.float32)
    matrix.setflags(write=False)
    # complex rows are two float32 columns each
    rows = max(1, min(_PERIOD // outs, _PRODUCT_LIMIT // (2 * matrix.size)))
    return _BlockPlan(factor, block, outs, depth, length, rows, matrix)


def _blocked_products(plan: _BlockPlan, head: np.ndarray, x: np.ndarray, nout: int,
                      lead: int) -> np.ndarray:
    """``y[i] = sum_j g[j] s[i M + j]``, ``i < nout``, ``s = concatenate((head, x))``.

    ``g`` are the reversed padded taps. ``lead`` outputs (of zeros) are computed first and
    dropped. The caller passes the stream's output count modulo ``plan.period``, so every
    output lands at the same place in a matrix product of the same shape, and is summed in
    the same order, however the stream is cut. The temporaries are work arrays
    (``blocks/_scratch.py``); the result is a fresh array.
    """
    outs, block, depth, factor = plan.outs, plan.block, plan.depth, plan.factor
    dtype = np.dtype(np.complex64 if np.iscomplexobj(x) else np.float32)
    pairs = 2 if dtype.kind == "c" else 1
    rows_out = -(-(lead + nout) // outs)
    rows = -(-(rows_out + depth - 1) // plan.rows) * plan.rows
    cols = work_array("fir.cols", (block, rows), dtype)
    _fill_columns(cols, lead * factor, head, x)
    flat = cols.view(np.float32)
    m = plan.matrix
    z = work_array("fir.products", (m.shape[0], flat.shape[1]), np.float32)
    step = plan.rows * pairs
    for a in range(0, flat.shape[1], step):
        np.matmul(m, flat[:, a:a + step], out=z[:, a:a + step])
    zs = z.view(dtype)
    # output i * outs + t is the sum over q of zs[q * outs + t, i + q], added in q order; the
    # last addition writes the (outs, rows_out) sums transposed into stream order
    y = np.empty(rows_out * outs, dtype)
    dest = y.reshape(rows_out, outs).T
    if depth == 1:
        np.copyto(dest, zs[:outs, :rows_out])
    else:
        acc = work_array("fir.sums", (outs, rows_out), dtype) if depth > 2 else dest
        np.add(zs[:outs, :rows_out], zs[outs:2 * outs, 1:1 + rows_out], out=acc)
        for q in range(2, depth):
            np.add(acc, zs[q * outs:(q + 1) * outs, q:q + rows_out],
                   out=acc if q < depth - 1 else dest)
    return y[lead:lead + nout]


def _fill_columns(cols: np.ndarray, zeros: int, head: np.ndarray, x: np.ndarray) -> None:
    """Write ``zeros`` zeros, ``head``, ``x`` and zeros again into ``cols`` column-wise.

    Column ``r`` of the ``(block, rows)`` array ``cols`` receives samples ``r * block ..
    (r + 1) * block - 1`` of that sequence (cut at ``rows * block``). The block rows that lie
    inside ``x`` are transposed straight from it; only the first and the last few go through a
    short line of samples.
    """
    block, rows = cols.shape
    start = zeros + head.shape[0]                       # where x begins in the sequence
    inner_a = min(-(-start // block), rows)
    inner_b = max(inner_a, min((start + x.shape[0]) // block, rows))
    if inner_b > inner_a:
        a, b = inner_a * block - start, inner_b * block - start
        np.copyto(cols[:, inner_a:inner_b], x[a:b].reshape(inner_b - inner_a, block).T)
    for name, a, b in (("fir.first", 0, inner_a), ("fir.last", inner_b, rows)):
        line = work_array(name, (b - a) * block, cols.dtype)
        at = a * block                                  # sequence index of line[0]
        line[:max(0, zeros - at)] = 0
        filled = max(0, zeros - at)
        for part, begin in ((head, zeros), (x, start)):
            piece = part[max(0, at + filled - begin):][:line.shape[0] - filled]
            line[filled:filled + piece.shape[0]] = piece
            filled += piece.shape[0]
        line[filled:] = 0
        np.copyto(cols[:, a:b], line.reshape(b - a, block).T)


def fir_decimate(x: np.ndarray, taps: np.ndarray, factor: int = 1,
                 state: FirState | None = None) -> tuple[np.ndarray, FirState]:
    """Filter with an FIR and keep every ``factor``-th output, computing only those.

    Parameters
    ----------
    x : numpy.ndarray
        Input chunk (complex64 or float32), any length (not necessarily a multiple of
        ``factor``).
    taps : numpy.ndarray
        FIR taps ``h``; cast to float32 so complex64 input gives complex64 output.
    factor : int
        Decimation factor ``M`` (1: plain filtering).
    state : FirState, optional
        State returned by the previous call; None at the start of a stream (zero history).

    Returns
    -------
    y : numpy.ndarray
        ``y[m] = sum_k h[k] x[m M - k]`` for every absolute output index ``m`` whose input
        index ``m M`` falls in this chunk.
    state : FirState
        State for the next chunk.

    Notes
    -----
    Polyphase decomposition [1]_ (chapter 4, polyphase representation; chapter from memory):
    only the kept outputs are computed. The input is cut into rows of ``B = b M`` samples
    (``b`` outputs per row) and ``y[i b + t] = sum_q H[t, q] . row[i + q]``, where ``H[t, q]``
    holds the taps that meet row ``i + q``: one real matrix product of the rearranged taps
    with the rows (complex samples as float32 pairs), then ``Q - 1`` additions of whole
    ``(b, rows)`` blocks of products shifted by one row each. The temporaries are work arrays
    reused from call to call (``blocks/_scratch.py``), so a stream does not fault fresh memory
    in on every chunk. The result equals ``scipy.signal.upfirdn(h, x, 1, M)`` on the whole
    stream (truncated to the outputs whose input has arrived), to float32 rounding.

    References
    ----------
    .. [1] P. P. Vaidyanathan, Multirate Systems and Filter Banks, Prentice Hall, 1993.
    """
    if int(factor) != factor or factor < 1:
        raise ValueError(f"factor must be an integer >= 1 (got {factor!r})")
    h = np.ascontiguousarray(taps, dtype=np.float32)
    plan = _block_plan(h.tobytes(), int(factor))
    history = plan.length - 1
    x = np.asarray(x)
    if state is None:
        state = FirState(np.zeros(history, dtype=x.dtype))
    count = x.shape[0]
    nout = max(0, -(-(count - state.skip) // factor))
    if nout:
        y = _blocked_products(plan, state.tail[state.skip:], x, nout, state.phase)
        y = y.astype(x.dtype, copy=False)
    else:
        y = np.zeros(0, dtype=x.dtype)
    if count >= history:
        tail = x[count - history:].copy()
    else:
        tail = np.concatenate((state.tail[count:], x))
    return y, FirState(tail, (state.skip - count) % factor, (state.phase + nout) % plan.period)


def fir_filter(x: np.ndarray, taps: np.ndarray,
               state: FirState | None = None) -> tuple[np.ndarray, FirState]:
    """Stateful FIR filter: ``fir_decimate`` with factor 1 (see there).

    Parameters
    ----------
    x : numpy.ndarray
        Input chunk (complex64 or float32).
    taps : numpy.ndarray
        FIR taps.
    state : FirState, optional
        State from the previous call; None at the start of a stream.

    Returns
    -------
    y : numpy.ndarray
        ``y[n] = sum_k h[k] x[n - k]``, same length as ``x``; equals
        ``scipy.signal.lfilter(h, 1, x)`` on the whole stream.
    state : FirState
        State for the next chunk.
    """
    return fir_decimate(x, taps, 1, state)
