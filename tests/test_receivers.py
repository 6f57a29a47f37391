"""End to end: the shipped receivers on the simulated sensor node, against published theory.

Every shipped pipeline file runs whole (simulated node, decimation, frequency correction,
matched filter, timing recovery, detector, framing, meters) with the impairments of a cheap
node: carrier offset above 10 % of the symbol rate, a random start phase, a 50 ppm symbol
clock error and a non-integer number of samples per symbol. The sample rate is lowered with
``--set``-style overrides (5.3 samples per symbol after decimation by 2) to keep the run short.

Bit error rates are judged by the exact binomial (Clopper-Pearson) interval computed with
``scipy.stats.binomtest`` (a reference library, independent of the ``ber`` block's own
interval), at 99 % so that a dozen checks stay clear of chance failures: a receiver with an
implementation loss L in [0, 1] dB has its interval's upper end at or above the theory at the
set Eb/N0, and its lower end at or below the theory 1 dB lower.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy.special import i0e, ndtr
from scipy.stats import binomtest, ncx2

from blocks._prbs import prbs_sequence
from blocks._theory import ber_theory, ebn0_for_ber
from stream.commands import sweep
from stream.loader import load_pipeline, pipeline_from_dict
from stream.runner import Runner

CONFIGS = Path(__file__).resolve().parent.parent / "configs"
SHIPPED = ("default", "loopback-ook", "loopback-2fsk", "loopback-dbpsk", "loopback-dqpsk",
           "packets-2fsk")
MODULATIONS = ("ook", "2fsk", "dbpsk", "dqpsk")
#: Samples per symbol after the decimator in these tests: small, and not an integer.
SPS = 5.3
CONFIDENCE = 0.99


def config(name: str) -> Path:
    return CONFIGS / f"{name}.toml"


def fast(name: str) -> list[str]:
    """Overrides that run a shipped file at SPS samples per symbol after decimation by 2."""
    doc = tomllib.loads(config(name).read_text(encoding="utf-8"))
    rate = 2 * SPS * doc["pipeline"]["symbol_rate"]
    return [f"pipeline.sample_rate={rate!r}", "dec.factor=2"]


def interval(errors: int, bits: int) -> tuple[float, float]:
    """Exact binomial interval (Clopper & Pearson, Biometrika 26(4), 1934) via scipy."""
    ci = binomtest(errors, bits).proportion_ci(confidence_level=CONFIDENCE, method="exact")
    return ci.low, ci.high


# -- theory, written out from the published formulas ------------------------------------------
def noncoherent_2fsk(ebn0_db: float) -> float:
    """Proakis & Salehi, Digital Communications 5th ed. (2008), sec. 4.5, noncoherent binary
    orthogonal FSK: Pb = 1/2 exp(-Eb / 2 N0) (section from memory)."""
    return 0.5 * math.exp(-(10 ** (ebn0_db / 10)) / 2)


def coherent_2fsk(ebn0_db: float) -> float:
    """Proakis & Salehi 5th ed., sec. 4.2, coherent binary orthogonal signals:
    Pb = Q(sqrt(Eb / N0)) (section from memory)."""
    return float(ndtr(-math.sqrt(10 ** (ebn0_db / 10))))


def dbpsk(ebn0_db: float) -> float:
    """Proakis & Salehi 5th ed., sec. 4.5, differentially detected DBPSK:
    Pb = 1/2 exp(-Eb / N0) (section from memory)."""
    return 0.5 * math.exp(-(10 ** (ebn0_db / 10)))


def dqpsk(ebn0_db: float) -> float:
    """Proakis & Salehi 5th ed., sec. 4.5, differentially detected (pi/4-)DQPSK with Gray
    mapping: Pb = Q1(a, b) - 1/2 I0(ab) exp(-(a^2 + b^2) / 2), a = sqrt(2g(1 - 1/sqrt2)),
    b = sqrt(2g(1 + 1/sqrt2)), g = Eb/N0 (section from memory). Marcum's Q1(a, b) is the
    survival function of the noncentral chi-square law with 2 degrees of freedom at b^2,
    noncentrality a^2 (Proakis & Salehi sec. 2.3); I0(ab) exp(-(a^2+b^2)/2) is written with
    the exponentially scaled Bessel function to avoid overflow."""
    g = 10 ** (ebn0_db / 10)
    a = math.sqrt(2 * g * (1 - 1 / math.sqrt(2)))
    b = math.sqrt(2 * g * (1 + 1 / math.sqrt(2)))
    return float(ncx2.sf(b * b, 2, a * a) - 0.5 * i0e(a * b) * math.exp(-((a - b) ** 2) / 2))


def ook(ebn0_db: float) -> float:
    """Envelope-detected OOK with the optimum threshold: Rayleigh envelope when off, Rice
    when on (Proakis & Salehi 5th ed., sec. 2.3; Marcum, IRE Trans. IT-6(2), 1960). Computed
    by ``blocks._theory`` (checked against those formulas in ``tests/blocks/test_theory.py``).
    """
    return float(ber_theory("ook", ebn0_db))


THEORY = {"ook": ook, "2fsk": noncoherent_2fsk, "dbpsk": dbpsk, "dqpsk": dqpsk}


def test_the_written_out_formulas_agree_with_the_theory_module():
    # The test's own closed forms and the project's theory module are the same curves.
    for modulation in ("2fsk", "dbpsk", "dqpsk"):
        for ebn0_db in (4.0, 8.0, 12.0):
            assert THEORY[modulation](ebn0_db) == pytest.approx(
                float(ber_theory(modulation, ebn0_db)), rel=1e-6)


# -- shipped files ----------------------------------------------------------------------------
@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_file_is_valid_and_endless(name):
    pipe = load_pipeline(config(name))
    src = pipe.blocks["src"]
    # the default receives from a radio when one is attached, else from its simulated fallback
    radio = src.kind == "radio"
    if radio:
        assert src.p.fallback == "sim"
        src = src.fallback_source
    assert src.kind == "sim"
    assert src.p.symbols == 0 and src.p.packets == 0            # runs until stopped
    assert pipe.blocks["ber"].kind == "ber"
    # the node's impairments are on: offset > 10 % of the symbol rate, clock error, phase
    assert abs(src.p.cfo_hz) >= 0.1 * src.p.symbol_rate
    assert src.p.clock_ppm != 0 and src.p.random_phase
    assert "orchard" in tomllib.loads(config(name).read_text())["pipeline"]["description"]
    # Eb/N0 can be set from the command line
    key = "src.fallback_params.ebn0_db" if radio else "src.ebn0_db"
    again = load_pipeline(config(name), [f"{key}=4.5"])
    again_src = again.blocks["src"]
    assert (again_src.fallback_source if radio else again_src).p.ebn0_db == 4.5


def test_default_is_the_paced_2fsk_loopback():
    pipe = load_pipeline(config("default"))
    radio = pipe.blocks["src"]
    assert radio.kind == "radio" and radio.p.realtime
    assert radio.fallback_source.p.modulation == "2fsk"
    assert pipe.blocks["det"].kind == "fsk_detect"


def run(pipe, *, bits: int | None = None, min_errors: int | None = None) -> dict:
    """Run a pipeline until the ``ber`` meter has ``bits`` bits or ``min_errors`` errors
    (or the stream ends); return the summary."""
    def enough(status: dict) -> bool:
        meter = status["blocks"]["ber"]
        return ((bits is not None and meter.get("bits", 0) >= bits)
                or (min_errors is not None and meter.get("errors", 0) >= min_errors))

    summary = Runner(pipe).run(until=enough if bits or min_errors else None)
    assert "error" not in summary, summary.get("error")
    return summary


# -- BER against theory -----------------------------------------------------------------------
TARGETS = (1e-2, 1e-3, 1e-4)
CONFIG_OF = {m: f"loopback-{m}" for m in MODULATIONS}


def measure(modulation: str, ebn0_db: float) -> tuple[int, int, dict]:
    name = CONFIG_OF[modulation]
    pipe = load_pipeline(config(name), [*fast(name), f"src.ebn0_db={ebn0_db!r}"])
    summary = run(pipe, bits=1_200_000, min_errors=150)
    meter = summary["blocks"]["ber"]
    assert meter["sync_losses"] == 0
    return meter["errors"], meter["bits"], summary


@pytest.mark.slow
@pytest.mark.parametrize("modulation", ["ook", "dbpsk", "dqpsk"])
def test_ber_is_theory_within_one_db(modulation):
    # Theory: ook, dbpsk and dqpsk as written out above (Proakis & Salehi 5th ed., sec. 2.3
    # and 4.5). Points where theory gives 1e-2, 1e-3 and 1e-4.
    theory = THEORY[modulation]
    for target in TARGETS:
        ebn0_db = round(ebn0_for_ber(modulation, target), 2)
        errors, bits, summary = measure(modulation, ebn0_db)
        low, high = interval(errors, bits)
        where = f"{modulation} at {ebn0_db} dB: {errors}/{bits} = {errors / bits:.3g}"
        assert high >= theory(ebn0_db), f"{where} is better than theory {theory(ebn0_db):.3g}"
        assert low <= theory(ebn0_db - 1.0), \
            f"{where} loses more than 1 dB (theory 1 dB lower {theory(ebn0_db - 1):.3g})"
        # the timing recovery tracked the node's clock error
        assert summary["blocks"]["timing"]["clock_ppm"] == pytest.approx(50, abs=10)


@pytest.mark.slow
def test_2fsk_ber_lies_between_coherent_and_one_db_beyond_noncoherent_theory():
    # Noncoherent binary orthogonal FSK, Pb = 1/2 exp(-Eb/2N0) (Proakis & Salehi 5th ed.,
    # sec. 4.5), is the bound for a detector that sees each symbol on its own. The node's FSK
    # is phase continuous, and the receiver's decimation filter and timing interpolator reach a
    # little into the neighbouring symbols, so it may do slightly better (observing phase
    # continuous FSK over more than one symbol helps noncoherent detection; from memory,
    # Osborne & Luntz, IEEE Trans. Commun. 22(8), 1974). It can never do better than a
    # receiver that knows the carrier phase: coherent orthogonal FSK, Pb = Q(sqrt(Eb/N0))
    # (Proakis & Salehi sec. 4.2; with h = 1 the signal paths merge after one symbol, so a
    # longer observation does not beat that distance, from memory). The simulator itself is
    # pinned to the noncoherent formula by the next test.
    for target in TARGETS:
        ebn0_db = round(ebn0_for_ber("2fsk", target), 2)
        errors, bits, summary = measure("2fsk", ebn0_db)
        low, high = interval(errors, bits)
        where = f"2fsk at {ebn0_db} dB: {errors}/{bits} = {errors / bits:.3g}"
        assert high >= coherent_2fsk(ebn0_db), f"{where} is better than coherent detection"
        assert low <= noncoherent_2fsk(ebn0_db - 1.0), f"{where} loses more than 1 dB"
        assert errors / bits > 0.5 * noncoherent_2fsk(ebn0_db), f"{where}: implausibly good"
        assert summary["blocks"]["timing"]["clock_ppm"] == pytest.approx(50, abs=10)


def test_simulated_2fsk_with_a_one_symbol_correlator_is_noncoherent_theory():
    # The simulator's Eb/N0 bookkeeping, checked with the textbook receiver: at an integer
    # 5 samples per symbol, correlate each symbol's samples with the two tones and pick the
    # larger magnitude. Proakis & Salehi 5th ed., sec. 4.5: Pb = 1/2 exp(-Eb/2N0).
    symbols, sps, rs, ebn0_db = 200_000, 5, 9_600.0, 9.0
    doc = {"pipeline": {"sample_rate": sps * rs, "symbol_rate": rs, "links": ["src -> end"]},
           "blocks": {"src": {"kind": "sim", "modulation": "2fsk", "deviation_hz": rs / 2,
                              "ebn0_db": ebn0_db, "symbols": symbols, "seed": 5},
                      "end": {"kind": "discard"}}}
    src = pipeline_from_dict(doc).blocks["src"]
    pieces = []
    more = True
    while more:
        more = src.produce()
        pieces += [chunk.samples for _, chunk in src.take_output()]
    x = np.concatenate(pieces)[:symbols * sps].reshape(symbols, sps)
    n = np.arange(sps)
    upper = np.abs(x @ np.exp(-1j * np.pi * n / sps))       # +rs/2 tone: bit 1
    lower = np.abs(x @ np.exp(1j * np.pi * n / sps))
    sent, _ = prbs_sequence("prbs15", symbols)
    errors = int(np.count_nonzero((upper > lower).astype(np.uint8) != sent))
    low, high = interval(errors, symbols)
    assert low <= noncoherent_2fsk(ebn0_db) <= high


# -- phase independence -----------------------------------------------------------------------
@pytest.mark.parametrize("modulation", MODULATIONS)
def test_decisions_do_not_depend_on_the_carrier_phase(modulation, tmp_path):
    # A noncoherent receiver (energy, tone magnitudes, products of consecutive symbols) is
    # blind to a constant carrier phase (common practice). The same noisy signal, turned by
    # three different start phases by a channel block after the node, must give the same
    # decisions bit for bit (up to float rounding of values right at a decision boundary).
    name = CONFIG_OF[modulation]
    doc = tomllib.loads(config(name).read_text(encoding="utf-8"))
    ebn0_db = round(ebn0_for_ber(modulation, 1e-2), 1)
    doc["blocks"]["src"].update(random_phase=False, symbols=24_000, ebn0_db=ebn0_db)
    doc["blocks"]["turn"] = {"kind": "channel", "random_phase": True}
    doc["blocks"]["soft"] = {"kind": "record", "format": "raw"}
    doc["pipeline"]["links"] = [doc["pipeline"]["links"][0].replace("src -> dec",
                                                                    "src -> turn -> dec"),
                                *doc["pipeline"]["links"][1:], "det.soft -> soft"]
    decisions, phases, errors = [], [], []
    for seed in (3, 4, 5):
        out = tmp_path / f"soft-{seed}.f32"
        pipe = pipeline_from_dict(doc, [*fast(name), f"turn.seed={seed}",
                                        f"soft.path={str(out)!r}"])
        summary = run(pipe)
        phases.append(summary["blocks"]["turn"]["start_phase_rad"])
        errors.append(summary["blocks"]["ber"]["errors"])
        decisions.append(np.fromfile(out, dtype="<f4") > 0)
    assert min(abs(np.angle(np.exp(1j * (a - b))))
               for i, a in enumerate(phases) for b in phases[:i]) > 0.3
    assert errors[0] > 20                      # noisy enough for boundary cases to exist
    reference = decisions[0]
    assert reference.shape[0] >= 20_000
    for other in decisions[1:]:
        assert other.shape == reference.shape
        assert np.count_nonzero(other != reference) <= 3


# -- packets ----------------------------------------------------------------------------------
def sent_payloads(count: int, payload_bytes: int = 16) -> list[str]:
    """Payloads the simulator sends: consecutive pieces of one ITU-T O.150 PRBS9 stream."""
    bits, _ = prbs_sequence("prbs9", count * payload_bytes * 8)
    return [np.packbits(bits[i * payload_bytes * 8:(i + 1) * payload_bytes * 8]).tobytes().hex()
            for i in range(count)]


def run_packets(tmp_path: Path, ebn0_db: float, packets: int) -> tuple[list[dict], dict]:
    log = tmp_path / "packets.jsonl"
    pipe = load_pipeline(config("packets-2fsk"),
                         [*fast("packets-2fsk"), f"src.ebn0_db={ebn0_db!r}",
                          f"src.packets={packets}", f"log.path={str(log)!r}"])
    summary = run(pipe)
    records = [json.loads(line) for line in log.read_text().splitlines()]
    return records, summary


def test_every_packet_arrives_with_a_good_crc_on_a_strong_link(tmp_path):
    # At 14 dB noncoherent 2-FSK theory gives Pb = 1.8e-6 (Proakis & Salehi 5th ed., sec. 4.5,
    # 1/2 exp(-Eb/2N0)): 120 packets of 152 CRC-covered bits expect 0.03 bit errors in all.
    # (At 12 dB, Pb = 1.8e-4, about one packet in 40 fails its CRC: not a clean link.)
    count = 120
    records, summary = run_packets(tmp_path, 14.0, count)
    framer = summary["blocks"]["framer"]
    assert framer["packets"] == count and framer["crc_failures"] == 0
    assert [r["payload_hex"] for r in records] == sent_payloads(count)
    assert all(r["crc_ok"] and r["length"] == 16 for r in records)
    assert summary["blocks"]["ber"]["errors"] == 0
    # every payload bit is counted but those of the first packet spent acquiring the pattern
    assert (count - 1) * 16 * 8 <= summary["blocks"]["ber"]["bits"] <= count * 16 * 8


@pytest.mark.parametrize(("ebn0_db", "least_good"), [(5.0, 0), (8.5, 10)])
def test_a_weak_link_reports_crc_failures_and_never_passes_a_bad_packet(tmp_path, ebn0_db,
                                                                         least_good):
    # At 5 dB Pb = 0.10, at 8.5 dB Pb = 7e-3 (same formula): at 5 dB nearly every packet
    # found is damaged, at 8.5 dB about half of them. Each packet's payload is compared with
    # the one sent in its slot (a gap and a packet take 312 bit periods; the sync word starts
    # 96 + 32 bits into the slot).
    count, slot, sync_at = 150, 312, 128
    records, summary = run_packets(tmp_path, ebn0_db, count)
    sent = sent_payloads(count)
    good = [r for r in records if r["crc_ok"]]
    bad = [r for r in records if not r["crc_ok"]]
    assert summary["blocks"]["framer"]["crc_failures"] == len(bad) >= 10
    assert len(good) >= least_good
    for r in good:                                      # a good CRC is the packet that was sent
        assert r["payload_hex"] == sent[round((r["start"] - sync_at) / slot)]
    assert sum(r["payload_hex"] not in sent for r in bad) >= len(bad) // 2   # truly damaged


# -- the sweep command ------------------------------------------------------------------------
def sweep_main(capsys, *argv: str) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser(prog="phasefree sweep")
    sweep.add_arguments(parser)
    code = sweep.main(parser.parse_args(list(argv)))
    out, err = capsys.readouterr()
    return code, out, err


def sweep_args(*extra: str) -> list[str]:
    sets = [item for o in fast("loopback-dbpsk") for item in ("--set", o)]
    return [str(config("loopback-dbpsk")), "--ebn0", "5:8:3", "--bits", "30000",
            "--min-errors", "1000000", "--target-ber", "3e-3", *sets, *extra]


def test_sweep_writes_table_csv_and_plot(capsys, tmp_path):
    table_csv, png = tmp_path / "sweep.csv", tmp_path / "sweep.png"
    code, out, _ = sweep_main(capsys, *sweep_args("--csv", str(table_csv), "--plot", str(png)))
    assert code == 0
    lines = out.splitlines()
    assert lines[1].split() == list(sweep.COLUMNS)
    with table_csv.open(newline="") as f:
        rows = list(csv.DictReader(f))
    assert [float(r["ebn0_db"]) for r in rows] == [5.0, 8.0]
    for row, line in zip(rows, lines[2:4], strict=True):
        bits, errors = int(row["bits"]), int(row["errors"])
        assert bits >= 30_000 and 0 < errors < bits
        assert float(row["ber"]) == pytest.approx(errors / bits)
        assert (float(row["ber_low"]), float(row["ber_high"])) == pytest.approx(
            interval_95(errors, bits), rel=1e-6)
        assert float(row["theory_ber"]) == pytest.approx(dbpsk(float(row["ebn0_db"])))
        assert line.split()[:3] == [f"{float(row['ebn0_db']):.2f}", str(bits), str(errors)]
    assert "implementation loss at BER 0.003" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def interval_95(errors: int, bits: int) -> tuple[float, float]:
    ci = binomtest(errors, bits).proportion_ci(confidence_level=0.95, method="exact")
    return ci.low, ci.high


def test_sweep_json_gives_points_and_implementation_loss(capsys):
    code, out, _ = sweep_main(capsys, *sweep_args("--json"))
    assert code == 0
    result = json.loads(out)
    points = result["points"]
    assert [p["ebn0_db"] for p in points] == [5.0, 8.0]
    assert all(set(p) == set(sweep.COLUMNS) for p in points)
    # the loss by hand: where log10 BER, straight between the two points, meets 3e-3,
    # minus the Eb/N0 DBPSK needs for 3e-3 (1/2 exp(-g) = 3e-3: g = ln(1 / 6e-3))
    (e0, b0), (e1, b1) = ((p["ebn0_db"], p["ber"]) for p in points)
    crossing = e0 + (math.log10(3e-3) - math.log10(b0)) * (e1 - e0) / (
        math.log10(b1) - math.log10(b0))
    needed = 10 * math.log10(math.log(1 / 6e-3))
    assert result["implementation_loss_db"] == pytest.approx(crossing - needed, abs=1e-6)
    assert -0.5 < result["implementation_loss_db"] < 1.0


def test_implementation_loss_of_a_curve_one_db_behind_theory():
    # Points on the DBPSK curve (1/2 exp(-Eb/N0)) moved 1 dB to the right read as 1 dB loss;
    # straight-line interpolation of log10 BER over 1 dB steps costs well under 0.05 dB.
    points = [{"ebn0_db": e + 1.0, "ber": dbpsk(e)} for e in np.arange(4.0, 11.0, 1.0)]
    for target in (1e-2, 1e-3, 1e-4):
        assert sweep.implementation_loss_db(points, "dbpsk", target) == pytest.approx(
            1.0, abs=0.05)
    assert sweep.implementation_loss_db(points, "dbpsk", 1e-9) is None    # not bracketed


@pytest.mark.parametrize("text", ["4:12", "a:b:c", "4:12:0", "12:4:1", "4:1e9:0.001",
                                  "nan:4:1"])
def test_sweep_rejects_a_bad_ebn0_range(text, capsys):
    with pytest.raises(argparse.ArgumentTypeError):
        sweep.ebn0_points(text)
    parser = argparse.ArgumentParser(prog="phasefree sweep")
    sweep.add_arguments(parser)
    with pytest.raises(SystemExit) as stop:
        parser.parse_args(["x.toml", "--ebn0", text, "--bits", "10"])
    assert stop.value.code == 2
    assert "--ebn0" in capsys.readouterr().err


def test_ebn0_range_includes_its_end():
    assert sweep.ebn0_points("4:6:0.5") == [4.0, 4.5, 5.0, 5.5, 6.0]
    assert sweep.ebn0_points("9:7:-1") == [9.0, 8.0, 7.0]


def test_sweep_reports_pipeline_problems_with_status_2(capsys, tmp_path):
    code, _, err = sweep_main(capsys, str(tmp_path / "missing.toml"), "--ebn0", "4:5:1",
                              "--bits", "10")
    assert code == 2 and "no such pipeline file" in err
    no_meter = tmp_path / "no-meter.toml"
    text = config("loopback-dbpsk").read_text()
    no_meter.write_text(text.replace("-> ber", "-> meter").replace("[blocks.ber]",
                                                                   "[blocks.meter]"))
    code, _, err = sweep_main(capsys, str(no_meter), "--ebn0", "4:5:1", "--bits", "10")
    assert code == 2 and "blocks.ber" in err and "kind 'ber'" in err
    code, _, err = sweep_main(capsys, str(config("loopback-dbpsk")), "--ebn0=-80:5:5",
                              "--bits", "10")
    assert code == 2 and "blocks.src.ebn0_db" in err
