"""The channel kernel and the ``channel`` block against noise, oscillator and fading models."""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import j0

import blocks.conditioning
import blocks.simulator
import blocks.sync  # noqa: F401  (registers the channel, matched_filter and timing kinds)
from blocks._channel import (
    NOISE_BLOCK,
    ChannelState,
    apply_channel,
    awgn_variance,
    design_channel,
    fading_gain,
)
from blocks._resample import design_resampler, resampled_index
from stream.chunk import Annotation
from stream.errors import ParamError
from tests.blocks.test_simulator import run_sim
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

FS = 100_000.0


def test_awgn_variance_bookkeeping():
    # N0 = Eb / (Eb/N0), Eb = P / Rb, complex sample variance N0 fs (Proakis & Salehi 5th ed.
    # for Eb = P Tb; the discrete-time variance over the full band is common practice).
    assert awgn_variance(10.0, 1.0, 1000.0, 1e5) == pytest.approx(10.0)
    assert awgn_variance(0.0, 2.0, 500.0, 4e3) == pytest.approx(16.0)
    assert awgn_variance(math.inf, 1.0, 1000.0, 1e5) == 0.0
    with pytest.raises(ValueError, match="ebn0_db"):
        awgn_variance(math.nan, 1.0, 1000.0, 1e5)
    with pytest.raises(ValueError, match="bit_rate"):
        awgn_variance(3.0, 1.0, 0.0, 1e5)


def test_noise_is_circular_white_gaussian_of_the_set_variance():
    # Complex AWGN: E|w|^2 = variance, real and imaginary parts independent N(0, var/2)
    # (definition, common practice); normality checked with scipy.stats.kstest.
    var = 2.5
    ch = design_channel(FS, noise_variance=var, seed=3, random_phase=False)
    w, _ = apply_channel(np.zeros(200_000, np.complex64), ch)
    w = w.astype(np.complex128)
    assert np.mean(np.abs(w) ** 2) == pytest.approx(var, rel=0.01)
    assert abs(np.mean(w * w)) < 0.02 * var                 # circular
    assert abs(np.mean(w[1:] * np.conj(w[:-1]))) < 0.02 * var  # white
    sd = math.sqrt(var / 2)
    assert stats.kstest(w.real[:20000] / sd, "norm").pvalue > 1e-3
    assert stats.kstest(w.imag[:20000] / sd, "norm").pvalue > 1e-3


def test_carrier_offset_and_start_phase():
    # A constant carrier through a CFO of f: the phase advances 2 pi f / fs per sample
    # (definition of a frequency offset, common practice), from a uniform random start phase.
    cfo = 1234.5
    ch = design_channel(FS, cfo_hz=cfo, seed=11)
    y, _ = apply_channel(np.ones(50_000, np.complex64), ch)
    step = np.angle(y[1:] * np.conj(y[:-1]))
    np.testing.assert_allclose(step, 2 * np.pi * cfo / FS, atol=2e-6)
    assert np.angle(y[0]) % (2 * np.pi) == pytest.approx(ch.start_phase, abs=1e-6)
    slope = np.polyfit(np.arange(50_000), np.unwrap(np.angle(y.astype(np.complex128))), 1)[0]
    assert slope * FS / (2 * np.pi) == pytest.approx(cfo, rel=1e-7)
    # Ten billion samples in, the phase still equals 2 pi f n / fs: it comes from the index.
    n0 = 10**10
    late, _ = apply_channel(np.ones(1000, np.complex64), ch, ChannelState(next_index=n0))
    expect = ch.start_phase + 2 * np.pi * cfo / FS * (n0 + np.arange(1000))
    np.testing.assert_allclose(np.angle(late * np.exp(-1j * expect)), 0.0, atol=1e-5)
    phases = [design_channel(FS, seed=s).start_phase for s in range(400)]
    assert stats.kstest(np.array(phases) / (2 * np.pi), "uniform").pvalue > 1e-3
    assert design_channel(FS, seed=5, random_phase=False).start_phase == 0.0


def test_phase_noise_increments_have_wiener_variance():
    # Wiener phase noise of linewidth L: independent increments of variance 2 pi L / fs
    # (Demir, Mehrotra & Roychowdhury 2000; relation from memory).
    lw = 50.0
    ch = design_channel(FS, linewidth_hz=lw, seed=2, random_phase=False)
    y, _ = apply_channel(np.ones(300_000, np.complex64), ch)
    d = np.angle(y[1:].astype(np.complex128) * np.conj(y[:-1]))
    assert np.var(d) == pytest.approx(2 * np.pi * lw / FS, rel=0.02)
    assert abs(np.corrcoef(d[1:], d[:-1])[0, 1]) < 0.01
    assert abs(np.mean(d)) < 5 * math.sqrt(2 * np.pi * lw / FS / len(d))


