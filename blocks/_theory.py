"""Bit error probability in additive white Gaussian noise, and its inverse.

``gamma`` below is Eb/N0 as a power ratio, Eb the *average* energy per bit, N0 the one-sided
noise power spectral density. Schemes:

==================  ==========================================================  =========
scheme              detector                                                    Pb
==================  ==========================================================  =========
``ook``             envelope detector, optimum threshold (equal priors)         [3]_
``2fsk``            noncoherent orthogonal binary FSK (two envelope detectors)  [1]_
``dbpsk``           differential detection of DBPSK                             [1]_
``dqpsk``           differential detection of (pi/4-)DQPSK, Gray mapping        [1]_
``bpsk``            coherent BPSK (the reference a phase loop buys)             [1]_
``coherent-2fsk``   coherent orthogonal binary FSK                              [1]_
==================  ==========================================================  =========

Formulas: ``bpsk`` Q(sqrt(2 gamma)); ``coherent-2fsk`` Q(sqrt(gamma)); ``2fsk``
exp(-gamma/2)/2; ``dbpsk`` exp(-gamma)/2; ``dqpsk`` Q1(a, b) - I0(ab) exp(-(a^2+b^2)/2)/2 with
a = sqrt(2 gamma (1 - 1/sqrt 2)), b = sqrt(2 gamma (1 + 1/sqrt 2)) [1]_; ``ook`` below.

OOK model: the "on" symbol has energy 2 Eb (so the average is Eb), amplitude ``A`` after the
matched filter, noise ``sigma^2 = N0/2`` per quadrature. The envelope is Rayleigh when off
and Rice when on [2]_, so for a threshold ``T``
``Pb = (exp(-T^2 / 2 sigma^2) + 1 - Q1(A/sigma, T/sigma)) / 2`` with ``A/sigma = 2 sqrt(gamma)``.
The optimum ``T`` makes the two densities equal: ``I0(A T / sigma^2) = exp(A^2 / 2 sigma^2)``.
At high SNR ``T -> A/2`` and ``Pb -> exp(-gamma/2)/2`` (common practice), the same exponent as
noncoherent 2-FSK. Q1 is Marcum's Q function [3]_, evaluated as the survival function of the
noncentral chi-square law with two degrees of freedom: ``Q1(a, b) = ncx2.sf(b^2, 2, a^2)``.

References
----------
.. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
   ch. 4: binary antipodal and orthogonal signalling (sec. 4.2), noncoherent detection of
   orthogonal signals (sec. 4.5), differential PSK and DQPSK via the Marcum Q function
   (sec. 4.5). Section numbers are from memory; the formulas are the standard ones.
.. [2] Proakis and Salehi, sec. 2.3 (Rayleigh and Rice distributions, noncentral chi-square
   with two degrees of freedom).
.. [3] J. I. Marcum, "A statistical theory of target detection by pulsed radar", IRE Trans.
   Information Theory 6(2), 1960 (the Q function of the Rice envelope).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import brentq
from scipy.special import i0e, ndtr
from scipy.stats import ncx2

__all__ = [
    "SCHEMES",
    "ber_theory",
    "ebn0_for_ber",
    "marcum_q1",
    "ook_ber_at_threshold",
    "ook_optimum_threshold",
]

#: Scheme names understood by ``ber_theory`` and ``ebn0_for_ber``.
SCHEMES: tuple[str, ...] = ("ook", "2fsk", "dbpsk", "dqpsk", "bpsk", "coherent-2fsk")

#: Smallest target probability ``ebn0_for_ber`` accepts (doubles underflow not far below).
_SMALLEST_TARGET = 1e-300
_TINY = float(np.finfo(np.float64).smallest_subnormal)


def _gamma(ebn0_db: ArrayLike) -> np.ndarray:
    """Eb/N0 in dB to a linear power ratio (float64), rejecting NaN."""
    db = np.asarray(ebn0_db, dtype=np.float64)
    if np.isnan(db).any():
        raise ValueError("ebn0_db must not be NaN")
    return 10.0 ** (db / 10.0)


def _q(x: np.ndarray) -> np.ndarray:
    """Gaussian tail probability Q(x) = P(N(0,1) > x)."""
    return ndtr(-x)


def marcum_q1(a: ArrayLike, b: ArrayLike) -> np.ndarray:
    """First-order Marcum Q function ``Q1(a, b)``.

    Parameters
    ----------
    a, b : array_like
        Non-negative arguments (broadcast together).

    Returns
    -------
    numpy.ndarray
        ``Q1(a, b) = integral_b^inf x exp(-(x^2 + a^2)/2) I0(a x) dx``: the probability that
        a Rice envelope with ``nu/sigma = a`` exceeds ``b sigma``.

    Notes
    -----
    ``(R/sigma)^2`` is noncentral chi-square with 2 degrees of freedom and noncentrality
    ``a^2`` [1]_, so ``Q1(a, b) = ncx2.sf(b^2, 2, a^2)`` (scipy's complement is accurate for
    small values).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 2.3.
    """
    a2 = np.square(np.asarray(a, dtype=np.float64))
    b2 = np.square(np.asarray(b, dtype=np.float64))
    return np.asarray(ncx2.sf(b2, 2.0, a2), dtype=np.float64)


def ook_ber_at_threshold(ebn0_db: ArrayLike, threshold: ArrayLike) -> np.ndarray:
    """Bit error probability of envelope-detected OOK with a fixed threshold.

    Parameters
    ----------
    ebn0_db : array_like
        Average Eb/N0 in dB.
    threshold : array_like
        Decision threshold as a fraction of the noise-free "on" envelope ``A`` (0.5 = halfway),
        > 0. Broadcast with ``ebn0_db``.

    Returns
    -------
    numpy.ndarray
        ``(exp(-b^2/2) + 1 - Q1(a, b)) / 2`` with ``a = 2 sqrt(gamma)``, ``b = threshold * a``
        (equal priors; module notes).

    References
    ----------
    .. [1] Proakis and Salehi, Digital Communications, 5th ed., 2008, sec. 2.3 (Rayleigh and
       Rice envelopes); J. I. Marcum, IRE Trans. Inf. Theory 6(2), 1960.
    """
    frac = np.asarray(threshold, dtype=np.float64)
    if np.isnan(frac).any() or (frac <= 0).any():
        raise ValueError(f"threshold must be > 0 (got {threshold!r})")
    a = 2.0 * np.sqrt(_gamma(ebn0_db))
    b = frac * a
    miss = np.asarray(ncx2.cdf(b * b, 2.0, a * a), dtype=np.float64)
    return 0.5 * (np.exp(-0.5 * b * b) + miss)


def _ook_optimum_x(a: float) -> float:
    """Solve ``log I0(x) = a^2 / 2`` for ``x = A T / sigma^2`` (equal-density point)."""
    half = 0.5 * a * a

    def excess(x: float) -> float:
        return math.log(i0e(x)) + x - half

    hi = half + 0.5 * math.log(2.0 * math.pi * (half + 1.0)) + 1.0
    while excess(hi) <= 0.0:
        hi *= 2.0
    return brentq(excess, 0.0, hi, xtol=1e-12, rtol=1e-13)


def ook_optimum_threshold(ebn0_db: ArrayLike) -> np.ndarray:
    """Minimum-error threshold of envelope-detected OOK, as a fraction of the "on" envelope.

    Parameters
    ----------
    ebn0_db : array_like
        Average Eb/N0 in dB.

    Returns
    -------
    numpy.ndarray
        ``T / A`` where the Rayleigh ("off") and Rice ("on") densities are equal; it falls
        towards 0.5 at high SNR and grows without bound as the SNR goes to zero
        (``T -> sqrt(2) sigma``).

    Notes
    -----
    Equal densities: ``(T/sigma^2) e^{-T^2/2sigma^2} = (T/sigma^2) e^{-(T^2+A^2)/2sigma^2}
    I0(AT/sigma^2)``, i.e. ``I0(x) = exp(a^2/2)`` with ``x = A T/sigma^2 = a b``,
    ``a = A/sigma``; solved for ``x`` by Brent's method on ``log I0`` (monotone for x >= 0).

    References
    ----------
    .. [1] Proakis and Salehi, Digital Communications, 5th ed., 2008, sec. 2.3 (densities).
    """
    a = 2.0 * np.sqrt(_gamma(ebn0_db))
    out = np.full(a.shape, np.inf)
    flat_a, flat_out = a.reshape(-1), out.reshape(-1)
    for i, ai in enumerate(flat_a):
        if ai > 0 and np.isfinite(ai):
            flat_out[i] = _ook_optimum_x(float(ai)) / (ai * ai)
        elif np.isinf(ai):
            flat_out[i] = 0.5
    return out


def _ook_optimum_ber(gamma: np.ndarray) -> np.ndarray:
    db = 10.0 * np.log10(np.where(gamma > 0, gamma, 1.0))
    frac = ook_optimum_threshold(db)
    ber = ook_ber_at_threshold(db, np.where(np.isfinite(frac), frac, 1.0))
    ber = np.where(gamma > 0, ber, 0.5)
    return np.where(np.isinf(gamma), 0.0, ber)


def _dqpsk_ber(gamma: np.ndarray) -> np.ndarray:
    a = np.sqrt(2.0 * gamma * (1.0 - math.sqrt(0.5)))
    b = np.sqrt(2.0 * gamma * (1.0 + math.sqrt(0.5)))
    # I0(ab) exp(-(a^2+b^2)/2) = i0e(ab) exp(-(b-a)^2/2), free of overflow
    with np.errstate(invalid="ignore"):
        ber = marcum_q1(a, b) - 0.5 * i0e(a * b) * np.exp(-0.5 * (b - a) ** 2)
    return np.where(np.isinf(gamma), 0.0, np.clip(ber, 0.0, 0.5))


def ber_theory(scheme: str, ebn0_db: ArrayLike) -> np.ndarray:
    """Theoretical bit error probability in AWGN.

    Parameters
    ----------
    scheme : str
        One of ``SCHEMES`` (see the module notes for the detector each assumes).
    ebn0_db : array_like
        Eb/N0 in dB (Eb: average energy per bit). ``-inf`` gives 0.5, ``+inf`` gives 0.

    Returns
    -------
    numpy.ndarray
        Bit error probability, float64, the shape of ``ebn0_db``.

    Raises
    ------
    ValueError
        For an unknown scheme or a NaN Eb/N0.

    Notes
    -----
    Equations in the module notes; sources [1]_ (coherent, noncoherent FSK, DBPSK, DQPSK)
    and [2]_ (OOK, from the Rayleigh/Rice densities).

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, ch. 4.
    .. [2] J. I. Marcum, IRE Trans. Information Theory 6(2), 1960.

    Examples
    --------
    >>> round(float(ber_theory("dbpsk", 10 * np.log10(np.log(50)))), 12)  # exp(-gamma)/2
    0.01
    """
    gamma = _gamma(ebn0_db)
    if scheme == "bpsk":
        return _q(np.sqrt(2.0 * gamma))
    if scheme == "coherent-2fsk":
        return _q(np.sqrt(gamma))
    if scheme == "2fsk":
        return 0.5 * np.exp(-0.5 * gamma)
    if scheme == "dbpsk":
        return 0.5 * np.exp(-gamma)
    if scheme == "dqpsk":
        return _dqpsk_ber(gamma)
    if scheme == "ook":
        return _ook_optimum_ber(gamma)
    raise ValueError(f"scheme must be one of {', '.join(SCHEMES)} (got {scheme!r})")


def ebn0_for_ber(scheme: str, target_ber: float) -> float:
    """Eb/N0 (dB) at which ``scheme`` reaches ``target_ber``: the inverse of ``ber_theory``.

    Parameters
    ----------
    scheme : str
        One of ``SCHEMES``.
    target_ber : float
        Bit error probability, ``1e-300 <= target_ber < 0.5``.

    Returns
    -------
    float
        Required Eb/N0 in dB (to about 1e-9 dB).

    Raises
    ------
    ValueError
        For an unknown scheme, a target outside the range, or a target so close to 0.5 that
        no Eb/N0 above -60 dB reaches it.

    Notes
    -----
    ``ber_theory`` falls monotonically with Eb/N0, so Brent's method [1]_ on
    ``log(Pb) - log(target)`` finds the single root inside a bracket widened in 1 dB steps.

    References
    ----------
    .. [1] R. P. Brent, Algorithms for Minimization without Derivatives, Prentice-Hall, 1973,
       ch. 4 (as implemented by ``scipy.optimize.brentq``).
    """
    if scheme not in SCHEMES:
        raise ValueError(f"scheme must be one of {', '.join(SCHEMES)} (got {scheme!r})")
    target = float(target_ber)
    if not (_SMALLEST_TARGET <= target < 0.5):
        raise ValueError(f"target_ber must be in [1e-300, 0.5) (got {target_ber!r})")
    log_target = math.log(target)

    def excess(db: float) -> float:
        # an underflowed probability counts as the smallest double, still below any target
        return math.log(max(float(ber_theory(scheme, db)), _TINY)) - log_target

    lo = -60.0
    if excess(lo) <= 0.0:
        raise ValueError(f"target_ber {target!r} is too close to 0.5 for {scheme}")
    hi = 0.0
    while excess(hi) > 0.0:
        lo, hi = hi, hi + 1.0
    return float(brentq(excess, lo, hi, xtol=1e-10, rtol=1e-14))
