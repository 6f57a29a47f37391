"""Feedforward symbol timing: square-law spectral-line estimation and cubic interpolation.

A timing metric ``z[n]`` that peaks once per symbol (the squared envelope of a matched-filter
output, or the tone-correlator energy of FSK) has a spectral line at the symbol rate whose
phase is the timing phase. It is measured per window with a single-bin DFT at the symbol rate
(Oerder & Meyr); the per-window phases are unwrapped into a continuous track, so a clock
error makes the track drift instead of wrapping, and the strobe instants follow it without
slipping or repeating a symbol. The samples at the strobe instants are produced by cubic
Lagrange interpolation (evaluated in Newton form).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas

from blocks._mixer import oscillator
from blocks._scratch import work_array
from blocks._windows import WindowState, sum_windows

__all__ = [
    "LineState",
    "ToneMetricState",
    "cubic_interpolate",
    "segment_strobes",
    "spectral_line",
    "timing_phase",
    "tone_metric",
    "unwrap_phase",
]


@dataclass(frozen=True)
class LineState:
    """State of :func:`spectral_line`: the window being filled and the DFT phase (cycles)."""

    window: WindowState
    phase: float


def spectral_line(z: np.ndarray, cycles_per_sample: float, window: int,
                  state: LineState | None = None, row: np.ndarray | None = None,
                  ) -> tuple[np.ndarray, LineState]:
    """Symbol-rate DFT bin of a timing metric over windows aligned to the absolute index.

    Parameters
    ----------
    z : numpy.ndarray
        Real timing metric of this chunk.
    cycles_per_sample : float
        Symbol rate over sample rate, ``Rs / fs`` (any real value: the number of samples per
        symbol need not be an integer).
    window : int
        Window length in samples; window ``w`` holds absolute samples ``w W .. (w + 1) W - 1``.
    state : LineState, optional
        State from the previous call; None at the start of a stream.
    row : numpy.ndarray, optional
        ``tone_row(-cycles_per_sample)``, precomputed.

    Returns
    -------
    sums : numpy.ndarray
        complex128 ``X_w = sum_n z[n] exp(-j 2 pi n Rs / fs)`` (``n`` absolute) for every
        window completed in this chunk.
    state : LineState
        State for the next chunk.

    Notes
    -----
    The estimator of [1]_ takes the DFT of ``|x|**2`` at ``k = 1`` over ``L0`` symbols of an
    integer ``N`` samples each (cited from memory, no equation number); with the absolute
    sample index in the exponent the same sum is taken at any real number of samples per
    symbol, and windows at any chunking give the same sums (to rounding). A window starting
    at chunk offset ``a`` sums to ``exp(j 2 pi phi_a) sum_r z[a + r] exp(-j 2 pi r Rs / fs)``,
    ``phi_a`` the kernel's phase at ``a``: the chunk's whole windows, as rows, take one real
    product with a table of the kernel over one window (the oscillator of
    ``blocks/_mixer.py``), accumulated in float64.

    References
    ----------
    .. [1] M. Oerder and H. Meyr, "Digital filter and square timing recovery", IEEE Trans.
       Commun. 36(5), 605-612, 1988.
    """
    if state is None:
        state = LineState(WindowState(), 0.0)
    f = -float(cycles_per_sample)
    z = np.asarray(z, dtype=np.float64)
    n = z.shape[0]
    span = min(window, n)
    table = np.empty((span, 2), np.float64)             # exp(j 2 pi f r) as (cos, sin)
    if span:
        kernel = oscillator(span, f, 0.0, row)[0]
        table[:, 0], table[:, 1] = kernel.real, kernel.imag

    def turn(offsets: np.ndarray | float) -> np.ndarray | float:
        """The kernel's phase (cycles) at chunk offsets."""
        return (state.phase + np.fmod(f * offsets, 1.0)) % 1.0

    def segment(a: int, b: int) -> complex:
        c, s = z[a:b] @ table[:b - a]
        return complex(c, s) * complex(np.exp(2j * np.pi * turn(a)))

    def whole(a: int, k: int) -> np.ndarray:
        rows = z[a:a + k * window].reshape(k, window) @ table
        starts = a + window * np.arange(k, dtype=np.float64)
        return (rows[:, 0] + 1j * rows[:, 1]) * np.exp(2j * np.pi * turn(starts))

    sums, window_state = sum_windows(n, window, segment, whole, state.window)
    return sums, LineState(window_state, float(turn(n)))