def test_fading_envelope_is_rayleigh_with_unit_power():
    # Flat Rayleigh fading: across independent channels |h| is Rayleigh with E|h|^2 = 1
    # (Clarke 1968; Zheng & Xiao 2003); scipy.stats.rayleigh as the reference distribution.
    gains = np.array([fading_gain(design_channel(FS, fading_doppler_hz=20.0, seed=s),
                                  np.array([0.37]))[0] for s in range(600)])
    assert np.mean(np.abs(gains) ** 2) == pytest.approx(1.0, rel=0.15)
    assert stats.kstest(np.abs(gains), stats.rayleigh(scale=math.sqrt(0.5)).cdf).pvalue > 1e-3
    assert abs(np.mean(gains**2)) < 0.15                    # circular


def test_fading_autocorrelation_follows_clarke():
    # E[h(t) h*(t + tau)] = J0(2 pi fd tau) (Clarke 1968), the property the sum-of-sinusoids
    # model of Zheng & Xiao (2003) reproduces on average; scipy.special.j0 as reference.
    fd = 10.0
    taus = np.array([0.0, 0.01, 0.02, 0.04, 0.06, 0.1])
    t = np.linspace(0.0, 5.0, 64)
    acc = np.zeros(len(taus), complex)
    seeds = range(150)
    for s in seeds:
        ch = design_channel(FS, fading_doppler_hz=fd, seed=s)
        h0 = fading_gain(ch, t)
        for i, tau in enumerate(taus):
            acc[i] += np.mean(h0 * np.conj(fading_gain(ch, t + tau)))
    acc /= len(seeds)
    np.testing.assert_allclose(acc.real, j0(2 * np.pi * fd * taus), atol=0.06)
    assert np.max(np.abs(acc.imag)) < 0.06


def test_fading_grid_interpolation_is_close_to_exact():
    ch = design_channel(FS, fading_doppler_hz=30.0, seed=4, random_phase=False)
    y, _ = apply_channel(np.ones(40_000, np.complex64), ch)
    exact = fading_gain(ch, np.arange(40_000) / FS)
    np.testing.assert_allclose(y, exact, atol=2e-4)


def test_impairments_have_separate_random_streams():
    # Switching phase noise or fading on does not change the noise realisation.
    x = np.zeros(30_000, np.complex64)
    plain, _ = apply_channel(x, design_channel(FS, noise_variance=1.0, seed=9))
    other, _ = apply_channel(x, design_channel(FS, noise_variance=1.0, seed=9, cfo_hz=300.0,
                                               linewidth_hz=5.0, fading_doppler_hz=3.0))
    np.testing.assert_array_equal(plain, other)
    moved, _ = apply_channel(x, design_channel(FS, noise_variance=1.0, seed=10))
    assert not np.allclose(plain, moved)


def full_channel():
    return design_channel(FS, noise_variance=0.3, cfo_hz=-2100.0, linewidth_hz=20.0,
                          fading_doppler_hz=7.0, seed=21)


SIGNAL = (np.exp(2j * np.pi * 0.013 * np.arange(3 * NOISE_BLOCK + 517))).astype(np.complex64)


def test_kernel_is_chunk_invariant_across_noise_blocks():
    # Chunk-size invariance (project convention), with cuts on and around block edges.
    ch = full_channel()
    whole, _ = apply_channel(SIGNAL, ch)
    cuts = [0, 1, 100, NOISE_BLOCK - 1, NOISE_BLOCK, NOISE_BLOCK + 1, 2 * NOISE_BLOCK + 5,
            len(SIGNAL)]
    state, parts = None, []
    for a, b in itertools.pairwise(cuts):
        y, state = apply_channel(SIGNAL[a:b], ch, state)
        parts.append(y)
    np.testing.assert_allclose(np.concatenate(parts), whole, rtol=0, atol=2e-5)


def make_channel_block():
    return make_block("channel", ebn0_db=6.0, bit_rate=5000.0, cfo_hz=800.0,
                      linewidth_hz=10.0, fading_doppler_hz=4.0, seed=5)


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(SIGNAL)))
def test_channel_block_is_chunk_invariant(cuts):
    assert_chunk_invariant(make_channel_block, SIGNAL, FS, cuts, atol=2e-5)


def test_channel_block_noise_matches_ebn0():
    # Eb/N0 bookkeeping of the standalone block: variance = (P / Rb) / 10^(EbN0/10) * fs.
    block = make_block("channel", ebn0_db=4.0, bit_rate=2000.0, signal_power=2.0, seed=1,
                       random_phase=False)
    out, _ = run_block(block, [np.zeros(100_000, np.complex64)], FS)
    expect = 2.0 / 2000.0 / 10 ** 0.4 * FS
    assert np.mean(np.abs(out["out"].astype(np.complex128)) ** 2) == pytest.approx(
        expect, rel=0.015)
    assert block.readings()["noise_variance"] == pytest.approx(expect)


