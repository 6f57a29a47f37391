"""Tests of the feedforward RMS normaliser (blocks/_agc.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from blocks._agc import rms_normalise
from tests.chunking import chunk_cuts, split


def naive(x, window, level):
    """Slow direct reference: the mean power of each causal window, one sample at a time."""
    y = np.zeros_like(x)
    for n in range(x.shape[0]):
        seg = x[max(0, n - window + 1): n + 1]
        p = np.mean(np.abs(seg.astype(np.complex128)) ** 2)
        y[n] = 0 if p == 0 else level * x[n] / np.sqrt(p)
    return y


@settings(max_examples=40, deadline=None)
@given(cuts=chunk_cuts(600), window=st.integers(1, 200))
def test_pieces_match_the_naive_reference(cuts, window):
    rng = np.random.default_rng(8)
    x = (rng.standard_normal(600) + 1j * rng.standard_normal(600)).astype(np.complex64)
    x[100:150] *= 30  # a burst
    state, out = None, []
    for piece in split(x, cuts):
        y, _, state = rms_normalise(piece, window, 2.0, state)
        out.append(y)
    np.testing.assert_allclose(np.concatenate(out), naive(x, window, 2.0), rtol=2e-5,
                               atol=1e-6)


@pytest.mark.parametrize("power_db", [-60.0, 0.0, 40.0])
def test_output_level_does_not_depend_on_input_level(power_db):
    # Gaussian noise of any power comes out at the target RMS; the spread of a W-sample power
    # estimate is ~1/sqrt(W) (chi-square with 2W degrees of freedom, common practice).
    rng = np.random.default_rng(1)
    scale = 10 ** (power_db / 20)
    x = (scale * (rng.standard_normal(20_000) + 1j * rng.standard_normal(20_000))
         ).astype(np.complex64)
    y, _, _ = rms_normalise(x, 1000, 0.5)
    assert np.sqrt(np.mean(np.abs(y[1000:]) ** 2)) == pytest.approx(0.5, rel=0.02)


def test_silence_stays_silent():
    y, gain, _ = rms_normalise(np.zeros(10, np.float32), 4)
    assert y.dtype == np.float32
    assert not y.any() and not gain.any()


def test_bad_window_is_rejected():
    with pytest.raises(ValueError, match="window must be >= 1"):
        rms_normalise(np.zeros(3, np.complex64), 0)
