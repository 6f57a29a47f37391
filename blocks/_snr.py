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

import numpy as np
from scipy.special import expit, i0e, i1e

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
        EM iterations run.
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
        Most EM iterations.
    tolerance : float
        Stop when ``A^2`` and ``sigma^2`` both change by less than this, relatively.

    Returns
    -------
    OokFit

    Notes
    -----
    Model (common practice, as in ``blocks/_energy_detect.py``): an "off" symbol is circular
    complex Gaussian noise of power ``sigma^2``; an "on" symbol is ``A e^{j theta} + n`` with
    an unknown phase ``theta``, so ``z`` is exponential or Rice-distributed. The fit is the EM
    algorithm [2]_ with the symbol's state and the phase ``theta`` as the missing data:

    - E-step: the posterior probability of "on", ``w = expit(LLR + log(pi / (1 - pi)))``
      with the LLR of ``blocks._energy_detect.ook_llr``; and for an "on" symbol the phase
      posterior is von Mises with concentration ``k = 2 A sqrt(z) / sigma^2``, so
      ``E[cos(theta - arg y)] = I1(k) / I0(k)``.
    - M-step: ``pi = mean(w)``, ``A = sum(w sqrt(z) I1/I0) / sum(w)``, and ``sigma^2`` the mean
      expected ``|n|^2``: ``z`` for "off", ``z - 2 A sqrt(z) I1/I0 + A^2`` for "on".

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
    root = np.sqrt(z)
    n = z.shape[0]
    done = 0
    while done < iterations:
        done += 1
        a = math.sqrt(signal)
        # kappa is also the Bessel argument of ook_llr: one I0 serves the LLR and the ratio
        kappa = 2.0 * a * root / noise
        scaled_i0 = i0e(kappa)
        llr = (np.log(scaled_i0) + kappa) - signal / noise
        w = expit(llr + math.log(fraction / (1.0 - fraction)))
        ratio = i1e(kappa) / scaled_i0
        weight = float(w.sum())
        if on_fraction is None:
            fraction = min(max(weight / n, 1e-6), 1.0 - 1e-6)
        a_new = float(np.dot(w, root * ratio)) / weight if weight > 0 else 0.0
        expected = z - w * (2.0 * a_new * root * ratio - a_new * a_new)
        noise_new = max(float(expected.mean()), 1e-300)
        signal_new = max(a_new * a_new, 1e-12 * noise_new)
        converged = (abs(signal_new - signal) <= tolerance * signal_new
                     and abs(noise_new - noise) <= tolerance * noise_new)
        signal, noise = signal_new, noise_new
        if converged:
            break
    return OokFit(signal, noise, fraction, done)
