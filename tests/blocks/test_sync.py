"""Tests of the synchronisation blocks ``cfo`` and ``timing`` (blocks/sync.py)."""

import numpy as np
import pytest
from hypothesis import given, settings

import blocks.conditioning
import blocks.sync  # noqa: F401  (registers the kinds)
from blocks._dpsk_detect import dpsk_detect
from blocks._fsk_detect import tone_matrix
from blocks._modulate import DQPSK_PHASE_STEPS
from blocks._theory import ber_theory
from blocks._timing import cubic_interpolate
from stream.block import StreamSpec
from stream.chunk import Annotation
from stream.errors import ParamError
from tests.blocks.sync_signals import received
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

RS = 1000.0


def run(kind, x, fs, **params):
    blk = make_block(kind, **params)
    out, _ = run_block(blk, [x], fs)
    return out["out"], blk


def dqpsk_steps(y):
    """Differential phase steps in units of pi/4, decided on the odd multiples."""
    d = y[1:] * np.conj(y[:-1])
    return (2 * np.floor(np.angle(d) / (np.pi / 2)) + 1).astype(int)


def aligned_errors(got, sent, search=20):
    """Mismatches between decisions and sent symbols at the best fixed offset.

    One offset for the whole run: a slipped or repeated symbol anywhere would misalign
    everything after it.
    """
    def window(o):
        return (got[o:], sent) if o >= 0 else (got, sent[-o:])

    def mismatches(o, count=None):
        a, b = window(o)
        n = min(a.shape[0], b.shape[0]) if count is None else count
        return np.count_nonzero(a[:n] != b[:n]), n

    best = min(range(-search, search), key=lambda o: mismatches(o, 500)[0])
    errors, n = mismatches(best)
    return errors, n, best


# -- timing ---------------------------------------------------------------------------------

@pytest.mark.parametrize("ppm", [50.0, -50.0])
def test_timing_follows_clock_error_without_slips(ppm):
    # 40 000 symbols at 50 ppm drift by 2 symbols: the timing phase wraps twice. Every
    # decision must still match at a single offset, and the symbol count must equal the
    # symbols sent (Oerder & Meyr 1988 estimator, unwrapped across windows).
    sps, n = 6.3, 40_000
    x, fs, codes, _ = received("dqpsk", n, sps, pulse="rrc", rolloff=0.35, clock_ppm=ppm,
                               ebn0_db=30.0, seed=3)
    mf, _ = run("matched_filter", x, fs, symbol_rate=RS, rolloff=0.35)
    y, blk = run("timing", mf, fs, symbol_rate=RS)
    sent = np.array(DQPSK_PHASE_STEPS)[codes[1:]]
    errors, compared, _ = aligned_errors(dqpsk_steps(y), sent)
    assert errors == 0
    assert compared >= n - 20
    # The transmitter sends n symbols at (1 + ppm) times the nominal rate, i.e. the
    # receiver sees n symbols however the clock drifts; allow the edge symbols of the flush.
    assert abs(y.shape[0] - n) <= 12
    assert blk.readings()["clock_ppm"] == pytest.approx(ppm, abs=5.0)
    assert blk.readings()["symbols"] == y.shape[0]


@pytest.mark.parametrize("s_out", [1, 4])
def test_timing_strobes_at_the_known_optimum_instant(s_out):
    # Noiseless, no clock error: the strobes must sit at the matched filter's optimum
    # instant t_k = (k + 4) sps + 25 (pulse centre from blocks/_modulate.py, filter delay
    # (len - 1) / 2), and with S samples per symbol at t_k + ((s + 1/2) / S - 1/2) sps, the
    # output contract of the block; compare with the filter output interpolated there.
    sps = 6.3
    x, fs, _, _ = received("dbpsk", 6000, sps, pulse="rrc", rolloff=0.35)
    mf, _ = run("matched_filter", x, fs, symbol_rate=RS, rolloff=0.35)
    y, blk = run("timing", mf, fs, symbol_rate=RS, samples_per_symbol_out=s_out)
    groups = y.reshape(-1, s_out)
    k = np.arange(2000, 4000)
    spread = ((np.arange(s_out) + 0.5) / s_out - 0.5) * sps
    ideal = cubic_interpolate(mf, ((k + 4) * sps + 25)[:, None] + spread[None, :])
    ideal = ideal.reshape(-1, s_out)
    offset = min(range(-8, 9), key=lambda o: np.abs(groups[k[0] + o] - ideal[0]).sum())
    err = np.abs(groups[k + offset] - ideal)
    assert np.max(err) < 0.02 * np.max(np.abs(ideal))
    assert blk.readings()["timing_phase"] == pytest.approx((25 / sps) % 1.0, abs=0.01)


