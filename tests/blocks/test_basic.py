"""Tests of the test source, gain and discard blocks."""

import numpy as np
import pytest
from hypothesis import given, settings

from stream.errors import ParamError
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

RNG = np.random.default_rng(3)
SIGNAL = (RNG.standard_normal(500) + 1j * RNG.standard_normal(500)).astype(np.complex64)


@settings(max_examples=30, deadline=None)
@given(cuts=chunk_cuts(len(SIGNAL)))
def test_gain_is_chunk_invariant(cuts):
    out = assert_chunk_invariant(lambda: make_block("gain", gain_db=20.0), SIGNAL, 1e3, cuts)
    # 20 dB of amplitude gain is a factor of 10 (definition of the decibel for amplitudes)
    np.testing.assert_allclose(out["out"], SIGNAL * 10, rtol=1e-6)


def test_gain_keeps_real_dtype():
    x = np.arange(8, dtype=np.float32)
    out, _ = run_block(make_block("gain", gain_db=-6.0206), [x], 10.0)
    assert out["out"].dtype == np.float32
    np.testing.assert_allclose(out["out"], x / 2, rtol=1e-4)


def test_tone_source_is_seeded_and_exact():
    def take(chunk_size):
        src = make_block("tone", sample_rate=8000.0, frequency_hz=1000.0, samples=1000,
                         chunk_size=chunk_size, noise_power=0.0)
        src.configure({})
        while src.produce():
            pass
        return np.concatenate([c.samples for _, c in src.take_output()])

    a, b = take(64), take(1000)
    np.testing.assert_allclose(a, b, atol=1e-6)
    n = np.arange(1000)
    np.testing.assert_allclose(a, np.exp(2j * np.pi * 1000 / 8000 * n), atol=1e-5)


def test_tone_source_rejects_tone_above_nyquist():
    src = make_block("tone", sample_rate=8000.0, frequency_hz=5000.0)
    with pytest.raises(ParamError, match=r"frequency_hz: must be below half"):
        src.configure({})


def test_discard_counts():
    out, _ = run_block(make_block("discard"), [SIGNAL[:10], SIGNAL[10:]], 1e3)
    assert out == {}
