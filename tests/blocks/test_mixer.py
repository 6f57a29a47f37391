"""Tests of the table-driven oscillator and frequency shifter (blocks/_mixer.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from blocks._mixer import frequency_shift, oscillator, tone_row
from tests.chunking import chunk_cuts, split


def reference_tone(count, f, phase=0.0, start=0):
    """numpy.exp at float64 of the exact angle (the reference implementation)."""
    n = np.arange(start, start + count, dtype=np.float64)
    return np.exp(2j * np.pi * (phase + f * n))


@pytest.mark.parametrize("f", [0.0, 0.1, -0.1, 0.2371, -0.4999, 1 / 3, 1e-6])
@pytest.mark.parametrize("count", [1, 1023, 1024, 1025, 5000])
def test_oscillator_matches_numpy_exp(f, count):
    # Reference: numpy.exp evaluated in float64; complex64 output allows ~1e-6.
    got, _ = oscillator(count, f, 0.25)
    assert got.dtype == np.complex64
    np.testing.assert_allclose(got, reference_tone(count, f, 0.25), rtol=0, atol=2e-6)


def test_oscillator_phase_is_continuous_over_many_calls():
    # 2000 calls of 999 samples: the carried phase keeps the error at float32 level against
    # numpy.exp of the absolute sample index (reference) — no drift over ~2e6 samples.
    f = 0.123456789
    phase = 0.0
    row = tone_row(f)
    for _ in range(2000):
        _, phase = oscillator(999, f, phase, row)
    got, _ = oscillator(100, f, phase, row)
    np.testing.assert_allclose(got, reference_tone(100, f, start=2000 * 999), atol=2e-6)


@settings(max_examples=40, deadline=None)
@given(cuts=chunk_cuts(3000), f=st.floats(-0.5, 0.5))
def test_frequency_shift_is_chunk_invariant(cuts, f):
    rng = np.random.default_rng(2)
    x = (rng.standard_normal(3000) + 1j * rng.standard_normal(3000)).astype(np.complex64)
    whole, _ = frequency_shift(x, f)
    phase, parts = 0.0, []
    for piece in split(x, cuts):
        y, phase = frequency_shift(piece, f, phase)
        parts.append(y)
    np.testing.assert_allclose(np.concatenate(parts), whole, atol=1e-5)


def test_frequency_shift_moves_a_tone():
    # A tone at bin 100 of a 4096-point DFT shifted by 37 bins peaks at bin 137
    # (the frequency-shift property of the DFT, common practice).
    n = 4096
    x = reference_tone(n, 100 / n).astype(np.complex64)
    y, _ = frequency_shift(x, 37 / n)
    assert int(np.argmax(np.abs(np.fft.fft(y)))) == 137


def test_tone_row_rejects_empty_length():
    with pytest.raises(ValueError, match="length must be >= 1"):
        tone_row(0.1, 0)