def test_timing_for_fsk_with_tone_metric_and_clock_error():
    # 2-FSK (h = 1, rectangular, 8.7 samples/symbol), 50 ppm over 30 000 symbols; S = 8
    # samples per symbol into the noncoherent tone-correlator decision (Proakis & Salehi
    # 2008, sec. 4.5): no errors at high SNR, one offset throughout.
    sps, n, s_out = 8.7, 30_000, 8
    x, fs, codes, _ = received("2fsk", n, sps, deviation_hz=500.0, clock_ppm=50.0,
                               ebn0_db=25.0, seed=4)
    y, blk = run("timing", x, fs, symbol_rate=RS, metric="tones", deviation_hz=500.0,
                 samples_per_symbol_out=s_out)
    assert blk.output_specs["out"].rate == RS * s_out
    assert y.shape[0] % s_out == 0
    energy = np.abs(y.reshape(-1, s_out) @ tone_matrix(s_out, 500.0, RS * s_out)) ** 2
    bits = (energy[:, 1] > energy[:, 0]).astype(np.int8)
    errors, compared, _ = aligned_errors(bits, codes)
    assert errors == 0
    assert compared >= n - 20


SIGNAL, SIGNAL_FS, _, _ = received("dqpsk", 700, 6.3, pulse="rrc", clock_ppm=300.0,
                                   ebn0_db=12.0, seed=8)
FSK, FSK_FS, _, _ = received("2fsk", 500, 8.0, deviation_hz=500.0, ebn0_db=12.0, seed=9)
NOTES = (Annotation(10, "start"), Annotation(2500, "packet"))


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(SIGNAL)))
def test_timing_is_chunk_invariant(cuts):
    assert_chunk_invariant(lambda: make_block("timing", symbol_rate=RS, window_symbols=32),
                           SIGNAL, SIGNAL_FS, cuts, annotations=NOTES)


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(FSK)))
def test_timing_with_tones_is_chunk_invariant(cuts):
    assert_chunk_invariant(
        lambda: make_block("timing", symbol_rate=RS, window_symbols=32, metric="tones",
                           deviation_hz=500.0, samples_per_symbol_out=3),
        FSK, FSK_FS, cuts, annotations=NOTES)


def test_timing_moves_annotations_to_the_next_strobe():
    # An event at input index n goes to the first output symbol strobed at or after n. With
    # no clock error the strobes are t_k = (k + theta) sps, the first one k0 = ceil(1 / sps -
    # theta) (strobes start at sample 1, where cubic interpolation has its neighbours).
    sps = 6.3
    x, fs, _, _ = received("dbpsk", 700, sps, pulse="rrc", ebn0_db=20.0, seed=5)
    blk = make_block("timing", symbol_rate=RS, window_symbols=32)
    _, notes = run_block(blk, [x], fs, (Annotation(100, "a"), Annotation(2500, "b")))
    theta = blk.readings()["timing_phase"]
    k0 = np.ceil(1 / sps - theta)
    expected = [np.ceil(n / sps - theta) - k0 for n in (100, 2500)]
    got = [a.index for a in notes["out"]]
    assert [a.label for a in notes["out"]] == ["a", "b"]
    np.testing.assert_allclose(got, expected, atol=1)


def test_timing_parameter_errors():
    spec = {"in": StreamSpec("complex64", 8000.0)}
    with pytest.raises(ParamError, match="deviation_hz: is required"):
        make_block("timing", symbol_rate=RS, metric="tones").configure(spec)
    with pytest.raises(ParamError, match="symbol_rate"):
        make_block("timing", symbol_rate=5000.0).configure(spec)


