"""Round trips through recordings: a receiver run recorded to SigMF and played back.

Recordings made here are checked with the reference ``sigmf`` library from the package registry
(sigmf-python: ``sigmf.sigmffile.fromfile(...).validate()`` checks a recording against the
SigMF specification's JSON schema), and a recording with a gap is written by that library
alone. The receive chains are the shipped 2-FSK files, run finite and at the lowered sample
rate of ``tests/test_receivers.py`` (5.3 samples per symbol after decimation by 2).
"""

from __future__ import annotations

import json
import tomllib
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import sigmf
from sigmf import SigMFFile

from stream.block import StreamSpec
from stream.chunk import Annotation, Chunk
from stream.loader import pipeline_from_dict
from stream.runner import Runner
from tests.chunking import make_block
from tests.test_receivers import config, fast

#: Input samples per symbol of the lowered rate, and the rate itself.
SPS = 2 * 5.3
RATE = SPS * 9_600
#: How far, in symbols, an event may sit from its samples: the receive chain's latency
#: (decimation filter, timing interpolator) is a few symbols (common practice).
LATENCY_SYMBOLS = 3
#: Preamble bits before the sync word (``configs/packets-2fsk.toml``).
PREAMBLE_BITS = 32


def chain(name: str, **src: Any) -> dict[str, Any]:
    """A shipped file as a dict, its observers left out and its simulated node made finite."""
    doc = tomllib.loads(config(name).read_text(encoding="utf-8"))
    doc["pipeline"]["links"] = [link for link in doc["pipeline"]["links"] if "~>" not in link]
    for observer in ("spectrum", "eye", "snr"):
        doc["blocks"].pop(observer, None)
    doc["blocks"]["src"].update(realtime=False, **src)
    return doc


def with_blocks(doc: dict[str, Any], links: list[str], **blocks: dict) -> dict[str, Any]:
    """A copy of ``doc`` with more blocks and links (a block given again replaces the old)."""
    out = {"pipeline": dict(doc["pipeline"]), "blocks": {**doc["blocks"], **blocks}}
    out["pipeline"]["links"] = [*doc["pipeline"]["links"], *links]
    return out


def replayed(doc: dict[str, Any], path: Path, **params: Any) -> dict[str, Any]:
    """The same receiver with its simulated node replaced by a recording."""
    return with_blocks(doc, [], src={"kind": "recording", "path": str(path), **params})


def run(doc: dict[str, Any], name: str) -> dict[str, Any]:
    overrides = fast(name) if doc["blocks"]["src"]["kind"] == "sim" else ["dec.factor=2"]
    summary = Runner(pipeline_from_dict(doc, overrides)).run()
    assert "error" not in summary, summary.get("error")
    return summary["blocks"]


