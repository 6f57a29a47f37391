"""The ``sim`` source: Eb/N0 bookkeeping, packets, clock error, chunk invariance, errors."""

from __future__ import annotations

import math

import numpy as np
import pytest

import blocks.simulator  # noqa: F401  (registers the sim kind)
from blocks._packets import packet_bits
from blocks._prbs import prbs_sequence
from blocks._pulses import rrc_taps
from stream.chunk import Annotation
from stream.errors import ParamError
from tests.chunking import make_block


def run_sim(**params) -> tuple[np.ndarray, list[Annotation], object]:
    """Run a sim block to its end; return samples, annotations and the block."""
    block = make_block("sim", **params)
    block.configure({})
    out, notes, more = [], [], True
    while more:
        more = block.produce()
        for _, chunk in block.take_output():
            assert chunk.samples.dtype == np.complex64
            out.append(chunk.samples)
            notes.extend(chunk.annotations)
            assert all(chunk.start <= a.index < chunk.stop for a in chunk.annotations)
    return np.concatenate(out), notes, block


MODES = [
    ("ook", "rect"), ("ook", "rrc"), ("2fsk", "rect"), ("2fsk", "gaussian"),
    ("dbpsk", "rect"), ("dbpsk", "rrc"), ("dqpsk", "rect"), ("dqpsk", "rrc"),
]


@pytest.mark.parametrize(("modulation", "pulse"), MODES)
@pytest.mark.parametrize("sps", [2.0, 4.0, 5.5, 1e6 / 9600])
def test_measured_ebn0_matches_setting(modulation, pulse, sps):
    # Es/N0 = P Ts / N0 and Eb/N0 = Es/N0 / log2(M) with N0 = noise variance / fs
    # (Proakis & Salehi 5th ed., definitions of Es, Eb and N0; full-band discrete noise is
    # common practice). Signal and noise measured separately: same seed, noise on and off.
    # Whole periods of the O.150 2^9-1 pattern keep the bits balanced (256 ones in 511).
    fs = 1_000_000.0
    rs = fs / sps
    setting = 7.0
    common = dict(modulation=modulation, pulse=pulse, symbol_rate=rs, sample_rate=fs,
                  seed=4, pattern="prbs9", symbols=511 * math.ceil(100_000 / sps / 511),
                  chunk_size=8192)
    clean, _, _ = run_sim(ebn0_db=math.inf, **common)
    noisy, _, block = run_sim(ebn0_db=setting, **common)
    noise = (noisy.astype(np.complex128) - clean)
    edge = int(10 * sps)
    power = np.mean(np.abs(clean[edge:-edge].astype(np.complex128)) ** 2)
    n0 = np.mean(np.abs(noise) ** 2) / fs
    esn0 = 10 * math.log10(power / rs / n0)
    bits = 2 if modulation == "dqpsk" else 1
    ebn0 = esn0 - 10 * math.log10(bits)
    assert 10 * math.log10(power) == pytest.approx(0.0, abs=0.1)    # unit power transmitting
    assert ebn0 == pytest.approx(setting, abs=0.1)
    # Tighter: the noise alone against N0 = (1 / Rb) / 10^(EbN0/10) (statistical error of
    # the estimate about 0.3 %).
    assert n0 == pytest.approx(1 / (rs * bits) / 10 ** (setting / 10), rel=0.015)
    assert esn0 == pytest.approx(block.readings()["esn0_db"], abs=0.1)


def test_clean_ook_has_exact_levels_and_carrier_offset():
    # ebn0_db = inf: no noise; the carrier offset turns the phase by 2 pi f / fs per sample
    # (definition, common practice) from the seeded start phase.
    fs, cfo = 200_000.0, 1500.0
    y, _, block = run_sim(modulation="ook", symbol_rate=10_000.0, sample_rate=fs, cfo_hz=cfo,
                          symbols=3000, seed=8)
    y = y.astype(np.complex128)
    on = np.abs(y) > 0.5
    np.testing.assert_allclose(np.abs(y[on]), math.sqrt(2), rtol=1e-6)
    np.testing.assert_array_equal(np.abs(y[~on]), 0)
    n = np.flatnonzero(on)
    phase = block.readings()["start_phase_rad"] + 2 * np.pi * cfo * n / fs
    np.testing.assert_allclose(np.angle(y[n] * np.exp(-1j * phase)), 0, atol=1e-6)


