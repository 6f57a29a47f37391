"""Tests of the DBPSK / pi/4-DQPSK differential detector kernel (blocks/_dpsk_detect.py).

Synthetic scenario: orchard frost sensors report with DBPSK or pi/4-DQPSK at one
matched-filter sample per symbol.
"""

from __future__ import annotations

import cmath
import math

import numpy as np
import pytest
from scipy import special, stats

from blocks._dpsk_detect import DBPSK_STEPS, DQPSK_STEPS, dpsk_detect
from blocks._modulate import bits_to_symbols, design_modulator, modulate
from blocks._theory import ber_theory


def transmit(bits: np.ndarray, modulation: str) -> np.ndarray:
    """The transmitter's own modulator (blocks/_modulate.py), rectangular, 1 sample/symbol."""
    mod = design_modulator(modulation, 1000.0, 1000.0)
    x, _ = modulate(bits_to_symbols(bits, modulation), mod)
    return x


def add_noise(x: np.ndarray, ebn0_db: float, bits_per_symbol: int,
              rng: np.random.Generator) -> np.ndarray:
    """Unit-energy symbols: Es/N0 = bits_per_symbol * Eb/N0, N0 = E|n|^2 (common practice)."""
    n0 = 1.0 / (bits_per_symbol * 10 ** (ebn0_db / 10))
    noise = rng.normal(0, math.sqrt(n0 / 2), (x.shape[0], 2)) @ [1, 1j]
    return (x * np.exp(1j * rng.uniform(0, 2 * np.pi)) + noise).astype(np.complex64)


def naive_dpsk(y: np.ndarray, modulation: str) -> np.ndarray:
    """Per-symbol reference: pick the table step nearest in angle to arg(y[k] / y[k-1])."""
    steps = DBPSK_STEPS if modulation == "dbpsk" else DQPSK_STEPS
    width = 1 if modulation == "dbpsk" else 2
    out = []
    for k in range(1, y.shape[0]):
        step = cmath.phase(complex(y[k]) * complex(y[k - 1]).conjugate())
        dist = [abs(cmath.phase(cmath.exp(1j * (step - s)))) for s in steps]
        code = int(np.argmin(dist))
        out.extend((code >> (width - 1 - i)) & 1 for i in range(width))
    return np.array(out, np.uint8)


@pytest.mark.parametrize("modulation", ["dbpsk", "dqpsk"])
def test_noiseless_transmitter_round_trip(modulation: str) -> None:
    # The first symbol is only the phase reference; the transmitter starts from phase 0.
    width = 2 if modulation == "dqpsk" else 1
    rng = np.random.default_rng(1)
    bits = rng.integers(0, 2, 600).astype(np.uint8)
    x = np.concatenate([[1.0 + 0j], transmit(bits, modulation)]).astype(np.complex64)
    got, soft, _ = dpsk_detect(x, modulation)
    np.testing.assert_array_equal(got, bits)
    assert np.all((soft > 0) == (got == 1)) and np.all(np.abs(soft) <= 1 + 1e-6)
    assert got.shape[0] == (x.shape[0] - 1) * width


@pytest.mark.parametrize("modulation", ["dbpsk", "dqpsk"])
def test_decisions_match_naive_reference(modulation: str) -> None:
    rng = np.random.default_rng(2)
    bits = rng.integers(0, 2, 2000).astype(np.uint8)
    y = add_noise(transmit(bits, modulation), 4.0, 2 if modulation == "dqpsk" else 1, rng)
    got, _, _ = dpsk_detect(y, modulation)
    np.testing.assert_array_equal(got, naive_dpsk(y, modulation))


@pytest.mark.parametrize("modulation", ["dbpsk", "dqpsk"])
def test_phase_rotation_changes_no_decision(modulation: str) -> None:
    # Differential detection cancels the carrier phase (Proakis & Salehi, 5th ed., sec. 4.6).
    rng = np.random.default_rng(3)
    bits = rng.integers(0, 2, 2000).astype(np.uint8)
    y = add_noise(transmit(bits, modulation), 6.0, 2 if modulation == "dqpsk" else 1, rng)
    ref, _, _ = dpsk_detect(y, modulation)
    for theta in np.linspace(0.3, 2 * np.pi, 11):
        got, _, _ = dpsk_detect(y * np.complex64(np.exp(1j * theta)), modulation)
        np.testing.assert_array_equal(got, ref)


def dqpsk_ber(ebn0_db: float) -> float:
    """Gray-coded DQPSK with differential detection (Proakis & Salehi, 5th ed., sec. 4.6;
    from memory): Pb = Q1(a, b) - 0.5 I0(ab) exp(-(a^2 + b^2)/2),
    a = sqrt(2 g (1 - 1/sqrt2)), b = sqrt(2 g (1 + 1/sqrt2)), g = Eb/N0.
    Marcum Q1 via scipy.stats.ncx2.sf(b^2, 2, a^2)."""
    g = 10 ** (ebn0_db / 10)
    a = math.sqrt(2 * g * (1 - 1 / math.sqrt(2)))
    b = math.sqrt(2 * g * (1 + 1 / math.sqrt(2)))
    return float(stats.ncx2.sf(b * b, 2, a * a)
                 - 0.5 * special.i0e(a * b) * math.exp(a * b - (a * a + b * b) / 2))


@pytest.mark.parametrize(("modulation", "ebn0_db"),
                         [("dbpsk", 5.0), ("dbpsk", 8.0), ("dqpsk", 6.0), ("dqpsk", 9.0)])
def test_ber_agrees_with_theory(modulation: str, ebn0_db: float) -> None:
    # DBPSK: Pb = 0.5 exp(-Eb/N0) (Proakis & Salehi, 5th ed., sec. 4.6).
    width = 2 if modulation == "dqpsk" else 1
    rng = np.random.default_rng(int(ebn0_db * 10) + width)
    bits = rng.integers(0, 2, 300_000 * width).astype(np.uint8)
    y = add_noise(transmit(bits, modulation), ebn0_db, width, rng)
    got, _, _ = dpsk_detect(y, modulation)      # the first symbol is the phase reference
    errors = int(np.count_nonzero(got != bits[width:]))
    p = 0.5 * math.exp(-(10 ** (ebn0_db / 10))) if modulation == "dbpsk" else dqpsk_ber(ebn0_db)
    # Cross-check with the project's theory module (same closed forms).
    assert ber_theory(modulation, ebn0_db)[()] == pytest.approx(p, rel=1e-6)
    ci = stats.binomtest(errors, got.shape[0]).proportion_ci(0.999)
    assert ci.low <= p <= ci.high, (errors / got.shape[0], p)


def test_chunked_equals_whole() -> None:
    rng = np.random.default_rng(4)
    bits = rng.integers(0, 2, 1000).astype(np.uint8)
    y = add_noise(transmit(bits, "dqpsk"), 8.0, 2, rng)
    whole_b, whole_s, _ = dpsk_detect(y, "dqpsk")
    state, bs, ss = None, [], []
    for piece in np.array_split(y, [1, 2, 50, 51, 333]):
        b, s, state = dpsk_detect(piece, "dqpsk", state)
        bs.append(b)
        ss.append(s)
    np.testing.assert_array_equal(np.concatenate(bs), whole_b)
    np.testing.assert_allclose(np.concatenate(ss), whole_s, rtol=1e-6)


def test_unknown_modulation_is_named() -> None:
    with pytest.raises(ValueError, match="modulation"):
        dpsk_detect(np.ones(3, np.complex64), "d8psk")
