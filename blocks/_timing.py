"""Feedforward symbol timing: square-law spectral-line estimation and cubic interpolation.

A timing metric ``z[n]`` that peaks once per symbol (the squared envelope of a matched-filter
output, or the tone-correlator energy of FSK) has a spectral line at the symbol rate whose
phase is the timing phase. It is measured per window with a single-bin DFT at the symbol rate
(Oerder & Meyr); the per-window phases are unwrapped into a continuous track, so a clock
error makes the track drift instead of wrapping, and the strobe instants follow it without
slipping or repeating a symbol. The samples at the strobe instants are produced by cubic
Lagrange interpolation in Farrow form.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from blocks._mixer import oscillator, tone_row
from blocks._windows import WindowState, window_sums

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
    symbol, and windows at any chunking give the same sums.

    References
    ----------
    .. [1] M. Oerder and H. Meyr, "Digital filter and square timing recovery", IEEE Trans.
       Commun. 36(5), 605-612, 1988.
    """
    if state is None:
        state = LineState(WindowState(), 0.0)
    osc, phase = oscillator(z.shape[0], -cycles_per_sample, state.phase, row)
    osc *= z
    sums, win = window_sums(osc, window, state.window)
    return sums, LineState(win, phase)


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


def segment_strobes(a: float, b: float, theta_a: float, theta_b: float,
                    samples_per_symbol: float) -> tuple[int, np.ndarray]:
    """Strobe instants in ``[a, b)`` for a timing phase that moves linearly over the segment.

    Parameters
    ----------
    a, b : float
        Segment ends (absolute sample instants), ``a < b``.
    theta_a, theta_b : float
        Unwrapped timing phase (symbols) at ``a`` and ``b``.
    samples_per_symbol : float
        Nominal ``fs / Rs``.

    Returns
    -------
    first : int
        Index ``k`` of the first symbol whose strobe lies in the segment.
    instants : numpy.ndarray
        float64 strobe instants ``t_k`` in ``[a, b)``, solving ``t_k = (k + theta(t_k)) sps``.

    Notes
    -----
    With ``theta`` linear in ``t``, ``g(t) = t / sps - theta(t)`` is linear and increasing (the
    phase moves by far less than one symbol per symbol), so the symbols of the segment are
    ``k = ceil(g(a)) .. ceil(g(b)) - 1``: consecutive segments share their ends and together
    give every symbol exactly once.
    """
    sps = float(samples_per_symbol)
    slope = (theta_b - theta_a) / (b - a)
    rate = 1.0 / sps - slope
    if not rate > 0:
        raise ValueError(f"timing phase moves too fast ({slope * sps:g} symbols per symbol)")
    g_a = a / sps - theta_a
    first = math.ceil(g_a)
    stop = math.ceil(b / sps - theta_b)
    k = np.arange(first, max(first, stop), dtype=np.float64)
    return first, a + (k - g_a) / rate


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
    from memory, no equation number): the four samples weighted by the Lagrange basis
    polynomials through -1, 0, 1, 2 evaluated at ``mu``. The same cubic can be written in the
    Farrow structure of [1]_; the weighted form gives the same values to float32 rounding
    and needs only real arithmetic on ``mu`` and four real-by-complex products.

    References
    ----------
    .. [1] L. Erup, F. M. Gardner and R. A. Harris, "Interpolation in digital modems - Part II:
       Implementation and performance", IEEE Trans. Commun. 41(6), 998-1008, 1993.
    """
    p = np.asarray(positions, dtype=np.float64)
    base = p.astype(np.int64)  # truncation: floor for the valid positions (>= 1)
    mu = (p - base).astype(np.float32)
    if base.shape[0] and (base.min() < 1 or base.max() > x.shape[0] - 3):
        raise ValueError("positions must lie in 1 .. len(x) - 3")
    weights = _lagrange_weights(mu.ravel().astype(x.real.dtype, copy=False))
    index = base.ravel() - 1
    y = np.take(x, index)
    y *= weights[0]
    for w in weights[1:]:
        index += 1
        term = np.take(x, index)
        term *= w
        y += term
    return y.reshape(p.shape)


def _lagrange_weights(mu: np.ndarray) -> np.ndarray:
    """Cubic Lagrange basis through -1, 0, 1, 2 at ``mu``: shape (4, len(mu)), mu's dtype."""
    below, above, after = mu - 1, mu - 2, mu + 1
    pair_a, pair_b = mu * below, after * above
    w = np.empty((4, mu.shape[0]), dtype=mu.dtype)
    np.multiply(pair_a, above, out=w[0])
    np.multiply(pair_b, below, out=w[1])
    np.multiply(pair_b, mu, out=w[2])
    np.multiply(pair_a, after, out=w[3])
    w *= np.array([-1 / 6, 1 / 2, -1 / 2, 1 / 6], dtype=mu.dtype)[:, None]
    return w


@dataclass(frozen=True)
class ToneMetricState:
    """State of :func:`tone_metric`.

    Attributes
    ----------
    tails : numpy.ndarray
        complex64 ``(2, length - 1)``: the last ``length - 1`` tone-mixed samples of each tone.
    phases : tuple of float
        Oscillator phases (cycles) of the two tones.
    """

    tails: np.ndarray
    phases: tuple[float, float]


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
    sample of each symbol and dips where the window straddles a change of tone. Both tones are
    mixed in one ``(2, n)`` product and each sliding sum is ``length`` shifted additions, so
    no running sum accumulates rounding over the chunk.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    """
    if length < 1:
        raise ValueError(f"length must be >= 1 (got {length})")
    if state is None:
        state = ToneMetricState(np.zeros((2, length - 1), dtype=np.complex64), (0.0, 0.0))
    n = x.shape[0]
    ext = np.empty((2, length - 1 + n), dtype=np.complex64)
    ext[:, :length - 1] = state.tails
    phases = []
    for i, f in enumerate((-deviation_cycles, deviation_cycles)):
        osc, ph = oscillator(n, -f, state.phases[i], tone_row(-f))
        np.multiply(osc, x, out=ext[i, length - 1:])
        phases.append(ph)
    corr = ext[:, length - 1:].copy()
    for k in range(length - 1):
        corr += ext[:, k:k + n]
    power = corr.real.astype(np.float64) ** 2 + corr.imag.astype(np.float64) ** 2
    z = power[0] + power[1]
    return z, ToneMetricState(ext[:, n:].copy(), (phases[0], phases[1]))