def timing_phase(line: np.ndarray | complex) -> np.ndarray | float:
    """Timing phase in symbols, ``theta = -angle(X) / (2 pi)`` in ``(-1/2, 1/2]``.

    Parameters
    ----------
    line : complex or numpy.ndarray
        Spectral-line sums from :func:`spectral_line`.

    Returns
    -------
    float or numpy.ndarray
        The metric's symbol-rate component peaks at the absolute sample instants
        ``(k + theta) fs / Rs`` [1]_.

    References
    ----------
    .. [1] M. Oerder and H. Meyr, "Digital filter and square timing recovery", IEEE Trans.
       Commun. 36(5), 605-612, 1988.
    """
    return -np.angle(line) / (2.0 * math.pi)


def unwrap_phase(theta: float, previous: float | None) -> float:
    """Place a phase (in cycles) within half a cycle of the previous unwrapped one.

    Parameters
    ----------
    theta : float
        New phase, any value.
    previous : float or None
        The previous unwrapped phase (None: no previous value, ``theta`` is returned).

    Returns
    -------
    float
        ``theta + m`` for the integer ``m`` that brings it nearest to ``previous``.
    """
    if previous is None:
        return float(theta)
    return previous + ((theta - previous + 0.5) % 1.0 - 0.5)


def segment_strobes(a: float | np.ndarray, b: float | np.ndarray,
                    theta_a: float | np.ndarray, theta_b: float | np.ndarray,
                    samples_per_symbol: float) -> tuple[int, np.ndarray]:
    """Strobe instants in ``[a, b)`` for a timing phase that moves linearly over the segment.

    Parameters
    ----------
    a, b : float or numpy.ndarray
        Segment ends (absolute sample instants), ``a < b``. Arrays give consecutive segments
        of one piecewise-linear track (``a[i + 1] == b[i]``), handled in one call.
    theta_a, theta_b : float or numpy.ndarray
        Unwrapped timing phase (symbols) at ``a`` and ``b`` (``theta_a[i + 1] == theta_b[i]``).
    samples_per_symbol : float
        Nominal ``fs / Rs``.

    Returns
    -------
    first : int
        Index ``k`` of the first symbol whose strobe lies in the (first) segment.
    instants : numpy.ndarray
        float64 strobe instants ``t_k`` in ``[a, b)``, solving ``t_k = (k + theta(t_k)) sps``,
        segment after segment.

    Notes
    -----
    With ``theta`` linear in ``t``, ``g(t) = t / sps - theta(t)`` is linear and increasing (the
    phase moves by far less than one symbol per symbol), so the symbols of the segment are
    ``k = ceil(g(a)) .. ceil(g(b)) - 1``: consecutive segments share their ends and together
    give every symbol exactly once.
    """
    sps = float(samples_per_symbol)
    a, b, theta_a, theta_b = (np.atleast_1d(np.asarray(v, dtype=np.float64))
                              for v in (a, b, theta_a, theta_b))
    slope = (theta_b - theta_a) / (b - a)
    rate = 1.0 / sps - slope
    if not np.all(rate > 0):
        raise ValueError(f"timing phase moves too fast ({np.max(slope) * sps:g} symbols per "
                         "symbol)")
    g_a = a / sps - theta_a
    first = np.ceil(g_a)
    counts = np.maximum(np.ceil(b / sps - theta_b) - first, 0).astype(np.int64)
    # consecutive segments number their symbols on from one another
    k = first[0] + np.arange(counts.sum(), dtype=np.float64)
    if a.shape[0] == 1:
        return int(first[0]), a[0] + (k - g_a[0]) / rate[0]
    a, g_a, rate = (np.repeat(v, counts) for v in (a, g_a, rate))
    return int(first[0]), a + (k - g_a) / rate


