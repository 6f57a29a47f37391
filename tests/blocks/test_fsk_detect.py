"""Tests of the 2-FSK tone-correlator detector kernel (blocks/_fsk_detect.py).

Synthetic scenario: an orchard frost sensor sends 2-FSK readings at 1200 symbols/s, the
receiver's timing block hands over 8 samples per symbol.
"""

from __future__ import annotations

import cmath
import math

import numpy as np
import pytest
from scipy import stats

from blocks._fsk_detect import fsk_detect, tone_matrix
from blocks._modulate import bits_to_symbols, design_modulator, modulate
from blocks._theory import ber_theory

RATE, SPS, DEV = 1200.0, 8, 600.0


def fsk_samples(bits: np.ndarray, ebn0_db: float, rng: np.random.Generator) -> np.ndarray:
    """Unit-amplitude tones with a random phase per symbol, plus complex AWGN.

    Eb = S * 1 (sum of |x|^2 over a symbol) and N0 = E|n|^2 per sample (common practice for
    discrete-time matched-filter SNR).
    """
    n = np.arange(SPS)
    f = np.where(bits[:, None] == 1, DEV, -DEV)
    phase = rng.uniform(0, 2 * np.pi, (bits.shape[0], 1))
    x = np.exp(1j * (2 * np.pi * f * n / (RATE * SPS) + phase))
    sigma2 = SPS / 10 ** (ebn0_db / 10)
    noise = rng.normal(0, math.sqrt(sigma2 / 2), (bits.shape[0], SPS, 2)) @ [1, 1j]
    return (x + noise).astype(np.complex64).ravel()


def naive_fsk(x: np.ndarray) -> np.ndarray:
    """Per-symbol, per-sample correlator loop (square-law, Proakis & Salehi sec. 4.5)."""
    out = []
    for k in range(x.shape[0] // SPS):
        e = []
        for f in (-DEV, DEV):
            acc = 0j
            for i in range(SPS):
                acc += complex(x[k * SPS + i]) * cmath.exp(-2j * math.pi * f * i / (RATE * SPS))
            e.append(abs(acc) ** 2)
        out.append(1 if e[1] > e[0] else 0)
    return np.array(out, np.uint8)


def test_decisions_match_naive_correlators() -> None:
    rng = np.random.default_rng(1)
    bits = rng.integers(0, 2, 500).astype(np.uint8)
    x = fsk_samples(bits, 6.0, rng)
    got, soft, rest = fsk_detect(x, tone_matrix(SPS, DEV, RATE * SPS))
    np.testing.assert_array_equal(got, naive_fsk(x))
    assert rest.size == 0 and np.all(np.abs(soft) <= 1) and np.all((soft > 0) == (got == 1))


def test_transmitter_mapping_upper_tone_is_one() -> None:
    # The transmitter (blocks/_modulate.py) sends +deviation for a 1.
    rng = np.random.default_rng(2)
    bits = rng.integers(0, 2, 300).astype(np.uint8)
    mod = design_modulator("2fsk", RATE, RATE * SPS, deviation_hz=DEV)
    x, _ = modulate(bits_to_symbols(bits, "2fsk"), mod)
    got, _, _ = fsk_detect(x, tone_matrix(SPS, DEV, RATE * SPS))
    np.testing.assert_array_equal(got, bits)


def test_phase_rotation_changes_no_decision() -> None:
    # Noncoherent detection (Proakis & Salehi, 5th ed., sec. 4.5): the carrier phase cancels.
    rng = np.random.default_rng(3)
    x = fsk_samples(rng.integers(0, 2, 2000).astype(np.uint8), 5.0, rng)
    tones = tone_matrix(SPS, DEV, RATE * SPS)
    ref, _, _ = fsk_detect(x, tones)
    for theta in np.linspace(0.2, 2 * np.pi, 13):
        got, _, _ = fsk_detect((x * np.complex64(np.exp(1j * theta))), tones)
        np.testing.assert_array_equal(got, ref)


@pytest.mark.parametrize("ebn0_db", [6.0, 9.0])
def test_ber_agrees_with_noncoherent_bfsk_theory(ebn0_db: float) -> None:
    # Pb = 0.5 exp(-Eb / 2N0) for noncoherent orthogonal BFSK (Proakis & Salehi, 5th ed.,
    # sec. 4.5); tone spacing 2 * 600 Hz = symbol rate keeps the tones orthogonal.
    rng = np.random.default_rng(int(ebn0_db) + 10)
    n = 200_000
    bits = rng.integers(0, 2, n).astype(np.uint8)
    got, _, _ = fsk_detect(fsk_samples(bits, ebn0_db, rng), tone_matrix(SPS, DEV, RATE * SPS))
    p = 0.5 * math.exp(-(10 ** (ebn0_db / 10)) / 2)
    # Cross-check with the project's theory module (same closed forms).
    assert ber_theory("2fsk", ebn0_db)[()] == pytest.approx(p, rel=1e-6)
    ci = stats.binomtest(int(np.count_nonzero(got != bits)), n).proportion_ci(0.999)
    assert ci.low <= p <= ci.high


def test_chunked_equals_whole() -> None:
    rng = np.random.default_rng(4)
    x = fsk_samples(rng.integers(0, 2, 400).astype(np.uint8), 8.0, rng)
    tones = tone_matrix(SPS, DEV, RATE * SPS)
    whole_b, whole_s, _ = fsk_detect(x, tones)
    state, bs, ss = None, [], []
    for piece in np.array_split(x, [3, 5, 77, 1000, 1003, 3001]):
        b, s, state = fsk_detect(piece, tones, state)
        bs.append(b)
        ss.append(s)
    np.testing.assert_array_equal(np.concatenate(bs), whole_b)
    np.testing.assert_allclose(np.concatenate(ss), whole_s, rtol=1e-6)


def test_bad_settings_are_named() -> None:
    with pytest.raises(ValueError, match="deviation_hz"):
        tone_matrix(8, 0.0, 9600.0)
    with pytest.raises(ValueError, match="sample_rate"):
        tone_matrix(8, 6000.0, 9600.0)
