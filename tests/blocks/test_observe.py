"""The eye, spectrum and snr meters, and the ber meter's history, in the shipped receive chains.

The chains are the shipped pipeline files (simulated node, decimation, frequency correction,
matched filter, timing recovery, detector, BER meter) run at 5.3 samples per symbol after a
decimation by 2, with the meters attached where the monitor attaches them. The simulator's
Eb/N0 is exact by construction (``blocks/_channel.py``: noise variance ``N0 fs`` with
``Eb = P / bit rate``; OOK's Eb is the mean over equiprobable bits), which is the reference for
the estimates; M2M4 is from Pauluzzi & Beaulieu, IEEE Trans. Commun. 48(10), 2000.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from scipy.signal import welch
from scipy.stats import beta

from blocks._prbs import prbs_sequence
from stream.chunk import Chunk
from stream.loader import pipeline_from_dict
from tests.chunking import chunk_cuts, make_block, run_block, split

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
#: Samples per symbol after the decimator: small, and not an integer.
SPS = 5.3
DEVIATION = 4_800.0


def run_inline(pipe) -> None:
    """Run a validated pipeline in this thread: each source chunk pushed through to the end."""
    def push(block_id: str, port: str, chunk: Chunk) -> None:
        for edge in pipe.outputs_of(block_id):
            if edge.src_port != port:
                continue
            block = pipe.blocks[edge.dst]
            block.deliver(Chunk(chunk.samples, chunk.start, chunk.rate, chunk.annotations,
                                edge.dst_port))
            for name, out in block.take_output():
                push(edge.dst, name, out)

    (source,) = pipe.sources()
    more = True
    while more:
        more = pipe.blocks[source].timed("produce")
        for name, out in pipe.blocks[source].take_output():
            push(source, name, out)
    for block_id in pipe.order():
        if block_id != source:
            pipe.blocks[block_id].timed("finish")
            for name, out in pipe.blocks[block_id].take_output():
                push(block_id, name, out)


def chain(modulation: str, ebn0_db: float, symbols: int = 20_000, **eye: object):
    """The shipped loopback receiver with snr, eye and spectrum meters attached, run."""
    pipe = chain_pipeline(modulation, ebn0_db, symbols, **eye)
    run_inline(pipe)
    return pipe


def chain_pipeline(modulation: str, ebn0_db: float, symbols: int = 20_000, **eye: object):
    """The pipeline ``chain`` runs."""
    doc = tomllib.loads((CONFIGS / f"loopback-{modulation}.toml").read_text(encoding="utf-8"))
    head, blocks = doc["pipeline"], doc["blocks"]
    head["sample_rate"] = 2 * SPS * head["symbol_rate"]
    blocks["dec"]["factor"] = 2
    blocks["src"].update(symbols=symbols, ebn0_db=float(ebn0_db))
    blocks["cfo"]["window_symbols"] = 1024
    if modulation == "2fsk":
        blocks["m_snr"] = {"kind": "snr", "modulation": "2fsk", "samples_per_symbol": 8,
                         "deviation_hz": DEVIATION}
        blocks["m_eye"] = {"kind": "eye", "quantity": "frequency", "deviation_hz": DEVIATION}
        head["links"] += ["timing -> m_snr", "cfo -> m_eye"]
    else:
        blocks["m_snr"] = {"kind": "snr", "modulation": modulation}
        blocks["m_eye"] = {"kind": "eye",
                         "quantity": "envelope" if modulation == "ook" else "differential"}
        head["links"] += ["timing -> m_snr", "mf -> m_eye"]
    blocks["m_eye"].update(decay=1.0, **eye)
    blocks["m_spec"] = {"kind": "spectrum", "average": 0}
    head["links"].append("dec -> m_spec")
    return pipeline_from_dict(doc)


# -- Eb/N0 estimate -----------------------------------------------------------------------------
ERRORS: dict[tuple[str, float], float] = {}


@pytest.mark.parametrize("modulation", ["ook", "2fsk", "dbpsk", "dqpsk"])
def test_ebn0_estimate_is_within_one_db_of_the_set_value(modulation):
    # Reference: the simulator's exact Eb/N0 bookkeeping (module notes). M2M4 for DBPSK and
    # DQPSK at one sample per symbol, its two-dimensional form on the 2-FSK tone correlators,
    # and the maximum-likelihood on/off level fit for OOK; within 1 dB from 0 to 20 dB.
    for ebn0_db in (0.0, 5.0, 10.0, 15.0, 20.0):
        got = chain(modulation, ebn0_db).blocks["m_snr"].readings()
        ERRORS[modulation, ebn0_db] = got["ebn0_db"] - ebn0_db
        assert got["ebn0_db"] == pytest.approx(ebn0_db, abs=1.0), (modulation, ebn0_db)
        bits = 2 if modulation == "dqpsk" else 1
        assert got["esn0_db"] == pytest.approx(got["ebn0_db"] + 10 * math.log10(bits))


# -- eye ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("modulation", ["ook", "2fsk", "dbpsk", "dqpsk"])
def test_eye_q_ranks_eyes_the_opening_calls_shut(modulation):
    # At 4 and 7 dB the 3-sigma opening is 0 for every scheme; Q (blocks._eye.q_factor) still
    # grows with Eb/N0, and the picture's figure is the reading.
    eyes = [chain(modulation, e, symbols=8_000).blocks["m_eye"] for e in (4.0, 7.0, 10.0)]
    readings = [eye.readings() for eye in eyes]
    assert readings[0]["eye_opening"] == readings[1]["eye_opening"] == 0.0
    q = [r["eye_q"] for r in readings]
    assert q[0] + 0.05 < q[1] < q[2] - 0.05, q
    assert eyes[2].views()["q"] == pytest.approx(q[2], rel=1e-12)


def centre_peaks(views: dict) -> tuple[float, float, float]:
    """Most frequent level below and above the cut between the clusters, at the optimum
    instants; and the width of one level row."""
    counts = np.array(views["counts"])
    levels = np.array(views["levels"])
    time = np.array(views["time_symbols"])
    columns = np.minimum(abs(time - 0.5), abs(time - 1.5)) <= 1 / 32 + 1e-9
    profile = counts[:, columns].sum(axis=1)
    cut = 0.5 * (views["clusters"]["low_mean"] + views["clusters"]["high_mean"])
    low, high = levels < cut, levels >= cut
    return (float(levels[low][np.argmax(profile[low])]),
            float(levels[high][np.argmax(profile[high])]), float(levels[1] - levels[0]))


@pytest.mark.parametrize("modulation", ["ook", "2fsk", "dbpsk", "dqpsk"])
def test_eye_opens_with_eb_n0_and_peaks_at_the_symbol_levels(modulation):
    good = chain(modulation, 20.0, symbols=8_000).blocks["m_eye"]
    poor = chain(modulation, 6.0, symbols=8_000).blocks["m_eye"]
    assert good.readings()["eye_opening"] > poor.readings()["eye_opening"] + 0.2
    assert good.readings()["eye_opening"] > 0.5
    assert good.readings()["eye_traces"] > 500
    low, high, row = centre_peaks(good.views())
    # The symbol energy at the matched filter's optimum instant is Es = P * SPS with the
    # simulator's mean power P = 1 while transmitting (unit-energy matched filter, common
    # practice); the decimation filter and the rectangular pulse cost a few percent.
    es = SPS
    if modulation == "ook":
        # on: amplitude sqrt(2 Es) (the on symbol carries twice the mean energy); off: the
        # Rayleigh mode sqrt(N0 / 2) with N0 = Es / (Eb/N0) (Proakis & Salehi, Digital
        # Communications, 5th ed., 2008, sec. 2.3).
        assert high == pytest.approx(math.sqrt(2 * es), rel=0.06)
        assert low == pytest.approx(math.sqrt(es / 100 / 2), abs=1.5 * row)
    elif modulation == "2fsk":
        # the instantaneous frequency sits at the tones, +/- the deviation
        assert (low, high) == (pytest.approx(-DEVIATION, rel=0.05),
                               pytest.approx(DEVIATION, rel=0.05))
    else:
        # Re(y_k conj y_{k-1}) = Es cos(delta phi): +/- Es for DBPSK, +/- Es / sqrt 2 for
        # pi/4-DQPSK (phase steps of +/- pi/4 and +/- 3 pi/4; Proakis & Salehi sec. 4.5)
        level = es if modulation == "dbpsk" else es / math.sqrt(2)
        assert (low, high) == (pytest.approx(-level, rel=0.06),
                               pytest.approx(level, rel=0.06))


def test_eye_views_have_the_documented_shape():
    views = chain("dbpsk", 12.0, symbols=3_000, time_bins=32, level_bins=20).blocks["m_eye"]
    v = views.views()
    assert v["quantity"] == "differential" and v["unit"] == "power"
    assert len(v["time_symbols"]) == 32 and len(v["levels"]) == 20
    assert np.array(v["counts"]).shape == (20, 32)
    assert 0 < v["time_symbols"][0] < v["time_symbols"][-1] < 2
    # every trace puts one value in every column (unless outside the level range)
    col = np.array(v["counts"]).sum(axis=0)
    assert col.max() <= v["traces"] and col.min() >= 0.95 * v["traces"]


# -- chunk-size invariance ------------------------------------------------------------------------
def rect_symbols(rng: np.random.Generator, n_symbols: int, sps: float, levels: np.ndarray,
                 noise: float) -> np.ndarray:
    """Rectangular pulses at a non-integer number of samples per symbol, in complex noise."""
    symbols = levels[rng.integers(0, levels.shape[0], n_symbols)]
    n = int(n_symbols * sps)
    x = symbols[(np.arange(n) / sps).astype(int)] * np.exp(0.4j)
    return (x + noise * (rng.normal(size=n) + 1j * rng.normal(size=n))).astype(np.complex64)


RNG = np.random.default_rng(12)
EYE_SIGNAL = rect_symbols(RNG, 1_200, 6.3, np.array([0.0, 1.0]), 0.05)


def fsk_tones(rng: np.random.Generator, n_symbols: int, sps: float, deviation: float,
              rate: float, noise: float) -> np.ndarray:
    """Continuous-phase 2-FSK at +/- ``deviation`` (rectangular frequency pulses), in noise."""
    n = int(n_symbols * sps)
    f = deviation * (2 * rng.integers(0, 2, n_symbols) - 1)[(np.arange(n) / sps).astype(int)]
    x = np.exp(2j * np.pi * np.cumsum(f) / rate + 0.4j)
    return (x + noise * (rng.normal(size=n) + 1j * rng.normal(size=n))).astype(np.complex64)


EYE_RNG = np.random.default_rng(21)
#: On-off symbols whose amplitude triples at the start of window 9 (windows of 64 symbols at
#: 6.3 samples per symbol: 403 samples), where the eye restarts on a new level range.
STEPPED = rect_symbols(EYE_RNG, 1_200, 6.3, np.array([0.0, 1.0]), 0.05)
STEPPED[9 * 403:] *= 3
EYE_CASES = {
    "envelope": ({}, EYE_SIGNAL),
    "stepped envelope": ({}, STEPPED),
    "differential": ({"quantity": "differential"}, STEPPED),
    "frequency": ({"quantity": "frequency", "deviation_hz": 1_000.0},
                  fsk_tones(EYE_RNG, 1_200, 6.3, 1_000.0, 6_300.0, 0.1)),
}


@pytest.mark.parametrize("quantity", list(EYE_CASES))
@settings(max_examples=12, deadline=None)
@given(cuts=chunk_cuts(len(EYE_SIGNAL)))
def test_eye_does_not_depend_on_chunking(quantity, cuts):
    # Chunks shorter than a window close one window at a time; the whole signal closes all
    # of them in one pass (their traces weighted by the aging still to come): same figures.
    params, signal = EYE_CASES[quantity]

    def views(pieces):
        block = make_block("eye", symbol_rate=1_000.0, window_symbols=64, decay=0.9,
                           traces_per_window=32, **params)
        run_block(block, pieces, 6_300.0)
        return block.views(), block.readings()

    whole, parts = views([signal]), views(split(signal, cuts))
    np.testing.assert_allclose(parts[0]["counts"], whole[0]["counts"], atol=1e-9)
    assert parts[0]["levels"] == pytest.approx(whole[0]["levels"], rel=1e-12)
    assert parts[1] == pytest.approx(whole[1], rel=1e-9)
    assert whole[1]["eye_traces"] > 250


def test_eye_ages_the_histogram_once_per_window():
    # decay 1/2: a trace weighs 2**-k after k more windows closed (the parameter's meaning).
    # 18 whole windows of 64 symbols give 32 traces each (every even strobe) and the last part
    # window the rest, which no window ages: the 64 columns hold
    # 64 * (32 * (1 + 1/2 + ... + 2**-17) + rest) (the first trace may miss for want of
    # history before the stream's first sample).
    block = make_block("eye", symbol_rate=1_000.0, window_symbols=64, decay=0.5,
                       traces_per_window=32)
    run_block(block, [EYE_SIGNAL], 6_300.0)
    got = block.readings()
    assert got["eye_outside"] == 0
    rest = got["eye_traces"] - 18 * 32
    want = 64 * (32 * (2 - 2.0**-17) + rest)
    assert np.array(block.views()["counts"]).sum() == pytest.approx(want, abs=64.5)


def test_eye_restarts_its_histogram_when_the_level_moves():
    # After the on amplitude steps from 1 to 3 the histogram holds only the traces since the
    # restart (9 whole windows of 32 and at most 25 of the last part window, one value per
    # column each), its on level is 3, and its level axis is 0 .. 2.5 times the rms amplitude
    # of the window that restarted it (Eye.setup).
    block = make_block("eye", symbol_rate=1_000.0, window_symbols=64, decay=1.0,
                       traces_per_window=32)
    run_block(block, [STEPPED], 6_300.0)
    views = block.views()
    levels, counts = np.array(views["levels"]), np.array(views["counts"])
    top = levels[-1] + 0.5 * (levels[1] - levels[0])
    rms = math.sqrt(np.mean(np.abs(STEPPED[9 * 403:10 * 403].astype(np.complex128)) ** 2))
    assert top == pytest.approx(2.5 * rms, rel=1e-6)
    assert block.opening()[3] == pytest.approx(3.0, rel=0.03)
    traces = block.readings()["eye_traces"]
    assert 9 * 32 <= traces <= 9 * 32 + 25
    assert counts.sum() == pytest.approx(64 * traces, rel=0.01)


FSK_SIGNAL = rect_symbols(RNG, 3_000, 8, np.array([1.0, 1.0j, -1.0, -1.0j]), 0.3)
OOK_SYMBOLS = rect_symbols(RNG, 3_000, 1, np.array([0.0, 1.0]), 0.2)


@settings(max_examples=6, deadline=None)
@given(cuts=chunk_cuts(len(FSK_SIGNAL)))
def test_snr_does_not_depend_on_chunking(cuts):
    def readings(modulation, pieces, **extra):
        block = make_block("snr", modulation=modulation, window_symbols=256, **extra)
        run_block(block, pieces, 76_800.0)
        return block.readings()

    fsk = {"samples_per_symbol": 8, "deviation_hz": 4_800.0}
    assert readings("2fsk", split(FSK_SIGNAL, cuts), **fsk) == \
        readings("2fsk", [FSK_SIGNAL], **fsk)
    ook_cuts = [c // 8 for c in cuts]
    assert readings("ook", split(OOK_SYMBOLS, ook_cuts)) == readings("ook", [OOK_SYMBOLS])


SPEC_SIGNAL = rect_symbols(RNG, 400, 5.5, np.array([1.0, -1.0]), 0.2)


@settings(max_examples=15, deadline=None)
@given(cuts=chunk_cuts(len(SPEC_SIGNAL)))
def test_spectrum_does_not_depend_on_chunking(cuts):
    def views(pieces):
        block = make_block("spectrum", nfft=128, average=5)
        run_block(block, pieces, 48_000.0)
        return block.views()

    whole, parts = views([SPEC_SIGNAL]), views(split(SPEC_SIGNAL, cuts))
    assert parts["segments"] == whole["segments"]
    np.testing.assert_allclose(parts["psd_db"], whole["psd_db"], atol=0.011)


def eye_input(modulation: str, ebn0_db: float, symbols: int) -> tuple[np.ndarray, float, dict]:
    """The stream a chain's eye is fed, its rate, and the eye's parameters."""
    pipe = chain_pipeline(modulation, ebn0_db, symbols)
    eye = pipe.blocks["m_eye"]
    seen: list[Chunk] = []
    process = eye.process
    eye.process = lambda chunk: (seen.append(chunk), process(chunk))[1]
    run_inline(pipe)
    params = {k: v for k, v in vars(eye.p).items() if v is not None}
    return np.concatenate([c.samples for c in seen]), seen[0].rate, params


@pytest.mark.parametrize("modulation", ["ook", "2fsk", "dbpsk"])
def test_eye_across_holes_a_tap_leaves_keeps_its_shape(modulation):
    # A tap whose observer falls behind drops whole chunks. Two of every three chunks
    # dropped: the eye of what is left is as open as the eye of the whole stream (Q within
    # 5 %), because no trace or timing window joins the samples on the two sides of a hole;
    # joined, the traces across each hole and the windows' timing smear the levels (Q 7-33 %
    # lower on this stream). Each hole costs the traces that would span it.
    x, rate, params = eye_input(modulation, 14.0, 12_000)
    pieces = split(x, range(3_001, x.shape[0], 3_001))
    kept = range(1, len(pieces), 3)

    def eye(chosen):
        block = make_block("eye", **params)
        run_block(block, [pieces[k] for k in chosen], rate, starts=[k * 3_001 for k in chosen])
        return block.readings()

    whole, holed = eye(range(len(pieces))), eye(kept)
    assert holed["eye_q"] == pytest.approx(whole["eye_q"], rel=0.05)
    share = holed["eye_traces"] / (whole["eye_traces"] * len(kept) / len(pieces))
    assert 0.8 < share < 1.0


def test_spectrum_does_not_join_the_samples_across_a_hole():
    # A tone of random phase per piece, one hole after every piece: each segment holds a
    # piece of one pure tone, whose periodogram does not depend on its phase, so the Welch
    # average equals the one without holes (to float32 FFT rounding). A segment across a
    # hole would see the phase jump and smear the tone over the bins.
    rng = np.random.default_rng(4)
    fs, nfft, tone = 48_000.0, 256, 3_000.0
    t = np.arange(40 * 1_000)
    pieces = [(np.exp(2j * np.pi * (tone * t[k:k + 1_000] / fs + rng.random())))
              .astype(np.complex64) for k in range(0, t.shape[0], 1_000)]

    def density(starts):
        block = make_block("spectrum", nfft=nfft, average=0)
        run_block(block, pieces, fs, starts=starts)
        return block.density()

    steady = density([k * 1_000 for k in range(40)])           # phase jumps, no hole
    holed = density([k * 1_700 for k in range(40)])
    clean = make_block("spectrum", nfft=nfft, average=0)
    run_block(clean, [pieces[0]], fs)
    np.testing.assert_allclose(holed, clean.density(), rtol=2e-3, atol=1e-9 * holed.max())
    assert np.sum(np.abs(steady - clean.density())) > 0.01 * np.sum(clean.density())


# -- spectrum -------------------------------------------------------------------------------------
def test_spectrum_block_is_scipy_welch_around_the_tuned_frequency():
    # Reference: scipy.signal.welch (Hann, half overlap, density, two-sided) of the same data.
    rng = np.random.default_rng(8)
    fs, n, nfft = 250_000.0, 200_000, 1024
    noise_power, tone_hz = 0.01, 31_250.0
    t = np.arange(n)
    x = (0.5 * np.exp(2j * np.pi * tone_hz * t / fs) + math.sqrt(noise_power / 2)
         * (rng.normal(size=n) + 1j * rng.normal(size=n))).astype(np.complex64)
    block = make_block("spectrum", nfft=nfft, average=0, center_hz=868.3e6)
    run_block(block, split(x, [7_001, 50_000, 50_013]), fs)
    f, want = welch(x.astype(np.complex128), fs, nperseg=nfft, detrend=False,
                    return_onesided=False, scaling="density")
    order = np.argsort(f)
    np.testing.assert_allclose(block.density(), want[order], rtol=1e-5)
    np.testing.assert_allclose(block.freqs, 868.3e6 + f[order])
    got = block.readings()
    assert got["peak_hz"] == pytest.approx(868.3e6 + tone_hz, abs=fs / nfft)
    # white complex noise of variance s^2 at rate fs has density N0 = s^2 / fs (common
    # practice; the simulator's awgn_variance is the same relation)
    assert got["floor_db"] == pytest.approx(10 * math.log10(noise_power / fs), abs=0.25)
    v = block.views()
    assert len(v["freqs_hz"]) == len(v["psd_db"]) == nfft
    assert v["segments"] == got["segments"] == (n - nfft) // (nfft // 2) + 1


def test_spectrum_of_the_simulated_node_shows_the_2fsk_tones():
    spec = chain("2fsk", 20.0, symbols=4_000).blocks["m_spec"]
    v = spec.views()
    f, psd = np.array(v["freqs_hz"]), np.array(v["psd_db"])
    # energy sits within the tones +/- deviation plus the carrier offset of 1.3 kHz and
    # sidelobes; far outside the main lobes the density is at least 20 dB lower
    inner = psd[np.abs(f - 1_300) < DEVIATION + 4_800]
    outer = psd[np.abs(f - 1_300) > 3 * DEVIATION + 4_800]
    assert inner.max() > outer.max() + 20


# -- parameters -----------------------------------------------------------------------------------
@pytest.mark.parametrize(("kind", "params", "rate", "message"), [
    ("snr", {"modulation": "2fsk", "samples_per_symbol": 8}, 76_800.0, "deviation_hz"),
    ("snr", {"modulation": "2fsk", "deviation_hz": 4_800.0}, 76_800.0, "samples_per_symbol"),
    ("snr", {"modulation": "dbpsk", "samples_per_symbol": 4}, 38_400.0, "samples_per_symbol"),
    ("snr", {"modulation": "ook", "deviation_hz": 1.0}, 9_600.0, "deviation_hz"),
    ("eye", {"symbol_rate": 9_600.0, "quantity": "frequency"}, 50_000.0, "deviation_hz"),
    ("eye", {"symbol_rate": 30_000.0}, 50_000.0, "symbol_rate"),
])
def test_bad_parameters_name_the_parameter(kind, params, rate, message):
    from stream.block import StreamSpec
    from stream.errors import ParamError

    block = make_block(kind, **params)
    with pytest.raises(ParamError, match=message):
        block.configure({"in": StreamSpec("complex64", rate)})


def test_nan_input_is_reported_with_its_index():
    x = np.ones(500, np.complex64)
    x[321] = np.nan
    for kind, params in (("snr", {"modulation": "dbpsk"}), ("spectrum", {}),
                         ("eye", {"symbol_rate": 100.0})):
        with pytest.raises(ValueError, match="321"):
            run_block(make_block(kind, **params), [x], 1_000.0)


# -- ber history ----------------------------------------------------------------------------------
def errored_prbs(n: int, every: int) -> np.ndarray:
    bits, _ = prbs_sequence("prbs15", n)
    bits = bits.copy()
    bits[5_000::every] ^= 1
    return bits


BER_BITS = errored_prbs(60_000, 400)


def ber_history(pieces, interval: int = 10_000, **params):
    block = make_block("ber", history_interval_bits=interval, **params)
    run_block(block, pieces, 9_600.0)
    return block.views()["history"], block.readings()


def test_ber_history_has_one_point_per_interval_and_its_interval():
    history, total = ber_history([BER_BITS])
    assert history["interval_bits"] == 10_000
    assert len(history["t_s"]) == 6
    np.testing.assert_allclose(history["t_s"], np.arange(1, 7) * 10_000 / 9_600)
    assert history["bits"][-1] == total["bits"] and history["errors"][-1] == total["errors"]
    # after the first interval (acquisition), one error in 400 bits
    for ber, low, high in zip(history["ber"][1:], history["ber_low"][1:],
                              history["ber_high"][1:], strict=True):
        assert ber == pytest.approx(1 / 400, rel=0.1)
        assert low <= ber <= high
    # the interval is Clopper-Pearson at 95 % (Clopper & Pearson, Biometrika 26(4), 1934),
    # written with scipy.stats.beta quantiles
    k = history["errors"][2] - history["errors"][1]
    m = history["bits"][2] - history["bits"][1]
    assert history["ber_low"][2] == pytest.approx(beta.ppf(0.025, k, m - k + 1))
    assert history["ber_high"][2] == pytest.approx(beta.ppf(0.975, k + 1, m - k))


@settings(max_examples=15, deadline=None)
@given(cuts=chunk_cuts(len(BER_BITS)))
def test_ber_history_does_not_depend_on_chunking(cuts):
    assert ber_history(split(BER_BITS, cuts)) == ber_history([BER_BITS])


def test_ber_history_memory_is_bounded():
    history, _ = ber_history([BER_BITS[:30_000]], 64, history_points=2)
    assert len(history["ber"]) == 2
    assert history["t_s"][-1] == pytest.approx(30_000 / 9_600)
