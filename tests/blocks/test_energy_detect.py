"""Tests of the OOK energy detector kernel (blocks/_energy_detect.py).

Scenario for the synthetic signals: a battery sensor node in an orchard keys its frost alarm
on and off; the receiver sees one matched-filter sample per symbol.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate, optimize, stats
from scipy.special import i0e

from blocks._energy_detect import (
    cfar_factor,
    energy_detect,
    estimate_levels,
    rice_threshold,
    two_level_split,
)
from blocks._theory import ber_theory

CONTRAST = 10.0  # 10 dB


def ook_symbols(bits: np.ndarray, ebn0_db: float, rng: np.random.Generator,
                noise_power: float = 1.0) -> np.ndarray:
    """On = A e^{j theta} + n, off = n, with E|n|^2 = noise_power and Eb/N0 = A^2 / (2 N0).

    Average energy per bit is A^2 / 2 for equiprobable bits (common practice).
    """
    amp = math.sqrt(2.0 * noise_power * 10 ** (ebn0_db / 10))
    theta = rng.uniform(0, 2 * np.pi, bits.shape[0])
    noise = rng.normal(0, math.sqrt(noise_power / 2), (bits.shape[0], 2)) @ [1, 1j]
    return (amp * bits * np.exp(1j * theta) + noise).astype(np.complex64)


def naive_split(z: np.ndarray) -> tuple[float, float]:
    """Two-cluster split by trying every cut and computing the within-class variance directly."""
    s = np.sort(z)
    best, means = math.inf, (0.0, 0.0)
    for k in range(1, s.shape[0]):
        cost = k * np.var(s[:k]) + (s.shape[0] - k) * np.var(s[k:])
        if cost < best:
            best, means = cost, (float(np.mean(s[:k])), float(np.mean(s[k:])))
    return means


def test_two_level_split_matches_exhaustive_search() -> None:
    # Reference: brute-force minimum within-cluster sum of squares (definition of 2-means).
    rng = np.random.default_rng(3)
    for _ in range(20):
        z = rng.exponential(1.0, 60) + rng.integers(0, 2, 60) * rng.uniform(2, 20)
        low, high, _ = two_level_split(z)
        ref = naive_split(z)
        assert low == pytest.approx(ref[0], rel=1e-12)
        assert high == pytest.approx(ref[1], rel=1e-12)


@pytest.mark.parametrize("snr", [0.5, 2.0, 10.0, 100.0, 400.0])
def test_rice_threshold_equates_the_two_densities(snr: float) -> None:
    # Reference: scipy.stats.rice for the on envelope and scipy.stats.rayleigh for the off
    # envelope (Proakis & Salehi, 5th ed., sec. 2.3); the minimum-error point for equal priors
    # is where the envelope densities cross. Envelope r = sqrt(z), per-axis variance 1/2.
    noise = 1.0
    scale = math.sqrt(noise / 2)
    b = math.sqrt(snr * noise) / scale

    def gap(r: float) -> float:
        return stats.rice.logpdf(r, b, scale=scale) - stats.rayleigh.logpdf(r, scale=scale)

    r_ref = optimize.brentq(gap, 1e-9, 2 * math.sqrt(snr) + 3)
    assert rice_threshold(snr * noise, noise) == pytest.approx(r_ref**2, rel=1e-9)


def test_rice_threshold_steps_reach_double_precision_over_the_snr_range() -> None:
    # Reference: scipy.optimize.brentq on log I0(x) = A^2 / sigma^2 (scipy.special.i0e), the
    # equation rice_threshold solves with a fixed number of Newton steps; T = (x s)^2 / (4 A^2).
    for gamma in np.geomspace(1e-3, 1e12, 61):
        x = optimize.brentq(lambda v, g=gamma: math.log(i0e(v)) + v - g, 1e-9,
                            2 * math.sqrt(gamma) + gamma + 10, xtol=1e-300, rtol=1e-15)
        assert rice_threshold(gamma, 1.0) == pytest.approx(x * x / (4 * gamma), rel=1e-12)


def test_rice_threshold_tends_to_quarter_power_at_high_snr() -> None:
    # From memory: at high SNR the optimum envelope threshold tends to half the on amplitude,
    # i.e. a quarter of the on power on |y|^2 (Proakis & Salehi, 5th ed., sec. 4.5).
    assert rice_threshold(1e6, 1.0) == pytest.approx(0.25e6, rel=1e-3)


@pytest.mark.parametrize("n", [2, 16, 256, 4096])
def test_cfar_factor_gives_the_target_rate_exactly(n: int) -> None:
    # Reference: numerical integration with scipy. For i.i.d. unit exponentials,
    # z_0 > alpha (z_0 + S) / n  <=>  z_0 > beta S with beta = alpha / (n - alpha) and
    # S ~ Gamma(n - 1), so P = integral of exp(-beta s) gamma.pdf(s, n - 1) ds.
    pfa = 1e-2
    alpha = cfar_factor(pfa, n)
    beta = alpha / (n - alpha)
    lo, hi = stats.gamma.ppf([1e-16, 1 - 1e-16], n - 1)
    value, _ = integrate.quad(lambda s: math.exp(-beta * s) * stats.gamma.pdf(s, n - 1),
                              lo, hi, points=[n - 1], limit=200, epsrel=1e-10)
    assert value == pytest.approx(pfa, rel=1e-6)
    # Large windows: alpha -> -ln(Pfa), the known-noise threshold T = -sigma^2 ln Pfa
    # (Richards, Fundamentals of Radar Signal Processing, ch. 7).
    if n == 4096:
        assert alpha == pytest.approx(-math.log(pfa), rel=2e-3)


def test_false_alarm_rate_on_noise_alone_matches_target() -> None:
    # Rayleigh envelope / exponential |y|^2 (scipy.stats.expon as the model); the count of
    # false alarms must lie in the 99.9 % binomial confidence interval of the target.
    rng = np.random.default_rng(11)
    n = 1 << 20
    noise = (rng.normal(0, math.sqrt(0.5), (n, 2)) @ [1, 1j]).astype(np.complex64) * 3.0
    for pfa in (1e-2, 1e-3):
        bits, _, levels, _ = energy_detect(noise, 256, pfa, CONTRAST, final=True)
        assert not any(lv.signal for lv in levels)
        ci = stats.binomtest(int(bits.sum()), n).proportion_ci(0.999)
        assert ci.low <= pfa <= ci.high, (bits.sum(), n * pfa)


def exact_ook_ber(ebn0_db: float) -> float:
    """Bit error rate at the true minimum-error threshold (scipy.stats.expon and ncx2).

    Off: |y|^2 / (N0/2) ~ chi-square 2 dof; on: noncentral chi-square 2 dof with
    noncentrality 2 A^2 / N0 (Proakis & Salehi, 5th ed., sec. 2.3).
    """
    snr = 2 * 10 ** (ebn0_db / 10)
    t = rice_threshold(snr, 1.0)
    p_false = stats.expon.sf(t)
    p_miss = stats.ncx2.cdf(2 * t, 2, 2 * snr)
    return 0.5 * (p_false + p_miss)


@pytest.mark.parametrize("ebn0_db", [9.0, 11.0])
def test_ber_agrees_with_theory(ebn0_db: float) -> None:
    rng = np.random.default_rng(int(ebn0_db))
    n = 400_000
    bits = rng.integers(0, 2, n).astype(np.uint8)
    y = ook_symbols(bits, ebn0_db, rng)
    got, _, _, _ = energy_detect(y, 256, 1e-3, CONTRAST, final=True)
    errors = int(np.count_nonzero(got != bits))
    p = exact_ook_ber(ebn0_db)
    # Cross-check with the project's theory module (same exact expression).
    assert ber_theory("ook", ebn0_db)[()] == pytest.approx(p, rel=1e-6)
    # Levels are estimated over 256 symbols, so allow the small estimation loss on top of the
    # 99.9 % interval: the measured rate must not beat theory and may exceed it by 15 %.
    ci = stats.binomtest(errors, n).proportion_ci(0.999)
    assert ci.low <= p * 1.15 and ci.high >= p, (errors / n, p)


def naive_threshold(noise: float, on: float) -> float:
    """Minimum-error threshold by root finding on the scipy densities of z / noise."""
    gamma = (on - noise) / noise
    x = optimize.brentq(lambda v: stats.ncx2.logpdf(2 * v, 2, 2 * gamma) + math.log(2.0)
                        - stats.expon.logpdf(v), 1e-9, 10 * gamma + 10, xtol=1e-14)
    return noise * x


def naive_decide(z: np.ndarray, window: int, pfa: float) -> np.ndarray:
    """Per-symbol reference: per window, brute-force 2-means, three re-splits at the
    minimum-error threshold with the truncated-exponential correction of the off mean, then
    the contrast test; a failing window whose mean is above the last good threshold keeps it,
    other windows are noise only and use the CFAR threshold."""
    out = np.zeros(z.shape[0], np.uint8)
    held = None
    for w0 in range(0, z.shape[0], window):
        w = list(z[w0:w0 + window])
        noise, on = naive_split(np.array(w))
        t = naive_threshold(noise, on)
        for _ in range(3):
            off = [v for v in w if v <= t]
            hi = [v for v in w if v > t]
            u = t / noise
            noise = (sum(off) / len(off)) / (1 - u * math.exp(-u) / (1 - math.exp(-u)))
            on = sum(hi) / len(hi)
            t = naive_threshold(noise, on)
        if on >= CONTRAST * noise:
            held = t
        elif held is not None and sum(w) / len(w) >= held:
            t = held                      # a window of "on" symbols: keep the last levels
        else:
            t = cfar_factor(pfa, len(w)) * sum(w) / len(w)
        for i, v in enumerate(w):
            out[w0 + i] = 1 if v > t else 0
    return out


def test_decisions_match_naive_reference() -> None:
    rng = np.random.default_rng(5)
    bits = rng.integers(0, 2, 64 * 6).astype(np.uint8)
    y = ook_symbols(bits, 8.0, rng)
    y[64 * 4:64 * 5] = ook_symbols(np.zeros(64, np.uint8), 8.0, rng)   # a noise-only window
    z = np.abs(y.astype(np.complex128)) ** 2
    got, _, levels, _ = energy_detect(y, 64, 1e-3, CONTRAST, final=True)
    assert [lv.signal for lv in levels][3:] == [True, False, True]
    np.testing.assert_array_equal(got, naive_decide(z, 64, 1e-3))


def test_phase_rotation_changes_no_decision() -> None:
    # Noncoherent detection ignores the carrier phase (Proakis & Salehi, 5th ed., sec. 4.5).
    rng = np.random.default_rng(8)
    bits = rng.integers(0, 2, 4096).astype(np.uint8)
    y = ook_symbols(bits, 10.0, rng)
    ref, _, _, _ = energy_detect(y, 256, 1e-3, CONTRAST, final=True)
    for theta in np.linspace(0.1, 2 * np.pi, 17):
        rot = (y * np.complex64(np.exp(1j * theta))).astype(np.complex64)
        got, _, _, _ = energy_detect(rot, 256, 1e-3, CONTRAST, final=True)
        np.testing.assert_array_equal(got, ref)


def test_run_of_ones_after_training_keeps_the_held_levels() -> None:
    # A payload of 0xFF bytes longer than a window must still decode as ones (common practice:
    # the preamble trains the levels).
    rng = np.random.default_rng(9)
    bits = np.concatenate([rng.integers(0, 2, 256), np.ones(512, int)]).astype(np.uint8)
    got, _, levels, _ = energy_detect(ook_symbols(bits, 12.0, rng), 256, 1e-3, CONTRAST,
                                      final=True)
    assert all(lv.signal for lv in levels)
    assert np.count_nonzero(got != bits) <= 2


def test_chunked_equals_whole() -> None:
    rng = np.random.default_rng(10)
    bits = rng.integers(0, 2, 3000).astype(np.uint8)
    y = ook_symbols(bits, 10.0, rng)
    whole_bits, whole_soft, _, _ = energy_detect(y, 128, 1e-3, CONTRAST, final=True)
    state, parts_b, parts_s = None, [], []
    cuts = [0, 1, 7, 300, 301, 1290, 2999, 3000]
    for i, (a, b) in enumerate(itertools.pairwise(cuts)):
        got_b, got_s, _, state = energy_detect(y[a:b], 128, 1e-3, CONTRAST, state,
                                               final=i == len(cuts) - 2)
        parts_b.append(got_b)
        parts_s.append(got_s)
    np.testing.assert_array_equal(np.concatenate(parts_b), whole_bits)
    np.testing.assert_allclose(np.concatenate(parts_s), whole_soft, rtol=1e-6)


def test_levels_report_on_off_statistics() -> None:
    rng = np.random.default_rng(12)
    bits = rng.integers(0, 2, 256).astype(np.uint8)
    y = ook_symbols(bits, 15.0, rng, noise_power=0.01)
    got, soft, levels, _ = energy_detect(y, 256, 1e-3, CONTRAST, final=True)
    lv = levels[0]
    z = np.abs(y.astype(np.complex128)) ** 2
    assert lv.ones == int(got.sum()) and lv.zeros == 256 - lv.ones
    assert lv.ones_mean == pytest.approx(np.mean(z[got == 1]))
    assert lv.zeros_var == pytest.approx(np.var(z[got == 0]))
    assert lv.noise_floor == pytest.approx(0.01, rel=0.3)
    assert np.all((soft > 0) == (got == 1))


def test_estimate_levels_rejects_nothing_silently() -> None:
    with pytest.raises(ValueError, match="false_alarm"):
        cfar_factor(1.5, 10)
    with pytest.raises(ValueError, match="window"):
        energy_detect(np.zeros(4, np.complex64), 0, 1e-3, CONTRAST)
    lv = estimate_levels(np.zeros(300), 1e-3, CONTRAST)
    assert not lv.signal and lv.threshold == 0.0
