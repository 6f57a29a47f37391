"""Stateful FIR filtering and polyphase decimation, chunk by chunk.

One kernel serves both: ``fir_decimate`` with ``factor = 1`` is a plain FIR filter. The state
is the filter's input history, so a stream fed in pieces gives the output of one long
convolution, and a decimator keeps its output phase tied to the absolute input index (output
``m`` is the filter output at input index ``m * factor``) whatever the piece lengths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

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
    """

    tail: np.ndarray
    skip: int = 0


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


def _padded(taps: np.ndarray, factor: int) -> np.ndarray:
    phases = -(-taps.shape[0] // factor)
    padded = np.zeros(phases * factor, dtype=taps.dtype)
    padded[: taps.shape[0]] = taps
    return padded


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
    Polyphase decomposition [1]_ (chapter 4, polyphase representation; chapter from
    memory): with ``h_r[q] = h[q M + r]`` and the input
    sub-streams ``x_r[i] = x[i M - r]``, ``y[m] = sum_r (h_r * x_r)[m]``, so each of the ``M``
    branches convolves ``len(x) / M`` samples with ``len(h) / M`` taps and no discarded output
    is ever computed. The result equals ``scipy.signal.upfirdn(h, x, 1, M)`` on the whole
    stream (truncated to the outputs whose input has arrived).

    References
    ----------
    .. [1] P. P. Vaidyanathan, Multirate Systems and Filter Banks, Prentice Hall, 1993.
    """
    if int(factor) != factor or factor < 1:
        raise ValueError(f"factor must be an integer >= 1 (got {factor!r})")
    h = _padded(np.asarray(taps, dtype=np.float32), factor)
    phases = h.shape[0] // factor
    history = h.shape[0] - 1
    if state is None:
        state = FirState(np.zeros(history, dtype=x.dtype))
    buf = np.concatenate((state.tail, x)) if history else np.asarray(x)
    count = x.shape[0]
    nout = max(0, -(-(count - state.skip) // factor))
    if nout:
        first = history + state.skip
        y = None
        for r in range(factor):
            start = first - r - (phases - 1) * factor
            branch = buf[start: start + (nout + phases - 1) * factor: factor]
            part = signal.convolve(branch, h[r::factor], mode="valid")
            y = part if y is None else np.add(y, part, out=y)
        y = y.astype(x.dtype, copy=False)
    else:
        y = np.zeros(0, dtype=x.dtype)
    tail = buf[buf.shape[0] - history:].copy() if history else state.tail
    return y, FirState(tail, (state.skip - count) % factor)


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
