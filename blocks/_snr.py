"""Signal-to-noise estimation without carrier phase: moments (M2M4) and the OOK level fit.

Three estimators, each of ``Es/N0`` at the output of the receiver's matched filter (or the
2-FSK tone correlators), where one complex value per symbol carries the whole symbol energy:

- DBPSK and DQPSK, one sample per symbol after the matched filter: the signal has constant
  modulus, so the second and fourth moments of ``|y|`` give signal and noise power (M2M4 [1]_).
- 2-FSK: the pair of tone-correlator outputs of a symbol is a signal of constant energy in two
  complex dimensions plus complex Gaussian noise in both; the same moments, generalised to
  ``d`` dimensions (``m2m4_powers`` with ``dims = 2``), give the energies.
- OOK: the moments carry no information for equiprobable on-off keying (see ``m2m4_powers``
  Notes), so the energies ``|y|^2`` are fitted with the Rayleigh/Rice mixture of "off" and
  "on" symbols by maximum likelihood (``ook_level_fit``), started from the energy detector's
  own level estimate.

References
----------
.. [1] D. R. Pauluzzi and N. C. Beaulieu, "A comparison of SNR estimation techniques for the
   AWGN channel", IEEE Trans. Commun. 48(10), 1681-1691, 2000.
.. [2] A. P. Dempster, N. M. Laird and D. B. Rubin, "Maximum likelihood from incomplete data
   via the EM algorithm", J. Royal Statistical Society B 39(1), 1-38, 1977.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from blocks._bessel import log_i0_and_ratio
from blocks._energy_detect import estimate_levels, two_level_split

__all__ = [
    "OokFit",
    "m2m4_powers",
    "ook_level_fit",
    "tone_pair_energies",
]

#: Iteration limit and relative tolerance of the OOK maximum-likelihood fit.
FIT_ITERATIONS = 200
FIT_TOLERANCE = 1e-4


def m2m4_powers(m2: float, m4: float, dims: int = 1) -> tuple[float, float]:
    """Signal and noise power from the second and fourth moments of the received magnitude.

    Parameters
    ----------
    m2 : float
        ``E[Z]`` with ``Z = |y|^2`` (for ``dims > 1``, ``Z`` summed over the dimensions).
    m4 : float
        ``E[Z^2]``.
    dims : int
        Number of complex dimensions ``d`` the noise occupies (1: a single complex sample;
        2: the two tone correlators of binary FSK).

    Returns
    -------
    signal : float
        Estimated signal energy ``P = sqrt((d + 1) m2^2 - d m4)`` (0 where the root's
        argument is negative, which happens by chance at very low SNR).
    noise : float
        Estimated noise power per complex dimension, ``(m2 - P) / d``.

    Notes
    -----
    For ``y = s + n`` with ``|s|^2 = P`` constant and ``n`` circular complex Gaussian of
    variance ``sigma^2`` in each of ``d`` complex dimensions, ``|n|^2`` is Gamma-distributed
    with ``E|n|^4 = d (d + 1) sigma^4``, and

    ``m2 = P + d sigma^2``,  ``m4 = P^2 + 2 (d + 1) P sigma^2 + d (d + 1) sigma^4``,

    so ``(d + 1) m2^2 - d m4 = P^2``. For ``d = 1`` this is the M2M4 estimator of [1]_ for
    constant-modulus (M-PSK) signals in complex noise, ``S = sqrt(2 M2^2 - M4)``,
    ``N = M2 - S`` (the form for complex baseband, signal kurtosis 1 and noise kurtosis 2; the
    equation number is not quoted, from memory). The extension to ``d`` dimensions follows the
    same steps (derived here). For equiprobable OOK with on energy ``A^2`` the same moments
    give ``m4 = 2 m2^2`` whatever ``A`` is, so they cannot separate signal from noise.

    References
    ----------
    .. [1] D. R. Pauluzzi and N. C. Beaulieu, IEEE Trans. Commun. 48(10), 1681-1691, 2000.
    """
    if dims < 1:
        raise ValueError(f"dims must be >= 1 (got {dims})")
    if not (math.isfinite(m2) and math.isfinite(m4)) or m2 < 0 or m4 < 0:
        raise ValueError(f"m2 and m4 must be finite and >= 0 (got {m2!r}, {m4!r})")
    square = (dims + 1) * m2 * m2 - dims * m4
    signal = math.sqrt(square) if square > 0 else 0.0
    signal = min(signal, m2)
    return signal, (m2 - signal) / dims


def tone_pair_energies(x: np.ndarray, tones: np.ndarray) -> np.ndarray:
    """Total energy of the two tone-correlator outputs of every whole symbol.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 samples of whole symbols, ``S`` per symbol (``len(x)`` a multiple of ``S``).
    tones : numpy.ndarray
        ``blocks._fsk_detect.tone_matrix(S, deviation_hz, sample_rate)``, shape ``(S, 2)``.

    Returns
    -------
    numpy.ndarray
        float64 ``|c0|^2 + |c1|^2`` per symbol, ``c_i = sum_n x[n] conj(t_i[n])``: the two
        noncoherent correlator outputs of binary FSK (Proakis & Salehi, Digital
        Communications, 5th ed., 2008, sec. 4.5).
    """
    s = tones.shape[0]
    if x.shape[0] % s:
        raise ValueError(f"len(x) must be a multiple of samples per symbol {s} "
                         f"(got {x.shape[0]})")
    c = np.asarray(x, dtype=np.complex64).reshape(-1, s) @ tones
    e = c.real.astype(np.float64) ** 2 + c.imag.astype(np.float64) ** 2
    return e.sum(axis=1)


@dataclass(frozen=True)
class OokFit:
    """Levels of an OOK window fitted by maximum likelihood.

    Attributes
    ----------
    signal : float
        ``A^2``, the energy of a noiseless "on" symbol.
    noise : float
        ``sigma^2 = E|n|^2``, the complex noise power per symbol.
    on_fraction : float
        Estimated fraction of "on" symbols.
    iterations : int
        Iterations run.
    """

    signal: float
    noise: float
    on_fraction: float
    iterations: int


def _start_levels(z: np.ndarray) -> tuple[float, float, float]:
    """First guess (A^2, sigma^2, on fraction): the energy detector's levels, else two-means."""
    levels = estimate_levels(z, 1e-3, 1.0)
    if levels.signal and levels.on_level > levels.noise_floor:
        signal, noise = levels.on_level - levels.noise_floor, levels.noise_floor
        fraction = float(np.mean(z > levels.threshold))
    else:
        low, high, k = two_level_split(z)
        signal, noise = high - low, low
        fraction = 1.0 - k / z.shape[0]
    return max(signal, 1e-12 * noise), max(noise, 1e-300), min(max(fraction, 0.01), 0.99)