# -- cfo ------------------------------------------------------------------------------------

@pytest.mark.slow
def test_dqpsk_loses_under_0_3_db_after_cfo_removal():
    # pi/4-DQPSK with a carrier offset of 10% of the symbol rate at Eb/N0 = 9 dB through
    # cfo -> matched_filter -> timing -> differential detector. Reference: the theoretical
    # differential-detection BER (Proakis & Salehi 2008, via blocks/_theory.py); the
    # measured BER must beat the theory at 0.3 dB less Eb/N0 (about 600 errors expected,
    # the bound is 40% above that).
    ebn0, n = 9.0, 240_000
    x, fs, codes, _ = received("dqpsk", n, 5.5, pulse="rrc", rolloff=0.35, cfo_hz=0.1 * RS,
                               ebn0_db=ebn0, seed=9)
    fixed, blk = run("cfo", x, fs, symbol_rate=RS)
    assert blk.readings()["cfo_hz"] == pytest.approx(0.1 * RS, abs=0.005 * RS)
    mf, _ = run("matched_filter", fixed, fs, symbol_rate=RS, rolloff=0.35)
    y, _ = run("timing", mf, fs, symbol_rate=RS)
    bits, _, _ = dpsk_detect(y, "dqpsk")
    # Bits of every symbol after the first (the differential reference), MSB first.
    sent = np.stack([codes >> 1, codes & 1], axis=1).astype(np.uint8)[1:].ravel()
    errors, compared, offset = aligned_errors(bits, sent, search=40)
    assert offset % 2 == 0
    assert compared > 2 * n - 100
    ber = errors / compared
    assert ber < ber_theory("dqpsk", ebn0 - 0.3)


def test_cfo_block_latency_and_estimate():
    # Output has the input's length and rate; the estimate reading is the offset (OOK, 8%
    # of the symbol rate, Mengali & D'Andrea 1997 ch. 3 estimator).
    x, fs, _, _ = received("ook", 3000, 8.0, pulse="rrc", cfo_hz=80.0, ebn0_db=15.0)
    y, blk = run("cfo", x, fs, symbol_rate=RS, window_symbols=1024)
    assert y.shape == x.shape and y.dtype == np.complex64
    assert blk.readings()["cfo_hz"] == pytest.approx(80.0, abs=5.0)
    assert blk.readings()["windows"] == 2


def test_cfo_derotation_is_phase_continuous_across_windows():
    # A pure tone: each window is derotated with its own estimate, the oscillator phase
    # running on, so the corrected tone has no phase jump at any window boundary.
    fs = 8000.0
    n = np.arange(40_000)
    x = np.exp(2j * np.pi * (95.0 * n / fs + 0.3)).astype(np.complex64)
    y, blk = run("cfo", x, fs, symbol_rate=RS, window_symbols=512)
    steps = np.angle(y[1:] * np.conj(y[:-1]))
    assert np.max(np.abs(steps)) < 1e-3
    assert blk.readings()["cfo_hz"] == pytest.approx(95.0, abs=1e-2)


DBPSK, DBPSK_FS, _, _ = received("dbpsk", 600, 7.0, pulse="rrc", cfo_hz=60.0, ebn0_db=8.0)


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(DBPSK)))
def test_cfo_is_chunk_invariant(cuts):
    assert_chunk_invariant(lambda: make_block("cfo", symbol_rate=RS, window_symbols=64),
                           DBPSK, DBPSK_FS, cuts, annotations=NOTES)


def test_cfo_parameter_errors():
    with pytest.raises(ParamError, match="max_offset_hz"):
        make_block("cfo", symbol_rate=RS, max_offset_hz=3000.0).configure(
            {"in": StreamSpec("complex64", 8000.0)})
    x = np.zeros(100, np.complex64)
    x[5] = np.inf
    with pytest.raises(ValueError, match="input sample 5 is NaN or infinite"):
        run("cfo", x, 8000.0, symbol_rate=RS)
