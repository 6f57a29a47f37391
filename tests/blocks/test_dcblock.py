"""Tests of the first-order DC-removal filter (blocks/_dcblock.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from scipy import signal

from blocks._dcblock import dc_block, dc_block_design
from tests.chunking import chunk_cuts, split

FS = 48_000.0


@pytest.mark.parametrize("corner", [1.0, 50.0, 3000.0])
def test_design_is_the_bilinear_first_order_highpass(corner):
    # Reference: the bilinear transform of H(s) = s / (s + wc) with pre-warping,
    # K = tan(pi fc / fs): b = [1, -1] / (1 + K), a = [1, (K - 1) / (K + 1)]
    # (Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., ch. 7, bilinear
    # transformation; from memory).
    b, a = dc_block_design(corner, FS)
    k = np.tan(np.pi * corner / FS)
    np.testing.assert_allclose(b, np.array([1.0, -1.0]) / (1 + k), rtol=1e-12)
    np.testing.assert_allclose(a, [1.0, (k - 1) / (k + 1)], rtol=1e-12)


def test_response_zero_at_dc_minus_3db_at_corner_unity_at_nyquist():
    # Reference: scipy.signal.freqz of the designed filter.
    b, a = dc_block_design(200.0, FS)
    _, h = signal.freqz(b, a, worN=[0.0, 200.0, FS / 2], fs=FS)
    assert abs(h[0]) < 1e-12
    assert 20 * np.log10(abs(h[1])) == pytest.approx(-3.0103, abs=1e-3)
    assert abs(h[2]) == pytest.approx(1.0, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(cuts=chunk_cuts(5000))
def test_chunks_match_one_lfilter_call(cuts):
    # Reference: scipy.signal.lfilter over the whole signal from the steady state of x[0]
    # (scipy.signal.lfilter_zi).
    rng = np.random.default_rng(4)
    x = (0.7 - 0.2j + rng.standard_normal(5000) + 1j * rng.standard_normal(5000))
    x = x.astype(np.complex64)
    b, a = dc_block_design(30.0, FS)
    ref, _ = signal.lfilter(b, a, x.astype(np.complex128), zi=signal.lfilter_zi(b, a) * x[0])
    state, out = None, []
    for piece in split(x, cuts):
        y, state = dc_block(piece, b, a, state)
        out.append(y)
    np.testing.assert_allclose(np.concatenate(out), ref, atol=2e-6)


def test_offset_is_removed_and_a_tone_kept():
    n = np.arange(48_000)
    tone = np.exp(2j * np.pi * 1000.0 * n / FS)
    x = (tone + 0.5 + 0.3j).astype(np.complex64)
    b, a = dc_block_design(10.0, FS)
    y, _ = dc_block(x, b, a)
    # A tone 100 corners above the corner passes with |H| = 1 / sqrt(1 + (fc/f)^2) ~ 1
    # (first-order high-pass magnitude, common practice); the DC offset is gone.
    assert abs(np.mean(y[-24_000:])) < 2e-3
    assert np.std(y[-24_000:]) == pytest.approx(1.0, abs=1e-3)


def test_constant_input_gives_no_start_transient():
    b, a = dc_block_design(5.0, FS)
    y, _ = dc_block(np.full(1000, 2.0, np.float32), b, a)
    assert y.dtype == np.float32
    assert np.max(np.abs(y)) < 1e-6


def test_corner_must_be_below_nyquist():
    with pytest.raises(ValueError, match="corner_hz must be > 0"):
        dc_block_design(24_000.0, FS)