class _Terms(NamedTuple):
    """The log-likelihood of an OOK window at one point, its derivatives and the EM update."""

    loglik: float
    gradient: list[float]
    hessian: list[list[float]]
    em: tuple[float, float, float]


class _Window(NamedTuple):
    """One window's energies, prepared once for every iteration of ``ook_level_fit``."""

    z: np.ndarray
    root: np.ndarray
    z_sum: float
    ones: np.ndarray
    #: work arrays of an evaluation: w, w q, v, v q, log w, -eta
    work: np.ndarray

    @classmethod
    def of(cls, z: np.ndarray) -> _Window:
        n = z.shape[0]
        return cls(z, np.sqrt(z), float(z.sum()), np.ones(n), np.empty((6, n)))


def _likelihood_terms(win: _Window, a: float, s: float, p: float, fit_fraction: bool) -> _Terms:
    """Log-likelihood of the Rayleigh/Rice mixture at ``(A, sigma^2[, pi])`` and its terms.

    Every per-symbol quantity enters through a few weighted sums: with ``w`` the posterior of
    "on" (the E-step of ``ook_level_fit``), ``v = w (1 - w)`` and ``q = sqrt(z) I1/I0`` at
    ``kappa = 2 A sqrt(z) / sigma^2``, the gradient and the Hessian need ``sum w q^k``
    (``k <= 2``), ``sum w z`` and ``sum v q^k`` (``k <= 2``), because ``d eta / dA`` and
    ``d eta / d sigma^2`` of the log posterior odds ``eta`` are linear in ``q``, and
    ``d(I1/I0)/dx = 1 - (I1/I0)/x - (I1/I0)^2`` [1]_ turns the second derivatives of ``q``
    into the same sums.

    References
    ----------
    .. [1] M. Abramowitz and I. A. Stegun, Handbook of Mathematical Functions, Dover, 1965,
       9.6.27.
    """
    n, z_sum, ones = win.z.shape[0], win.z_sum, win.ones
    w, wq, v, vq, log_w, m = win.work
    logit = math.log(p / (1.0 - p))
    kappa = win.root * (2.0 * a / s)
    log_i0, q = log_i0_and_ratio(kappa)
    # m = -eta, the log odds of "off"; beyond 700 the posterior of "on" is 0 to double precision
    np.subtract(a * a / s - logit, log_i0, out=m)
    np.minimum(m, 700.0, out=m)
    e = np.exp(m, out=kappa)
    np.add(e, 1.0, out=w)
    np.reciprocal(w, out=w)
    np.multiply(w, w, out=v)
    v *= e                                   # w (1 - w) = w^2 e, exact where w is near 1
    np.log(w, out=log_w)                     # w >= e^-700 stays a normal number
    q *= win.root
    np.multiply(w, q, out=wq)
    np.multiply(v, q, out=vq)
    # sums as dot products: one BLAS call each, cheaper than reductions at this size
    w0, w1, w2 = float(np.dot(w, ones)), float(np.dot(wq, ones)), float(np.dot(wq, q))
    v0, v1, v2 = float(np.dot(v, ones)), float(np.dot(vq, ones)), float(np.dot(vq, q))
    wz = float(np.dot(w, win.z))
    # log(1 + e^eta) = -log(w) + eta
    loglik = (-n * math.log(s) - z_sum / s + n * math.log1p(-p)
              - float(np.dot(log_w, ones)) - float(np.dot(m, ones)))
    rho = wz - 0.5 * s / a * w1 - w2        # sum w z (I1/I0)'(kappa)
    gradient = [2.0 / s * (w1 - a * w0), (-n + z_sum / s + (a * a * w0 - 2.0 * a * w1) / s) / s]
    h_aa = 4.0 / s**2 * (v2 - 2.0 * a * v1 + a * a * v0 + rho) - 2.0 / s * w0
    h_as = (2.0 / s**3 * (3.0 * a * a * v1 - 2.0 * a * v2 - a**3 * v0)
            - 2.0 / s**2 * (w1 - a * w0) - 4.0 * a / s**3 * rho)
    h_ss = (n / s**2 - 2.0 * z_sum / s**3
            + (a**4 * v0 - 4.0 * a**3 * v1 + 4.0 * a * a * v2) / s**4
            - 2.0 * (a * a * w0 - 2.0 * a * w1) / s**3 + 4.0 * a * a / s**4 * rho)
    hessian = [[h_aa, h_as], [h_as, h_ss]]
    a_em = w1 / w0 if w0 > 0 else 0.0
    s_em = max((z_sum - 2.0 * a_em * w1 + a_em * a_em * w0) / n, 1e-300)
    p_em = p
    if fit_fraction:
        pq = p * (1.0 - p)
        gradient.append((w0 - n * p) / pq)
        h_pa = 2.0 / s * (v1 - a * v0) / pq
        h_ps = (a * a * v0 - 2.0 * a * v1) / s**2 / pq
        h_pp = -(w0 - v0 - 2.0 * p * w0 + n * p * p) / pq**2
        hessian = [[h_aa, h_as, h_pa], [h_as, h_ss, h_ps], [h_pa, h_ps, h_pp]]
        p_em = min(max(w0 / n, 1e-6), 1.0 - 1e-6)
    return _Terms(loglik, gradient, hessian, (a_em, s_em, p_em))