def test_channel_block_passes_annotations_and_clean_signal():
    from stream.chunk import Annotation
    block = make_block("channel", random_phase=False)
    note = Annotation(10, "packet", {"packet": 0})
    out, notes = run_block(block, [SIGNAL[:50], SIGNAL[50:200]], FS, annotations=[note])
    np.testing.assert_array_equal(out["out"], SIGNAL[:200])
    assert notes["out"] == [note]


@pytest.mark.parametrize(("params", "name"), [
    ({"ebn0_db": 5.0}, "bit_rate"),
    ({"cfo_hz": 60_000.0}, "cfo_hz"),
    ({"fading_doppler_hz": 50_000.0}, "fading_doppler_hz"),
    ({"linewidth_hz": 2e5}, "linewidth_hz"),
])
def test_channel_block_errors_name_the_parameter(params, name):
    block = make_block("channel", **params)
    with pytest.raises(ParamError, match=name):
        run_block(block, [SIGNAL[:10]], FS)


@pytest.mark.parametrize(("params", "name"), [
    ({"ebn0_db": math.nan}, "ebn0_db"),
    ({"ebn0_db": "high"}, "ebn0_db"),
    ({"seed": -1}, "seed"),
    ({"linewidth_hz": -1.0}, "linewidth_hz"),
])
def test_channel_block_rejects_bad_values(params, name):
    with pytest.raises(ParamError, match=name):
        make_block("channel", **params)


def test_design_channel_errors():
    with pytest.raises(ValueError, match="cfo_hz"):
        design_channel(FS, cfo_hz=FS)
    with pytest.raises(ValueError, match="noise_variance"):
        design_channel(FS, noise_variance=-1.0)
    with pytest.raises(ValueError, match="seed"):
        design_channel(FS, seed=-3)


# -- sample-clock error ---------------------------------------------------------------------

def run_channel(x, fs=FS, **params):
    out, notes = run_block(make_block("channel", random_phase=False, **params), [x], fs)
    return out["out"], notes["out"]


@pytest.mark.parametrize("ppm", [100.0, -100.0])
def test_clock_error_scales_a_tone_and_the_sample_count(ppm):
    # Replaying x(t) with a clock (1 + e) fast gives x(t (1 + e)): a tone at f comes out at
    # f (1 + e), and N input samples cover ceil(N / (1 + e)) output instants (definition of
    # a time-scaled signal, common practice). Frequency measured by the slope of the
    # unwrapped phase (least squares, numpy.polyfit).
    n, f = 200_000, 0.1 * FS
    x = np.exp(2j * np.pi * f / FS * np.arange(n)).astype(np.complex64)
    y, _ = run_channel(x, clock_ppm=ppm)
    assert y.shape[0] == math.ceil(n / (1 + ppm * 1e-6))
    body = y[50:-50].astype(np.complex128)
    slope = np.polyfit(np.arange(body.shape[0]), np.unwrap(np.angle(body)), 1)[0]
    measured = slope * FS / (2 * np.pi)
    assert measured == pytest.approx(f * (1 + ppm * 1e-6), abs=1e-4)
    assert abs(measured - f) == pytest.approx(abs(ppm) * 1e-6 * f, rel=1e-4)


@pytest.mark.parametrize(("f", "limit_db"), [(0.01, -85.0), (0.125, -85.0), (0.25, -75.0),
                                             (-0.25, -75.0)])
def test_clock_error_interpolation_error_is_small_for_band_limited_input(f, limit_db):
    # Against the exact tone exp(j 2 pi f n (1 + e)) computed in double precision: the
    # windowed-sinc interpolator's error relative to the tone stays far below the -40 dB
    # asked of it for signals within a quarter of the sample rate either side (the limits
    # are the design's own figures with a few dB of margin; see blocks/_resample.py).
    ppm, n = 3000.0, 60_000
    x = np.exp(2j * np.pi * f * np.arange(n)).astype(np.complex64)
    y, _ = run_channel(x, clock_ppm=ppm)
    exact = np.exp(2j * np.pi * f * (1 + ppm * 1e-6) * np.arange(y.shape[0]))
    error = np.abs(y - exact)[10:-10]
    assert 20 * np.log10(np.max(error)) < limit_db


SIM = dict(symbol_rate=1000.0, sample_rate=8000.0, random_phase=False, seed=3, symbols=4000,
           chunk_size=4096)


@pytest.mark.parametrize(("modulation", "pulse", "limit_db"), [
    ("2fsk", "gaussian", -75.0), ("dbpsk", "rrc", -55.0)])
