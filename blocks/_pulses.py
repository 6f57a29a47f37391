"""Pulse shapes: root-raised-cosine, Gaussian (for GFSK) and rectangular.

Two forms of each shape are offered. The continuous functions (``rrc_pulse``,
``gaussian_frequency_pulse``, ``gaussian_phase_pulse``) take time in symbol periods and can be
evaluated at any instant, which is what a modulator with a non-integer number of samples per
symbol needs. The tap designers (``rrc_taps``, ``gaussian_taps``, ``rect_taps``) sample a shape at
the sample spacing ``1 / sps`` symbol periods for use as FIR filters (pulse shaping or matched
filtering); they are odd-length and symmetric, so their delay is ``(len(taps) - 1) / 2``
samples exactly.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from scipy.special import erfc

__all__ = [
    "gaussian_frequency_pulse",
    "gaussian_phase_pulse",
    "gaussian_taps",
    "rect_taps",
    "rrc_pulse",
    "rrc_pulse_grid",
    "rrc_taps",
]

# Distance (in symbol periods) from a removable singularity of the RRC closed form within which
# the limit value is used instead of the quotient.
_SINGULAR_TOL = 1e-8
_LN2 = math.log(2.0)


def _check_sps(sps: float) -> float:
    sps = float(sps)
    if not (math.isfinite(sps) and sps >= 1.0):
        raise ValueError(f"sps must be a finite number >= 1 (got {sps!r})")
    return sps


def _check_span(span_symbols: int) -> int:
    if int(span_symbols) != span_symbols or span_symbols < 1:
        raise ValueError(f"span_symbols must be an integer >= 1 (got {span_symbols!r})")
    return int(span_symbols)


def _check_rolloff(rolloff: float) -> float:
    rolloff = float(rolloff)
    if not 0.0 <= rolloff <= 1.0:
        raise ValueError(f"rolloff must be in 0 .. 1 (got {rolloff!r})")
    return rolloff


def _check_bt(bt: float) -> float:
    bt = float(bt)
    if not (math.isfinite(bt) and bt > 0.0):
        raise ValueError(f"bt must be a finite number > 0 (got {bt!r})")
    return bt


def _symmetric_instants(sps: float, span_symbols: int) -> np.ndarray:
    """Odd number of sample instants (in symbol periods) centred on 0 covering the span."""
    half = math.floor(span_symbols * sps / 2.0)
    return np.arange(-half, half + 1, dtype=np.float64) / sps


def rrc_pulse(tau: ArrayLike, rolloff: float) -> np.ndarray:
    """Root-raised-cosine impulse response at arbitrary instants.

    Parameters
    ----------
    tau : array_like
        Time in symbol periods (t / T), centred on the pulse peak.
    rolloff : float
        Excess bandwidth (roll-off factor) beta, 0 <= beta <= 1.

    Returns
    -------
    numpy.ndarray
        float64 samples of ``sqrt(T) * p(t)`` where ``p`` has unit energy; i.e. with ``T = 1``
        the pulse has ``integral p(tau)**2 dtau = 1`` and ``p(0) = 1 - beta + 4 beta / pi``.

    Notes
    -----
    The closed form (with ``T = 1``)::

        p(t) = [sin(pi t (1 - b)) + 4 b t cos(pi t (1 + b))] / [pi t (1 - (4 b t)**2)]

    with the limits ``p(0) = 1 - b + 4 b / pi`` and, at ``|t| = 1 / (4 b)``,
    ``p = b / sqrt(2) * [(1 + 2/pi) sin(pi / (4 b)) + (1 - 2/pi) cos(pi / (4 b))]``. It is the
    inverse Fourier transform of the square root of the raised-cosine spectrum of [1]_
    (section 9.2); the time-domain expression and its limits are the standard ones given, for
    example, in [2]_ (from memory).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    .. [2] F. J. Harris, Multirate Signal Processing for Communication Systems, Prentice Hall,
       2004, chapter 4.
    """
    b = _check_rolloff(rolloff)
    t = np.asarray(tau, dtype=np.float64)
    out = np.empty_like(t)
    at_zero = np.abs(t) < _SINGULAR_TOL
    if b > 0.0:
        at_quarter = np.abs(np.abs(t) - 1.0 / (4.0 * b)) < _SINGULAR_TOL
    else:
        at_quarter = np.zeros_like(at_zero)
    regular = ~(at_zero | at_quarter)
    tr = t[regular]
    num = np.sin(np.pi * tr * (1.0 - b)) + 4.0 * b * tr * np.cos(np.pi * tr * (1.0 + b))
    den = np.pi * tr * (1.0 - (4.0 * b * tr) ** 2)
    out[regular] = num / den
    out[at_zero] = 1.0 - b + 4.0 * b / np.pi
    if b > 0.0:
        x = np.pi / (4.0 * b)
        out[at_quarter] = b / np.sqrt(2.0) * ((1.0 + 2.0 / np.pi) * np.sin(x)
                                              + (1.0 - 2.0 / np.pi) * np.cos(x))
    return out


def rrc_pulse_grid(phase: ArrayLike, offsets: ArrayLike, rolloff: float) -> np.ndarray:
    """Root-raised-cosine pulse on a grid of instants ``offsets[j] + phase[i]``.

    Parameters
    ----------
    phase : array_like
        1-D fractional instants (symbol periods).
    offsets : array_like
        1-D offsets (symbol periods) added to every phase, typically integers or half-integers.
    rolloff : float
        Excess bandwidth beta, 0 <= beta <= 1.

    Returns
    -------
    numpy.ndarray
        float64 ``(len(offsets), len(phase))``: ``rrc_pulse(offsets[:, None] + phase[None, :],
        rolloff)``, to rounding.

    Notes
    -----
    The two trigonometric terms of the closed form in ``rrc_pulse`` are expanded with the
    angle-addition identities, ``sin(a (m + p)) = sin(a m) cos(a p) + cos(a m) sin(a p)``, so
    the sines and cosines are taken once per phase and once per offset instead of once per
    grid point: four calls per phase for any number of offsets. The instants within ``1e-8``
    of the removable singularities take ``rrc_pulse``'s limits, as there. Elsewhere the
    result differs from ``rrc_pulse`` by rounding, amplified only next to those
    singularities: at most 1e-8 of the pulse peak on a dense grid that includes instants
    just outside them, below the resolution of complex64 samples.
    """
    b = _check_rolloff(rolloff)
    p = np.asarray(phase, dtype=np.float64)[None, :]
    m = np.asarray(offsets, dtype=np.float64)[:, None]
    t = m + p
    slow, fast = np.pi * (1.0 - b), np.pi * (1.0 + b)
    sin_slow = np.sin(slow * m) * np.cos(slow * p) + np.cos(slow * m) * np.sin(slow * p)
    cos_fast = np.cos(fast * m) * np.cos(fast * p) - np.sin(fast * m) * np.sin(fast * p)
    num = sin_slow + 4.0 * b * t * cos_fast
    den = np.pi * t * (1.0 - (4.0 * b * t) ** 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / den
    # The singular instants t = 0 and |t| = 1/(4 beta), found per offset on the phases alone.
    centres = (0.0, 0.25 / b, -0.25 / b) if b > 0.0 else (0.0,)
    lo, hi = (float(p.min()), float(p.max())) if p.size else (0.0, -1.0)
    for j, offset in enumerate(m[:, 0]):
        for centre in centres:
            target = centre - offset
            if lo - _SINGULAR_TOL < target < hi + _SINGULAR_TOL:
                cols = np.flatnonzero(np.abs(t[j] - centre) < _SINGULAR_TOL)
                out[j, cols] = rrc_pulse(t[j, cols], b)
    return out


def rrc_taps(sps: float, rolloff: float, span_symbols: int) -> np.ndarray:
    """Root-raised-cosine FIR taps.

    Parameters
    ----------
    sps : float
        Samples per symbol (>= 1, need not be an integer).
    rolloff : float
        Roll-off factor, 0 .. 1.
    span_symbols : int
        Length of the filter in symbol periods (the taps cover ``-span/2 .. span/2``).

    Returns
    -------
    numpy.ndarray
        float64 taps, odd length ``2 * floor(span * sps / 2) + 1``, symmetric about the
        centre tap, scaled to unit energy (``sum(taps**2) == 1``).

    Notes
    -----
    Samples of :func:`rrc_pulse` at ``tau = k / sps``. Unit energy makes the filter a matched
    filter whose noise output has the input's noise variance. Two such filters in cascade give
    a raised-cosine response, free of intersymbol interference at symbol spacing up to the
    truncation error [1]_ (section 9.2, Nyquist criterion).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    """
    sps = _check_sps(sps)
    span = _check_span(span_symbols)
    taps = rrc_pulse(_symmetric_instants(sps, span), rolloff)
    return taps / np.sqrt(np.sum(taps**2))


def _q(x: np.ndarray) -> np.ndarray:
    """Gaussian tail probability Q(x)."""
    return 0.5 * erfc(x / np.sqrt(2.0))


def _gaussian_scale(bt: float) -> float:
    """``2 pi BT / sqrt(ln 2)``: the inverse standard deviation (in symbol periods)."""
    return 2.0 * np.pi * bt / np.sqrt(_LN2)


def gaussian_taps(sps: float, bt: float, span_symbols: int) -> np.ndarray:
    """Gaussian low-pass FIR taps (the GFSK / GMSK premodulation filter).

    Parameters
    ----------
    sps : float
        Samples per symbol (>= 1, need not be an integer).
    bt : float
        3 dB bandwidth times symbol period, > 0 (0.3 and 0.5 are common choices).
    span_symbols : int
        Length of the filter in symbol periods.

    Returns
    -------
    numpy.ndarray
        float64 taps, odd length ``2 * floor(span * sps / 2) + 1``, symmetric, scaled to unit
        sum (unit gain at DC, so filtering a +/-1 NRZ stream keeps the peak deviation).

    Notes
    -----
    Samples of the Gaussian impulse response [1]_, with ``T = 1``::

        h(t) = exp(-t**2 / (2 d**2)) / (sqrt(2 pi) d),   d = sqrt(ln 2) / (2 pi BT)

    References
    ----------
    .. [1] K. Murota and K. Hirade, "GMSK modulation for digital mobile radio telephony",
       IEEE Trans. Commun. 29(7), 1044-1050, 1981.
    """
    sps = _check_sps(sps)
    span = _check_span(span_symbols)
    a = _gaussian_scale(_check_bt(bt))
    t = _symmetric_instants(sps, span)
    taps = np.exp(-0.5 * (a * t) ** 2)
    return taps / np.sum(taps)


def gaussian_frequency_pulse(tau: ArrayLike, bt: float) -> np.ndarray:
    """GFSK frequency pulse: a one-symbol rectangle through the Gaussian filter.

    Parameters
    ----------
    tau : array_like
        Time in symbol periods, centred on the pulse.
    bt : float
        3 dB bandwidth times symbol period, > 0.

    Returns
    -------
    numpy.ndarray
        ``g(tau) = Q(a (tau - 1/2)) - Q(a (tau + 1/2))`` with ``a = 2 pi BT / sqrt(ln 2)``;
        its integral over all time is 1 and it tends to the rectangle on ``[-1/2, 1/2)`` as
        ``bt`` grows.

    References
    ----------
    .. [1] K. Murota and K. Hirade, "GMSK modulation for digital mobile radio telephony",
       IEEE Trans. Commun. 29(7), 1044-1050, 1981.
    """
    a = _gaussian_scale(_check_bt(bt))
    t = np.asarray(tau, dtype=np.float64)
    return _q(a * (t - 0.5)) - _q(a * (t + 0.5))


def gaussian_phase_pulse(tau: ArrayLike, bt: float) -> np.ndarray:
    """Running integral of :func:`gaussian_frequency_pulse` from minus infinity to ``tau``.

    Parameters
    ----------
    tau : array_like
        Time in symbol periods, centred on the pulse.
    bt : float
        3 dB bandwidth times symbol period, > 0.

    Returns
    -------
    numpy.ndarray
        Rises smoothly from 0 to 1; equals 1/2 at ``tau = 0``.

    Notes
    -----
    With ``F(u) = u Q(a u) - phi(a u) / a`` (``phi`` the standard normal density) an
    antiderivative of ``Q(a u)``, the integral is ``F(tau - 1/2) - F(tau + 1/2) + 1``
    (elementary calculus; the constant makes the value vanish at minus infinity).
    """
    a = _gaussian_scale(_check_bt(bt))
    t = np.asarray(tau, dtype=np.float64)

    def antiderivative(u: np.ndarray) -> np.ndarray:
        return u * _q(a * u) - np.exp(-0.5 * (a * u) ** 2) / (a * np.sqrt(2.0 * np.pi))

    return antiderivative(t - 0.5) - antiderivative(t + 0.5) + 1.0


def rect_taps(sps: float) -> np.ndarray:
    """Rectangular (integrate-and-dump) FIR taps one symbol long.

    Parameters
    ----------
    sps : float
        Samples per symbol (>= 1); a non-integer value is rounded to the nearest integer
        length.

    Returns
    -------
    numpy.ndarray
        ``round(sps)`` equal float64 taps with unit energy (each ``1 / sqrt(round(sps))``).

    Notes
    -----
    The matched filter of a rectangular (NRZ) pulse is a rectangle of the same length [1]_
    (chapter 4, the matched-filter receiver; chapter from memory).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008.
    """
    n = round(_check_sps(sps))
    return np.full(n, 1.0 / np.sqrt(n))