def validated(meta: Path) -> SigMFFile:
    """Open a recording with the ``sigmf`` library and validate it against the schema."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")            # sigmf warns about undeclared extensions
        handle = sigmf.sigmffile.fromfile(str(meta))
        handle.validate()
    return handle


def lines(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def detected(annotations: list[dict]) -> list[dict]:
    """The framer's packets among annotations (the simulator's own "packet" notes, which mark
    each packet as sent, carry no CRC verdict)."""
    return [a for a in annotations
            if a["core:label"] == "packet" and "crc_ok" in a.get("phasefree:data", {})]


# -- packet mode: record, validate, replay ----------------------------------------------------
PACKETS = 30


@pytest.fixture(scope="module")
def packet_run(tmp_path_factory):
    """A live packet-mode run that records the node's IQ and the framer's packets."""
    folder = tmp_path_factory.mktemp("packets")
    doc = chain("packets-2fsk", packets=PACKETS, ebn0_db=14.0)
    live = with_blocks(doc, ["src -> rec", "framer.payload -> rec.events"],
                       rec={"kind": "record", "path": str(folder / "orchard")},
                       log={"kind": "packets", "path": str(folder / "live.jsonl")})
    readings = run(live, "packets-2fsk")
    return doc, folder, readings, lines(folder / "live.jsonl")


def test_packet_run_recording_validates_and_holds_the_detected_packets(packet_run):
    # SigMF specification (Annotations object): core:sample_start and core:sample_count,
    # annotations sorted by sample_start; checked by the sigmf library's schema validator.
    _, folder, readings, log = packet_run
    handle = validated(folder / "orchard.sigmf-meta")
    assert handle.get_global_info()[sigmf.SAMPLE_RATE_KEY] == pytest.approx(RATE)
    notes = handle.get_annotations()
    starts = [a["core:sample_start"] for a in notes]
    assert starts == sorted(starts)
    found = detected(notes)
    assert readings["framer"]["packets"] == PACKETS == len(found) == len(log)
    # At 14 dB noncoherent 2-FSK gives Pb = 1/2 exp(-Eb/2N0) = 1.8e-6 (Proakis & Salehi,
    # Digital Communications 5th ed., sec. 4.5): 30 packets arrive whole.
    assert [a["phasefree:data"]["crc_ok"] for a in found] == [True] * PACKETS
    assert [a["phasefree:data"]["payload_hex"] for a in found] == [r["payload_hex"] for r in log]
    # each spans sync word, length byte, 16-byte payload and CRC-16: 184 bits of samples
    for a in found:
        assert a["core:sample_count"] == round(184 * SPS)
        assert a["core:sample_start"] + a["core:sample_count"] <= readings["rec"][
            "samples_written"]
    # placed by time, within the chain's latency of where the node sent the sync word
    sent = [a for a in notes if a["core:label"] == "packet" and a not in found]
    assert len(sent) == PACKETS
    for tx, rx in zip(sent, found, strict=True):
        sync_at = tx["core:sample_start"] + PREAMBLE_BITS * SPS
        assert abs(rx["core:sample_start"] - sync_at) <= LATENCY_SYMBOLS * SPS


def test_replayed_recording_gives_the_same_packets_and_annotations(packet_run, tmp_path):
    doc, folder, _, live_log = packet_run
    meta = folder / "orchard.sigmf-meta"
    again = with_blocks(replayed(doc, meta), ["src -> rec", "framer.payload -> rec.events"],
                        rec={"kind": "record", "path": str(tmp_path / "again")},
                        log={"kind": "packets", "path": str(tmp_path / "replay.jsonl")})
    readings = run(again, "packets-2fsk")
    replay_log = lines(tmp_path / "replay.jsonl")
    assert readings["framer"]["packets"] == len(live_log) == PACKETS
    assert [(r["payload_hex"], r["crc_ok"]) for r in replay_log] == [
        (r["payload_hex"], r["crc_ok"]) for r in live_log]
    # the replayed packets line up with the recorded ones (common practice: an event's sample
    # is its time times the sample rate; the SigMF specification indexes annotations by sample)
    recorded = detected(validated(meta).get_annotations())
    for packet, note in zip(replay_log, recorded, strict=True):
        assert abs(packet["time_s"] - note["core:sample_start"] / RATE) <= (
            LATENCY_SYMBOLS / 9_600)
    # The replay's own recording: the file's annotations passed downstream by the recording
    # source, plus the packets found again, each where the first run put it.
    def key(a: dict) -> str:
        return json.dumps([a["core:sample_start"], a["core:label"], a.get("phasefree:data")],
                          sort_keys=True)

    original = validated(meta).get_annotations()
    second = validated(tmp_path / "again.sigmf-meta").get_annotations()
    assert sorted(map(key, second)) == sorted(map(key, original + detected(original)))
    assert sorted(map(key, detected(second)))[::2] == sorted(map(key, detected(original)))


# -- 8-bit datatypes: bare files and SigMF agree ----------------------------------------------
@pytest.mark.parametrize("datatype", ["cu8", "ci8"])
def test_8_bit_recordings_give_the_same_samples_and_ber_bare_and_sigmf(datatype, tmp_path):
    doc = chain("loopback-2fsk", symbols=12_000)
    base, bare = tmp_path / "node", tmp_path / f"node.{datatype}"
    # 12 dB down so that the node's unit envelope plus noise fits the 8-bit range
    live = with_blocks(doc, ["src -> att", "att -> rec", "att -> raw"],
                       att={"kind": "gain", "gain_db": -12.0},
                       rec={"kind": "record", "path": str(base), "datatype": datatype},
                       raw={"kind": "record", "path": str(bare), "datatype": datatype,
                            "format": "raw"})
    recorded = run(live, "loopback-2fsk")
    assert recorded["rec"]["clipped"] < 10
    validated(tmp_path / "node.sigmf-meta")
    # same bytes, and the documented integer rule: cu8 (v - 127.5) / 127.5, ci8 v / 128
    # (SigMF specification, Dataset format: ci8 signed, cu8 unsigned 8-bit I/Q pairs)
    stored = bare.read_bytes()
    assert (tmp_path / "node.sigmf-data").read_bytes() == stored
    raw = np.frombuffer(stored, np.uint8 if datatype == "cu8" else np.int8).astype(np.float64)
    expected = (raw - 127.5) / 127.5 if datatype == "cu8" else raw / 128
    expected = expected[0::2] + 1j * expected[1::2]
    meters = {}
    for label, path, params in (("sigmf", tmp_path / "node.sigmf-meta", {}),
                                ("bare", bare, {"datatype": datatype, "sample_rate": RATE})):
        samples = tmp_path / f"{label}.cf32"
        played = with_blocks(replayed(doc, path, **params), ["src -> out"],
                             out={"kind": "record", "path": str(samples), "format": "raw"})
        meters[label] = run(played, "loopback-2fsk")["ber"]
        assert np.array_equal(np.fromfile(samples, np.complex64),
                              expected.astype(np.complex64)), label
    figures = ("bits", "errors", "gaps", "sync_losses")
    assert {k: meters["sigmf"][k] for k in figures} == {k: meters["bare"][k] for k in figures}
    assert meters["sigmf"]["bits"] >= 11_800 and meters["sigmf"]["sync_losses"] == 0


# -- a gap capture resets sync on replay ------------------------------------------------------
def write_with_sigmf(data: np.ndarray, meta: Path, captures: list[tuple[int, int]]) -> None:
    """A cf32_le recording written by the ``sigmf`` library alone: (sample_start,
    global_index) per capture."""
    data_file = meta.with_suffix(".sigmf-data")
    data.astype(np.complex64).tofile(data_file)
    handle = SigMFFile(data_file=str(data_file),
                       global_info={sigmf.DATATYPE_KEY: "cf32_le", sigmf.SAMPLE_RATE_KEY: RATE})
    for start, index in captures:
        handle.add_capture(start, metadata={sigmf.GLOBAL_INDEX_KEY: index})
    handle.tofile(str(meta), overwrite=True)


def test_a_gap_capture_resets_sync_there_on_replay(tmp_path):
    doc = chain("loopback-2fsk", symbols=16_000)
    whole = tmp_path / "whole.cf32"
    reference = run(with_blocks(doc, ["src -> rec"], rec={"kind": "record", "path": str(whole),
                                                          "format": "raw"}),
                    "loopback-2fsk")["ber"]
    x = np.fromfile(whole, np.complex64)
    # about 280 symbols go missing (an outage of the radio): the PRBS jumps there
    cut, missing = 80_000, 3_000
    kept = np.concatenate([x[:cut], x[cut + missing:]])
    meters = {}
    for label, captures in (("gap", [(0, 0), (cut, cut + missing)]), ("hidden", [(0, 0)])):
        meta = tmp_path / f"{label}.sigmf-meta"
        write_with_sigmf(kept, meta, captures)
        meters[label] = run(replayed(doc, meta), "loopback-2fsk")["ber"]
    gap, hidden = meters["gap"], meters["hidden"]
    # SigMF specification (Captures object): core:global_index gives the sample's index in the
    # whole capture, so a jump marks samples missing. The replay restarts the chain there: the
    # meter counts the gap, keeps sync, and counts no errors from it.
    assert gap["gaps"] == 1 and gap["sync_losses"] == 0
    assert gap["errors"] <= reference["errors"] + 3
    assert gap["bits"] >= reference["bits"] - missing / SPS - 200
    # the same samples with the jump hidden: the meter finds out only by losing sync
    assert hidden["gaps"] == 0 and hidden["sync_losses"] >= 1


def test_events_after_an_input_gap_are_placed_by_time_through_the_captures(tmp_path):
    # SigMF specification (Captures object): dataset sample = capture's core:sample_start +
    # (stream index - its core:global_index). 1000 samples, a jump of 500, 1000 more; a
    # "sync-lost" at bit 150 of a 1 kb/s events stream (0.15 s) and a packet at 1.6 s.
    rate, bits = 1_000.0, 1_000.0
    rec = make_block("record", path=str(tmp_path / "jump"))
    rec.configure({"in": StreamSpec("complex64", rate), "events": StreamSpec("uint8", bits)})
    block = np.zeros(1000, np.complex64)
    rec.deliver(Chunk(block, 0, rate, port="in"))
    rec.deliver(Chunk(block, 1500, rate, port="in"))
    packet = {"start": 1600, "time_s": 1.6, "payload_start": 1640, "payload_bits": 8,
              "crc_ok": True}
    rec.deliver(Chunk(np.zeros(8, np.uint8), 0, bits, port="events",
                      annotations=(Annotation(150, "sync-lost", {"reason": "test"}),
                                   Annotation(0, "packet", packet))))
    rec.finish()
    handle = validated(tmp_path / "jump.sigmf-meta")
    notes = {a["core:label"]: a for a in handle.get_annotations()}
    assert notes["sync-lost"]["core:sample_start"] == 150
    assert notes["sync-lost"]["phasefree:data"] == {"reason": "test"}
    assert notes["packet"]["core:sample_start"] == 1000 + (1600 - 1500)
    assert notes["packet"]["core:sample_count"] == 40 + 8 + 16
