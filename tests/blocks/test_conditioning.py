"""Tests of the conditioning blocks (blocks/conditioning.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from scipy import signal

import blocks.conditioning  # noqa: F401  (registers the kinds)
from blocks._pulses import rect_taps, rrc_taps
from stream.block import StreamSpec
from stream.chunk import Annotation
from stream.errors import ParamError
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

FS = 16_000.0
RNG = np.random.default_rng(21)
X = (RNG.standard_normal(4000) + 1j * RNG.standard_normal(4000)).astype(np.complex64)
NOTES = (Annotation(0, "start"), Annotation(1234, "packet", {"n": 1}), Annotation(3999, "end"))

KINDS = [
    ("mixer", {"offset_hz": -1234.5}),
    ("matched_filter", {"symbol_rate": 1000.0}),
    ("matched_filter", {"symbol_rate": 1700.0, "shape": "rect"}),
    ("matched_filter", {"symbol_rate": 2100.0, "shape": "gaussian", "bt": 0.3}),
    ("decimate", {"factor": 3}),
    ("decimate", {"factor": 8, "cutoff_hz": 700.0, "taps": 61}),
    ("dc_block", {"corner_hz": 40.0}),
    ("agc", {"window_s": 0.005}),
]


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(X)))
@pytest.mark.parametrize(("kind", "params"), KINDS)
def test_blocks_are_chunk_invariant(kind, params, cuts):
    assert_chunk_invariant(lambda: make_block(kind, **params), X, FS, cuts,
                           annotations=NOTES, atol=2e-6)


def test_mixer_matches_numpy_exp():
    # Reference: x * numpy.exp(j 2 pi f n / fs) in float64.
    out, notes = run_block(make_block("mixer", offset_hz=-1234.5), [X], FS, NOTES)
    n = np.arange(len(X))
    ref = X * np.exp(2j * np.pi * -1234.5 * n / FS)
    np.testing.assert_allclose(out["out"], ref, atol=2e-6)
    assert [a.index for a in notes["out"]] == [0, 1234, 3999]


def test_mixer_offset_must_be_below_nyquist():
    with pytest.raises(ParamError, match="offset_hz"):
        make_block("mixer", offset_hz=9000.0).configure({"in": StreamSpec("complex64", FS)})


@pytest.mark.parametrize(("shape", "rate", "design"), [
    ("rrc", 1000.0, lambda sps: rrc_taps(sps, 0.35, 8)),
    ("rect", 1700.0, rect_taps),
])
def test_matched_filter_is_lfilter_with_unit_energy_taps(shape, rate, design):
    # Reference: scipy.signal.lfilter with the pulse taps of blocks/_pulses.py scaled to unit
    # energy; at the end the filter delay's worth of zeros is pushed through.
    taps = design(FS / rate)
    taps = taps / np.sqrt(np.sum(taps**2))
    out, notes = run_block(make_block("matched_filter", shape=shape, symbol_rate=rate), [X],
                           FS, NOTES)
    delay = (len(taps) - 1) / 2
    tail = int(np.ceil(delay))
    padded = np.concatenate([X, np.zeros(tail, np.complex64)]).astype(np.complex128)
    ref = signal.lfilter(taps, [1.0], padded)
    np.testing.assert_allclose(out["out"], ref, atol=1e-5)
    # Annotations move with the group delay.
    assert [a.index for a in notes["out"]] == [int(np.ceil(i + delay)) for i in (0, 1234, 3999)]


def test_matched_filter_gives_the_symbol_amplitude_at_the_optimum():
    # A symbol sent as a * p with p the unit-energy pulse comes out as a at the peak
    # (matched filter with unit-energy taps, common practice).
    taps = rrc_taps(16.0, 0.35, 8)
    x = (0.7 - 0.2j) * taps.astype(np.complex64)
    out, _ = run_block(make_block("matched_filter", symbol_rate=1000.0), [x], FS)
    peak = out["out"][len(taps) - 1]
    assert peak == pytest.approx(0.7 - 0.2j, abs=1e-5)


def test_decimate_matches_upfirdn_and_moves_annotations():
    # Reference: scipy.signal.upfirdn(h, x, 1, M) with h = firwin(20 M + 1, 1 / M,
    # window=("kaiser", 5)), the resample_poly design (SciPy reference guide).
    h = signal.firwin(61, 1 / 3, window=("kaiser", 5.0))
    blk = make_block("decimate", factor=3)
    out, notes = run_block(blk, [X], FS, NOTES)
    assert blk.output_specs["out"].rate == FS / 3
    padded = np.concatenate([X, np.zeros(30, np.complex64)]).astype(np.complex128)
    ref = signal.upfirdn(h, padded, 1, 3)[: out["out"].shape[0]]
    np.testing.assert_allclose(out["out"], ref, atol=1e-5)
    assert out["out"].shape[0] == -(-(len(X) + 30) // 3)
    # Input sample n comes out of the filter at n + 30, i.e. at output (n + 30) / 3.
    assert [a.index for a in notes["out"]][:2] == [10, int(np.ceil((1234 + 30) / 3))]


def test_decimate_cutoff_must_be_below_nyquist():
    blk = make_block("decimate", factor=2, cutoff_hz=9000.0)
    with pytest.raises(ParamError, match="cutoff_hz"):
        blk.configure({"in": StreamSpec("complex64", FS)})


def test_dc_block_removes_an_offset():
    out, _ = run_block(make_block("dc_block", corner_hz=20.0), [X + (3.0 + 1.0j)], FS)
    # After a few time constants (1 / (2 pi 20 Hz) = 8 ms) the mean is that of the noise.
    assert abs(np.mean(out["out"][2000:])) < 0.1


def test_agc_brings_any_level_to_the_target():
    blk = make_block("agc", window_s=0.01, level=0.25)
    out, _ = run_block(blk, [1000 * X], FS)
    assert np.sqrt(np.mean(np.abs(out["out"][400:]) ** 2)) == pytest.approx(0.25, rel=0.05)
    assert blk.readings()["gain_db"] == pytest.approx(20 * np.log10(0.25 / 1000 / np.sqrt(2)),
                                                      abs=1.0)


@pytest.mark.parametrize("kind", ["matched_filter", "decimate", "dc_block", "agc"])
def test_nan_input_is_refused_with_its_index(kind):
    params = {"matched_filter": {"symbol_rate": 1000.0}, "decimate": {"factor": 2}}
    x = X.copy()
    x[77] = np.nan
    with pytest.raises(ValueError, match="input sample 77 is NaN"):
        run_block(make_block(kind, **params.get(kind, {})), [x], FS)


@pytest.mark.parametrize("bad", [np.inf, -np.inf, complex(0, np.nan)])
def test_infinite_input_is_refused_with_its_index(bad):
    x = X.copy()
    x[3000] = bad
    with pytest.raises(ValueError, match="input sample 3000 is NaN or infinite"):
        run_block(make_block("decimate", factor=2), [x], FS)


def test_finite_input_whose_sum_overflows_is_accepted():
    # The fast check sums the squares of the chunk; a sum that overflows float32 (largest
    # value about 3.4e38, IEEE 754 binary32) must fall back to the sample-by-sample check,
    # not refuse.
    x = np.full(64, 3e38 + 3e38j, dtype=np.complex64)
    out, _ = run_block(make_block("dc_block", corner_hz=40.0), [x], FS)
    assert out["out"].shape == (64,)