def test_channel_clock_error_matches_the_transmitter_clock_error(modulation, pulse, limit_db):
    # Two independent models of one impairment: the sim keys its symbols at Rs (1 + e) on an
    # exact rational clock (blocks/_modulate.py), the channel resamples the nominal stream.
    # For near band-limited pulses (GFSK, root-raised cosine) they agree to the
    # interpolation error; the truncated rrc pulse is not strictly band-limited, hence the
    # looser limit (measured about -63 dB). The 2-FSK envelope switches on and off abruptly
    # at the ends of the stream, which no band-limited model reproduces: they are left out.
    ppm = 50.0
    common = dict(SIM, modulation=modulation, pulse=pulse)
    nominal, _, _ = run_sim(clock_ppm=0.0, **common)
    sent, _, _ = run_sim(clock_ppm=ppm, **common)
    y, _ = run_channel(nominal, fs=SIM["sample_rate"], clock_ppm=ppm)
    assert y.shape[0] == sent.shape[0]
    diff = (y - sent)[100:-100].astype(np.complex128)
    power = np.mean(np.abs(sent.astype(np.complex128)) ** 2)
    assert 10 * np.log10(np.mean(np.abs(diff) ** 2) / power) < limit_db


def test_timing_block_reads_the_channel_clock_error():
    # The Oerder & Meyr (1988) timing estimator of the timing block measures the drift of
    # the symbol clock; a nominal DBPSK stream through a 50 ppm channel must read 50 ppm
    # within the 5 ppm the sync tests allow for a sim clock error.
    ppm = 50.0
    nominal, _, _ = run_sim(**dict(SIM, modulation="dbpsk", pulse="rrc", symbols=30_000))
    fs = SIM["sample_rate"]
    y, _ = run_channel(nominal, fs=fs, clock_ppm=ppm, ebn0_db=20.0, bit_rate=1000.0)
    mf, _ = run_block(make_block("matched_filter", symbol_rate=1000.0, rolloff=0.35), [y], fs)
    timing = make_block("timing", symbol_rate=1000.0)
    run_block(timing, [mf["out"]], fs)
    assert timing.readings()["clock_ppm"] == pytest.approx(ppm, abs=5.0)


def test_clock_error_moves_annotations_to_resampled_indices():
    # An event at input sample i lands on the first output instant at or after it,
    # ceil(i / (1 + e)), computed here with exact rationals (fractions.Fraction).
    ppm = 5000.0
    notes = [Annotation(i, "packet", {"packet": k}) for k, i in enumerate((0, 777, 10_000))]
    block = make_block("channel", clock_ppm=ppm, random_phase=False)
    out, got = run_block(block, [SIGNAL[:5000], SIGNAL[5000:]], FS, annotations=notes)
    ratio = 1 + Fraction(ppm) / 10**6
    assert [a.index for a in got["out"]] == [math.ceil(a.index / ratio) for a in notes]
    assert [a.data for a in got["out"]] == [a.data for a in notes]
    assert out["out"].shape[0] == math.ceil(len(SIGNAL) / ratio)
    assert block.readings()["clock_ppm"] == ppm


def test_clock_error_bookkeeping_is_exact_late_in_a_long_run():
    # Integer bookkeeping: 1e15 samples in (over 300 years at 100 kS/s) the output index of
    # an input instant is still exact (checked against fractions.Fraction).
    for ppm in (37.25, -9999.5):
        rs = design_resampler(ppm)
        i = 10**15 + 12345
        assert resampled_index(rs, i) == math.ceil(i / (1 + Fraction(ppm) / 10**6))


def make_skewed_channel(ppm):
    return lambda: make_block("channel", clock_ppm=ppm, ebn0_db=8.0, bit_rate=5000.0,
                              cfo_hz=-300.0, linewidth_hz=5.0, seed=8)


CLOCK_NOTES = (Annotation(3, "packet"), Annotation(NOISE_BLOCK + 11, "packet"))


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(SIGNAL)), ppm=st.sampled_from([250.0, -4000.0]))
def test_clock_error_is_chunk_invariant(cuts, ppm):
    # Chunk-size invariance (project convention), samples and annotations.
    whole = assert_chunk_invariant(make_skewed_channel(ppm), SIGNAL, FS, cuts, atol=2e-5,
                                   annotations=CLOCK_NOTES)
    assert whole["out"].shape[0] == math.ceil(len(SIGNAL) / (1 + ppm * 1e-6))


@pytest.mark.parametrize("ppm", [1e4, -1e4, 2e5, math.nan, math.inf])
def test_channel_block_rejects_bad_clock_errors(ppm):
    with pytest.raises(ParamError, match="clock_ppm"):
        make_block("channel", clock_ppm=ppm)