def cubic_interpolate(x: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """Cubic Lagrange interpolation of a sampled signal at fractional positions.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 (or float32) samples at integer positions ``0 .. len(x) - 1``.
    positions : numpy.ndarray
        float64 positions, each with ``1 <= p <= len(x) - 3`` so that the four neighbours
        ``floor(p) - 1 .. floor(p) + 2`` exist.

    Returns
    -------
    numpy.ndarray
        Interpolated samples, the dtype of ``x``.

    Notes
    -----
    The third-order Lagrange interpolator through the samples at ``m - 1, m, m + 1, m + 2``
    evaluated at ``m + mu`` ``(0 <= mu < 1)``, the cubic Lagrange interpolator of [1]_ (cited
    from memory, no equation number). The cubic is evaluated in Newton's form on the nodes
    0, 1, -1, 2 (the same polynomial, so the same values to float32 rounding; Newton's
    divided differences, elementary numerical analysis)::

        y = x[m] + mu (d1 + (mu - 1) / 2 (d2 + (mu + 1) / 3 d3))

    with ``d1 = x[m+1] - x[m]``, ``d2 = x[m+1] - 2 x[m] + x[m-1]`` and ``d3 = x[m+2] -
    3 x[m+1] + 3 x[m] - x[m-1]``. Where the positions are dense (at least one per two input
    samples of the span they use) the differences are formed once per input sample and
    gathered, otherwise the four neighbours are gathered and differenced; either way each
    output then costs three multiply-adds by real factors of ``mu``.

    References
    ----------
    .. [1] L. Erup, F. M. Gardner and R. A. Harris, "Interpolation in digital modems - Part II:
       Implementation and performance", IEEE Trans. Commun. 41(6), 998-1008, 1993.
    """
    p = np.asarray(positions, dtype=np.float64)
    flat = p.reshape(-1)
    m = flat.shape[0]
    if not m:
        return np.zeros(p.shape, dtype=x.dtype)
    whole = work_array("interp.whole", m, np.float64)
    np.trunc(flat, out=whole)                           # floor for the valid positions (>= 1)
    lo, hi = int(whole.min()), int(whole.max())
    if lo < 1 or hi > x.shape[0] - 3:
        raise ValueError("positions must lie in 1 .. len(x) - 3")
    real = x.real.dtype
    index = work_array("interp.index", m, np.int64)
    np.copyto(index, whole, casting="unsafe")
    index -= lo                                         # u[index] = x[m - 1], u = x[lo - 1:]
    mu = work_array("interp.mu", m, real)
    np.subtract(flat, whole, out=whole)
    np.copyto(mu, whole, casting="same_kind")
    u = x[lo - 1:hi + 3]
    # The four per-output terms x[m], d1, d2, d3. The indices are in range (checked above),
    # where "wrap" gathers without a bounds copy.
    terms = [work_array(f"interp.term{k}", m, x.dtype) for k in range(4)]
    if 2 * m >= u.shape[0]:
        # dense: the differences once per input sample, aligned with u (d1[i] = u[i+1] - u[i],
        # d2[i] = d1[i] - d1[i-1], d3[i] = d2[i+1] - d2[i]; entry 0 of d2 and d3 unused), then
        # gathered one sample on, at x[m]
        d1 = work_array("interp.d1", u.shape[0] - 1, x.dtype)
        np.subtract(u[1:], u[:-1], out=d1)
        d2 = work_array("interp.d2", u.shape[0] - 1, x.dtype)
        np.subtract(d1[1:], d1[:-1], out=d2[1:])
        d3 = work_array("interp.d3", u.shape[0] - 2, x.dtype)
        np.subtract(d2[2:], d2[1:-1], out=d3[1:])
        for source, term in zip((u, d1, d2, d3), terms, strict=True):
            np.take(source[1:], index, out=term, mode="wrap")
    else:
        # sparse: the four neighbours gathered, then differenced per output
        below, at, above, after = terms
        for k, term in enumerate((below, at, above, after)):
            np.take(u[k:], index, out=term, mode="wrap")
        np.subtract(after, above, out=after)            # x[m+2] - x[m+1]
        np.subtract(above, at, out=above)               # d1
        np.subtract(at, below, out=below)               # x[m] - x[m-1]
        np.subtract(above, below, out=below)            # d2
        after -= above
        after -= below                                  # d3
        terms = [at, above, below, after]
    x0, d1, d2, d3 = terms
    w = work_array("interp.w", m, real)
    np.add(mu, 1, out=w)
    w *= real.type(1 / 3)
    d3 *= w
    d3 += d2
    np.subtract(mu, 1, out=w)
    w *= real.type(0.5)
    d3 *= w
    d3 += d1
    d3 *= mu
    return np.add(x0, d3).reshape(p.shape)


@dataclass(frozen=True)
class ToneMetricState:
    """State of :func:`tone_metric`.

    Attributes
    ----------
    tail : numpy.ndarray
        complex64: the last ``length - 1`` input samples (zeros before the stream starts).
    """

    tail: np.ndarray


def tone_metric(x: np.ndarray, deviation_cycles: float, length: int,
                state: ToneMetricState | None = None,
                ) -> tuple[np.ndarray, ToneMetricState]:
    """Summed energies of two sliding one-symbol tone correlators (2-FSK timing metric).

    Parameters
    ----------
    x : numpy.ndarray
        complex64 input chunk.
    deviation_cycles : float
        Tone offset over sample rate, ``deviation_hz / fs``; tones at ``+/-`` that.
    length : int
        Correlator length in samples (one symbol, rounded).
    state : ToneMetricState, optional
        State from the previous call; None at the start of a stream (zeros before it).

    Returns
    -------
    z : numpy.ndarray
        float64 ``|sum_m x[m] exp(-j 2 pi f m)|**2`` summed over ``f = +/- deviation``, the
        sum running over ``m = n - length + 1 .. n``.
    state : ToneMetricState
        State for the next chunk.

    Notes
    -----
    Each correlator is the noncoherent matched filter of one tone [1]_ (section 4.5); over a
    symbol-aligned window the winning tone's energy is largest, so ``z`` peaks at the last
    sample of each symbol and dips where the window straddles a change of tone. With
    ``m = n - k`` a correlator is ``exp(-j 2 pi f n) sum_k x[n - k] exp(j 2 pi f k)``; the two
    tones' sums are ``A + j B`` and ``A - j B`` with ``A = sum_k cos(2 pi f k) x[n - k]`` and
    ``B = sum_k sin(2 pi f k) x[n - k]``, so ``z = 2 (|A|**2 + |B|**2)`` (elementary algebra):
    two short real-tap filters of the input, and no oscillator. Each sum is ``length`` shifted
    multiply-adds in float32 (BLAS ``saxpy`` on the samples as float pairs), so no running sum
    accumulates rounding over the chunk.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    """
    if length < 1:
        raise ValueError(f"length must be >= 1 (got {length})")
    if state is None:
        state = ToneMetricState(np.zeros(length - 1, dtype=np.complex64))
    n = x.shape[0]
    if not n:
        return np.zeros(0, dtype=np.float64), state
    ext = work_array("tones.ext", length - 1 + n, np.complex64)
    ext[:length - 1] = state.tail
    ext[length - 1:] = x
    angle = 2 * math.pi * float(deviation_cycles) * np.arange(length)
    # complex samples as float32 pairs, so a real tap scales both parts; term k, x[n - k],
    # starts 2 (length - 1 - k) floats into the extended input
    pairs = ext.view(np.float32)
    parts = []
    for name, taps in (("tones.cos", np.cos(angle)), ("tones.sin", np.sin(angle))):
        acc = work_array(name, 2 * n, np.float32)
        used = np.flatnonzero(taps)
        if not used.shape[0]:
            acc[:] = 0
        for i, k in enumerate(used.tolist()):
            at = 2 * (length - 1 - k)
            if i == 0:
                np.multiply(pairs[at:at + 2 * n], np.float32(taps[k]), out=acc)
            else:
                acc = blas.saxpy(pairs, acc, n=2 * n, a=float(taps[k]), offx=at)
        acc *= acc
        parts.append(acc)
    parts[0] += parts[1]
    # pairs of squares summed, and the factor 2, by one product with (2, 2)
    z = parts[0].reshape(n, 2) @ np.full(2, 2, np.float32)
    return z.astype(np.float64), ToneMetricState(ext[n:].copy())