def _em_update(terms: _Terms) -> tuple[float, float, float]:
    """The EM update of ``terms``, kept inside the domain of the fit."""
    a, s, p = terms.em
    return max(a, math.sqrt(1e-12 * s)), s, p


def _newton_step(gradient: list[float], hessian: list[list[float]]) -> list[float] | None:
    """``-H^-1 g`` by the Cholesky factors of ``-H``; None where ``-H`` is not positive definite.

    At most three unknowns, so plain Python beats a LAPACK call.
    """
    k = len(gradient)
    low = [[0.0] * k for _ in range(k)]
    for i in range(k):
        for j in range(i + 1):
            acc = -hessian[i][j] - sum(low[i][m] * low[j][m] for m in range(j))
            if i == j:
                if not acc > 0.0:
                    return None
                low[i][i] = math.sqrt(acc)
            else:
                low[i][j] = acc / low[j][j]
    y = [0.0] * k
    for i in range(k):
        y[i] = (gradient[i] - sum(low[i][m] * y[m] for m in range(i))) / low[i][i]
    step = [0.0] * k
    for i in reversed(range(k)):
        step[i] = (y[i] - sum(low[m][i] * step[m] for m in range(i + 1, k))) / low[i][i]
    return step


def ook_level_fit(z: np.ndarray, start: OokFit | None = None, on_fraction: float | None = None,
                  iterations: int = FIT_ITERATIONS, tolerance: float = FIT_TOLERANCE) -> OokFit:
    """Fit the on/off level statistics of OOK symbol energies by maximum likelihood.

    Parameters
    ----------
    z : numpy.ndarray
        Energies ``|y|^2`` of one sample per symbol after the matched filter (at least 8).
    start : OokFit or None
        Where to start the iteration, e.g. the fit of the previous window of the same stream
        (fewer iterations); None: the energy detector's levels (see Notes).
    on_fraction : float or None
        Known fraction of "on" symbols (0.5 for equiprobable bits), held fixed; None: fitted
        too. Fixing it makes the fit far steadier where the clusters overlap.
    iterations : int
        Most iterations.
    tolerance : float
        Relative accuracy sought for ``A^2`` and ``sigma^2``: stop after an EM update that
        changes both by less than this, or a Newton update that changes both by less than
        ``0.3 sqrt(tolerance)`` (the error a Newton step leaves is of the order of the square
        of the step).

    Returns
    -------
    OokFit

    Notes
    -----
    Model (common practice, as in ``blocks/_energy_detect.py``): an "off" symbol is circular
    complex Gaussian noise of power ``sigma^2``; an "on" symbol is ``A e^{j theta} + n`` with
    an unknown phase ``theta``, so ``z`` is exponential or Rice-distributed. The likelihood is
    maximised over ``A``, ``sigma^2`` (and the on fraction ``pi`` when it is fitted) by
    Newton's method, safeguarded by the EM algorithm [2]_, whose update comes from the same
    sums (``_likelihood_terms``). EM has the symbol's state and the phase ``theta`` as the
    missing data:

    - E-step: the posterior probability of "on", ``w = expit(LLR + log(pi / (1 - pi)))``
      with the LLR of ``blocks._energy_detect.ook_llr``; and for an "on" symbol the phase
      posterior is von Mises with concentration ``k = 2 A sqrt(z) / sigma^2``, so
      ``E[cos(theta - arg y)] = I1(k) / I0(k)``.
    - M-step: ``pi = mean(w)``, ``A = sum(w sqrt(z) I1/I0) / sum(w)``, and ``sigma^2`` the mean
      expected ``|n|^2``: ``z`` for "off", ``z - 2 A sqrt(z) I1/I0 + A^2`` for "on".

    Every iteration takes the Newton step where the Hessian is negative definite (shortened
    where it would change a parameter by more than half), else the EM step; a Newton step
    that lowered the likelihood is undone and replaced by the EM step from the point before,
    which never lowers it [2]_.
    Near the maximum Newton's method converges quadratically, where EM slows down as the
    clusters overlap (EM's rate is the fraction of missing information), so a window started
    from the previous window's fit takes two to four iterations at any SNR. The Bessel terms
    come from ``blocks._bessel``.

    The default start is the energy detector's level estimate (``estimate_levels``), which the fit
    then frees from the bias of splitting at a threshold, so it stays usable where the two
    energy clusters overlap (on-symbol SNR of a few dB).

    References
    ----------
    .. [2] A. P. Dempster, N. M. Laird and D. B. Rubin, J. Royal Statistical Society B 39(1),
       1-38, 1977.
    """
    z = np.asarray(z, dtype=np.float64)
    if z.shape[0] < 8:
        raise ValueError(f"z must hold at least 8 energies (got {z.shape[0]})")
    if start is None:
        signal, noise, fraction = _start_levels(z)
    else:
        signal, noise = start.signal, start.noise
        fraction = min(max(start.on_fraction, 0.01), 0.99)
    if on_fraction is not None:
        if not 0.0 < on_fraction < 1.0:
            raise ValueError(f"on_fraction must be in (0, 1) (got {on_fraction!r})")
        fraction = float(on_fraction)
    fit_fraction = on_fraction is None
    win = _Window.of(z)
    point = (math.sqrt(signal), noise, fraction)      # (A, sigma^2, pi)
    before: _Terms | None = None    # terms at the last point reached by an accepted update
    base = point                    # where the last accepted update started
    step = (0.0, 0.0, 0.0)
    how = "em"                      # how ``point`` was reached: "em", "newton" or "half"
    done = 0
    while done < iterations:
        done += 1
        terms = _likelihood_terms(win, *point, fit_fraction)
        if (before is not None and how != "em"
                and terms.loglik < before.loglik - 1e-12 * abs(before.loglik)):
            # the Newton step went downhill: try half of it, then the EM update
            if how == "newton":
                point = tuple(v + 0.5 * d for v, d in zip(base, step, strict=True))
                how = "half"
            else:
                point, how = _em_update(before), "em"
            continue
        before, base = terms, point
        newton = _newton_step(terms.gradient, terms.hessian)
        if newton is None:
            new, how = _em_update(terms), "em"
        else:
            a, s, p = point
            # far from the maximum, a step is shortened to change no parameter by over half
            reach = max(abs(d) / v for d, v in zip(newton, (a, s, min(p, 1.0 - p)),
                                                     strict=False))
            shrink = min(1.0, 0.5 / reach) if reach > 0 else 1.0
            step = (shrink * newton[0], shrink * newton[1],
                    shrink * newton[2] if fit_fraction else 0.0)
            new = tuple(v + d for v, d in zip(point, step, strict=True))
            how = "newton"
        # the error left by a Newton step is of the order of the step squared
        limit = tolerance if how == "em" else 0.3 * math.sqrt(tolerance)
        (a, s, _), (a_new, s_new, _) = point, new
        point = new
        if (abs(a_new * a_new - a * a) <= limit * a_new * a_new
                and abs(s_new - s) <= limit * s_new):
            break
    a, s, p = point
    return OokFit(a * a, s, p, done)