def test_packets_carry_prbs9_payloads_and_are_annotated():
    # OOK with integer samples per symbol, no noise: mid-symbol amplitude decisions from each
    # annotation give exactly packet_bits(payload) with payloads the consecutive bytes of one
    # ITU-T O.150 2^9-1 sequence, and silence between packets and after the last one.
    sps, gap, payload = 8, 40, 5
    y, notes, block = run_sim(modulation="ook", symbol_rate=1000.0, sample_rate=8000.0,
                              pattern="packets", payload_bytes=payload, gap_symbols=gap,
                              packets=4, chunk_size=1000, random_phase=False)
    assert [a.label for a in notes] == ["packet"] * 4
    assert [a.data["packet"] for a in notes] == [0, 1, 2, 3]
    assert all(a.data["payload_bytes"] == payload for a in notes)
    stream, _ = prbs_sequence("prbs9", 4 * payload * 8)
    length = len(packet_bits(bytes(payload)))
    assert len(y) == (4 * (gap + length) + gap) * sps    # a last gap closes the stream
    np.testing.assert_array_equal(y[-gap * sps:], 0)
    for i, note in enumerate(notes):
        assert note.index == (gap + i * (gap + length)) * sps
        body = np.packbits(stream[i * payload * 8:(i + 1) * payload * 8]).tobytes()
        expect = packet_bits(body)
        got = (np.abs(y[note.index + sps // 2::sps][:length]) > 0.7).astype(np.uint8)
        np.testing.assert_array_equal(got, expect)
        np.testing.assert_array_equal(y[note.index - gap * sps:note.index], 0)
    assert block.readings()["packets"] == 4


def test_rrc_dbpsk_packets_decode_after_matched_filter():
    # RRC shaping + RRC matched filter is a Nyquist raised cosine (Proakis & Salehi 5th ed.,
    # 9.2): differential decisions at the symbol peaks after the pulse delay give the packet
    # bits; the annotation marks the start of the delayed first preamble symbol.
    sps, span, beta = 8, 8, 0.35
    y, notes, block = run_sim(modulation="dbpsk", pulse="rrc", rolloff=beta, span_symbols=span,
                              symbol_rate=1000.0, sample_rate=8000.0, pattern="packets",
                              payload_bytes=3, gap_symbols=20, packets=2, cfo_hz=0.0, seed=3)
    assert block.readings()["pulse_delay_symbols"] == (span - 1) / 2
    taps = rrc_taps(sps, beta, span)
    mf = np.convolve(y.astype(np.complex128), taps)
    delay = (len(taps) - 1) // 2
    stream, _ = prbs_sequence("prbs9", 2 * 3 * 8)
    for i, note in enumerate(notes):
        expect = packet_bits(np.packbits(stream[i * 24:(i + 1) * 24]).tobytes())
        peaks = mf[note.index + sps // 2 + delay::sps][:len(expect)]
        # The first preamble bit follows silence, so only the later ones are differential.
        steps = (peaks[1:] * np.conj(peaks[:-1])).real
        np.testing.assert_array_equal((steps < 0).astype(np.uint8), expect[1:])


@pytest.mark.parametrize("ppm", [250.0, -1000.0])
def test_clock_ppm_scales_the_symbol_rate(ppm):
    # A transmitter clock off by ppm sends symbol_rate x (1 + ppm 1e-6) symbols/s, so K
    # symbols span ceil(K fs / (Rs (1 + ppm 1e-6))) samples (definition, common practice),
    # and the stream equals that of a sim at the scaled rate.
    fs, rs, k = 50_000.0, 1000.0, 4000
    y, _, block = run_sim(modulation="2fsk", symbol_rate=rs, sample_rate=fs, clock_ppm=ppm,
                          symbols=k, seed=2)
    assert len(y) == math.ceil(k * fs / (rs * (1 + ppm * 1e-6)))
    assert block.readings()["symbol_rate"] == pytest.approx(rs * (1 + ppm * 1e-6), rel=1e-12)
    ref, _, _ = run_sim(modulation="2fsk", symbol_rate=rs * (1 + ppm * 1e-6), sample_rate=fs,
                        deviation_hz=rs * (1 + ppm * 1e-6) / 2, symbols=k, seed=2)
    np.testing.assert_allclose(y, ref, atol=1e-6)
    nominal, _, _ = run_sim(modulation="2fsk", symbol_rate=rs, sample_rate=fs, symbols=k)
    assert len(nominal) == k * 50


FULL = dict(modulation="dqpsk", pulse="rrc", symbol_rate=3000.0, sample_rate=10_000.0,
            ebn0_db=12.0, cfo_hz=210.0, linewidth_hz=3.0, fading_doppler_hz=2.0,
            clock_ppm=40.0, seed=17, pattern="packets", payload_bytes=4, gap_symbols=13,
            symbols=2500)


@pytest.mark.parametrize("chunk_size", [1, 777, 4096])
def test_sim_is_chunk_invariant(chunk_size):
    # Chunk-size invariance (project convention): every chunk size gives the same stream,
    # noise, phase noise and fading included, and the same annotations.
    ref, ref_notes, _ = run_sim(chunk_size=16384, **FULL)
    got, notes, _ = run_sim(chunk_size=chunk_size, **FULL)
    assert got.shape == ref.shape
    np.testing.assert_allclose(got, ref, rtol=0, atol=2e-5)
    assert notes == ref_notes


def test_seed_repeats_and_changes_the_run():
    a, _, _ = run_sim(**FULL)
    b, _, _ = run_sim(**FULL)
    c, _, _ = run_sim(**{**FULL, "seed": 18})
    np.testing.assert_array_equal(a, b)
    assert not np.allclose(a, c)


def test_endless_stream_keeps_going():
    block = make_block("sim", modulation="2fsk", symbol_rate=1000.0, sample_rate=8000.0,
                       chunk_size=500)
    block.configure({})
    assert all(block.produce() for _ in range(50))
    assert block.readings()["samples"] == 25_000


def test_readings_report_true_settings():
    _, _, block = run_sim(modulation="dqpsk", symbol_rate=1000.0, sample_rate=8000.0,
                          ebn0_db=9.0, cfo_hz=12.0, symbols=100)
    r = block.readings()
    assert r["ebn0_db"] == 9.0 and r["esn0_db"] == pytest.approx(9.0 + 10 * math.log10(2))
    assert r["cfo_hz"] == 12.0 and r["samples"] == 800 and r["symbols"] == 100
    assert r["noise_variance"] == pytest.approx(1 / 2000 / 10**0.9 * 8000)


@pytest.mark.parametrize(("params", "name"), [
    ({"symbol_rate": 0.0}, "symbol_rate"),
    ({"ebn0_db": math.nan}, "ebn0_db"),
    ({"ebn0_db": "loud"}, "ebn0_db"),
    ({"modulation": "qam64"}, "modulation"),
    ({"pattern": "prbs31"}, "pattern"),
    ({"symbol_rate": 1000.0, "sample_rate": 0.0}, "sample_rate"),
])
def test_bad_values_are_rejected_at_construction(params, name):
    args = {"modulation": "2fsk", "symbol_rate": 1000.0, "sample_rate": 8000.0, **params}
    with pytest.raises(ParamError, match=name):
        make_block("sim", **args)


@pytest.mark.parametrize(("params", "name", "text"), [
    ({"deviation_hz": 5000.0}, "deviation_hz", "half the sample rate"),
    ({"deviation_hz": 3600.0}, "sample_rate", "Carson"),
    ({"symbol_rate": 5000.0}, "sample_rate", "2 x symbol rate"),
    ({"modulation": "dbpsk", "pulse": "rrc", "symbol_rate": 7000.0}, "sample_rate", "rolloff"),
    ({"pulse": "rrc"}, "pulse", "rrc"),
    ({"modulation": "ook", "pulse": "gaussian"}, "pulse", "gaussian"),
    ({"modulation": "ook", "deviation_hz": 100.0}, "deviation_hz", "2fsk only"),
    ({"modulation": "dqpsk", "pattern": "packets", "preamble_bits": 31}, "preamble_bits",
     "even"),
    ({"packets": 3}, "packets", "pattern"),
    ({"cfo_hz": 4000.0}, "cfo_hz", "half the sample rate"),
])
def test_inconsistent_settings_are_rejected_at_setup(params, name, text):
    args = {"modulation": "2fsk", "symbol_rate": 1000.0, "sample_rate": 8000.0, **params}
    block = make_block("sim", **args)
    with pytest.raises(ParamError, match=name) as err:
        block.configure({})
    assert err.value.name == name
    assert text in err.value.message


def test_missing_sample_rate_is_reported():
    block = make_block("sim", modulation="ook", symbol_rate=1000.0)
    with pytest.raises(ParamError, match="sample_rate"):
        block.configure({})
