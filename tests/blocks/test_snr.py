"""SNR kernels: the M2M4 moments estimator and the OOK level fit.

References: Pauluzzi & Beaulieu, "A comparison of SNR estimation techniques for the AWGN
channel", IEEE Trans. Commun. 48(10), 2000 (M2M4 for constant-modulus signals in complex
noise: S = sqrt(2 M2^2 - M4), N = M2 - S; form from memory); the moments of a noncentral
chi-square law from scipy.stats.ncx2 (a reference library).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.special import i0e
from scipy.stats import ncx2

from blocks._fsk_detect import tone_matrix
from blocks._snr import m2m4_powers, ook_level_fit, tone_pair_energies


def complex_noise(rng: np.random.Generator, n: int, power: float) -> np.ndarray:
    return (rng.normal(size=n) + 1j * rng.normal(size=n)) * math.sqrt(power / 2)


@pytest.mark.parametrize("dims", [1, 2, 3])
@pytest.mark.parametrize(("signal", "noise"), [(1.0, 1.0), (4.0, 0.25), (0.1, 2.0)])
def test_m2m4_inverts_the_exact_moments_of_the_noncentral_chi_square_law(dims, signal, noise):
    # Z = |s + n|^2 over d complex dimensions is (noise / 2) times a noncentral chi-square
    # with 2d degrees of freedom and noncentrality 2 P / noise (scipy.stats.ncx2); its exact
    # first and second moments must give back P and the noise power per dimension.
    law = ncx2(2 * dims, 2 * signal / noise, scale=noise / 2)
    m2, m4 = law.moment(1), law.moment(2)
    got_signal, got_noise = m2m4_powers(m2, m4, dims)
    assert got_signal == pytest.approx(signal, rel=1e-9)
    assert got_noise == pytest.approx(noise, rel=1e-9)


def test_m2m4_is_the_published_form_for_one_dimension():
    # Pauluzzi & Beaulieu (2000): S = sqrt(2 M2^2 - M4), N = M2 - S (from memory).
    m2, m4 = 3.0, 12.5
    s = math.sqrt(2 * m2 * m2 - m4)
    assert m2m4_powers(m2, m4) == pytest.approx((s, m2 - s))


def test_m2m4_on_dbpsk_samples_estimates_es_n0():
    # Monte Carlo: unit-modulus symbols with random signs and a random carrier phase in
    # complex Gaussian noise; the estimate ignores the phase (common practice: within
    # 0.2 dB for 20000 symbols at 3 dB).
    rng = np.random.default_rng(5)
    n, esn0 = 20_000, 10 ** 0.3
    y = (np.exp(1j * (np.pi * rng.integers(0, 2, n) + 0.7)) + complex_noise(rng, n, 1 / esn0))
    z = np.abs(y) ** 2
    s, noise = m2m4_powers(float(z.mean()), float(np.mean(z * z)))
    assert 10 * math.log10(s / noise) == pytest.approx(3.0, abs=0.2)


def test_m2m4_gives_no_signal_for_noise_alone_and_rejects_bad_moments():
    # Gaussian noise: M4 = 2 M2^2 exactly, so no signal.
    assert m2m4_powers(2.0, 8.0) == (0.0, 2.0)
    assert m2m4_powers(2.0, 9.0) == (0.0, 2.0)            # chance: root of a negative number
    with pytest.raises(ValueError, match="dims"):
        m2m4_powers(1.0, 2.0, 0)
    with pytest.raises(ValueError, match="m2 and m4"):
        m2m4_powers(math.nan, 2.0)


def test_tone_pair_energies_is_the_sum_of_both_correlator_energies():
    # Naive reference: correlate each symbol with each tone by an explicit sum.
    rng = np.random.default_rng(2)
    s, fs, dev = 8, 76_800.0, 4_800.0
    x = (rng.normal(size=5 * s) + 1j * rng.normal(size=5 * s)).astype(np.complex64)
    tones = tone_matrix(s, dev, fs)
    m = np.arange(s)
    want = [sum(abs(np.sum(x[k * s:(k + 1) * s] * np.exp(-2j * np.pi * f * m / fs))) ** 2
                for f in (-dev, dev)) for k in range(5)]
    np.testing.assert_allclose(tone_pair_energies(x, tones), want, rtol=1e-5)
    with pytest.raises(ValueError, match="multiple"):
        tone_pair_energies(x[:-1], tones)


@pytest.mark.parametrize("ebn0_db", [0.0, 6.0, 20.0])
def test_ook_level_fit_finds_the_on_energy_and_the_noise_power(ebn0_db):
    # Equiprobable OOK, on energy A^2 = 2 Eb (mean Eb/N0 as the simulator defines it), random
    # phase, complex noise of power 1: the maximum-likelihood fit recovers both levels.
    # Tolerance 0.5 dB over 8 x 2048 symbols pooled (common practice for the spread).
    rng = np.random.default_rng(int(ebn0_db) + 3)
    on = 2 * 10 ** (ebn0_db / 10)
    fits, fit = [], None
    for _ in range(8):
        bits = rng.integers(0, 2, 2048)
        y = math.sqrt(on) * bits * np.exp(2j * np.pi * rng.random(2048)) \
            + complex_noise(rng, 2048, 1.0)
        fit = ook_level_fit(np.abs(y) ** 2, fit, 0.5)
        fits.append((fit.signal, fit.noise))
    signal, noise = np.mean(fits, axis=0)
    assert 10 * math.log10(signal / 2 / noise) == pytest.approx(ebn0_db, abs=0.5)
    assert noise == pytest.approx(1.0, rel=0.1)


def mixture_loglik(z: np.ndarray, signal: float, noise: float, fraction: float) -> float:
    """Log-likelihood of the exponential / Rice mixture of OOK energies, with scipy.special.i0e.

    Off: z ~ exp(-z/s)/s; on: z ~ exp(-(z + A^2)/s) I0(2 A sqrt(z)/s)/s (Proakis & Salehi,
    Digital Communications, 5th ed., 2008, sec. 2.3).
    """
    k = 2.0 * math.sqrt(signal) * np.sqrt(z) / noise
    off = (1 - fraction) * np.exp(-z / noise) / noise
    on = fraction * np.exp(k - (z + signal) / noise) * i0e(k) / noise
    return float(np.sum(np.log(off + on)))


@pytest.mark.parametrize(("ebn0_db", "fixed"), [(3.0, 0.5), (3.0, None), (12.0, 0.5)])
def test_ook_level_fit_is_the_maximum_of_the_likelihood(ebn0_db, fixed):
    # Reference: scipy.optimize.minimize (Nelder-Mead) on the mixture likelihood written out
    # with scipy.special.i0e, from the same start the fit takes by default (the energy
    # detector's levels); the fit's default tolerance is 1e-4.
    rng = np.random.default_rng(int(ebn0_db))
    on = 2 * 10 ** (ebn0_db / 10)
    bits = rng.integers(0, 2, 2048)
    y = math.sqrt(on) * bits * np.exp(2j * np.pi * rng.random(2048)) \
        + complex_noise(rng, 2048, 1.0)
    z = np.abs(y) ** 2
    fit = ook_level_fit(z, None, fixed)
    if fixed is None:
        best = minimize(lambda t: -mixture_loglik(z, *t), [on, 1.0, 0.5], method="Nelder-Mead",
                        options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 10_000}).x
        assert fit.on_fraction == pytest.approx(best[2], rel=1e-4)
    else:
        best = minimize(lambda t: -mixture_loglik(z, *t, fixed), [on, 1.0], method="Nelder-Mead",
                        options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 10_000}).x
    assert fit.signal == pytest.approx(best[0], rel=1e-4)
    assert fit.noise == pytest.approx(best[1], rel=1e-4)
    # started from the fit itself, one more window's worth of work changes nothing
    again = ook_level_fit(z, fit, fixed)
    assert again.iterations <= 2
    assert again.signal == pytest.approx(fit.signal, rel=1e-4)


def test_ook_level_fit_can_fit_the_on_fraction_too():
    rng = np.random.default_rng(9)
    n, on = 8192, 40.0
    bits = rng.random(n) < 0.3
    y = math.sqrt(on) * bits * np.exp(2j * np.pi * rng.random(n)) + complex_noise(rng, n, 1.0)
    fit = ook_level_fit(np.abs(y) ** 2)
    assert fit.on_fraction == pytest.approx(0.3, abs=0.02)
    assert fit.signal == pytest.approx(on, rel=0.05)
    with pytest.raises(ValueError, match="on_fraction"):
        ook_level_fit(np.abs(y) ** 2, on_fraction=1.5)
    with pytest.raises(ValueError, match="at least 8"):
        ook_level_fit(np.ones(3))
