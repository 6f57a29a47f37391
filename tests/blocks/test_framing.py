"""Block-level tests of the framer and the packet log sink (blocks/framing.py).

Scenario: frost reports from orchard sensor nodes arrive as detected bits at 2400 bit/s.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings

import blocks.framing  # noqa: F401  (registers the kinds)
from blocks._packets import packet_bits
from stream.block import StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

RATE = 2400.0
REPORTS = [b"node 3 +0.4C", b"node 9 -2.1C frost", b"", bytes(range(64))]
RNG = np.random.default_rng(5)


def bit_stream(corrupt: int | None = None) -> np.ndarray:
    parts = [RNG.integers(0, 2, 41).astype(np.uint8)]
    for i, r in enumerate(REPORTS):
        pkt = packet_bits(r)
        if i == corrupt:
            pkt[-3] ^= 1                      # a CRC bit: the packet must be flagged
        parts += [pkt, RNG.integers(0, 2, 13).astype(np.uint8)]
    return np.concatenate(parts)


STREAM = bit_stream()


def test_payload_port_and_annotations() -> None:
    out, notes = run_block(make_block("framer"), [STREAM], RATE)
    payload = out["payload"]
    assert payload.tobytes() == np.unpackbits(
        np.frombuffer(b"".join(REPORTS), np.uint8)).tobytes()
    marks = notes["payload"]
    assert [n.label for n in marks] == ["packet"] * 4
    assert [n.data["payload_bits"] for n in marks] == [8 * len(r) for r in REPORTS]
    assert [n.index for n in marks] == list(np.cumsum([0] + [8 * len(r) for r in REPORTS])[:-1])
    assert all(n.data["crc_ok"] for n in marks)
    assert marks[1].data["payload_hex"] == REPORTS[1].hex()


def test_crc_failure_is_reported_never_good() -> None:
    blk = make_block("framer")
    _, notes = run_block(blk, [bit_stream(corrupt=1)], RATE)
    oks = [n.data["crc_ok"] for n in notes["payload"]]
    assert oks == [True, False, True, True]
    assert blk.readings()["crc_failures"] == 1 and blk.readings()["packets"] == 4


@settings(max_examples=40, deadline=None)
@given(cuts=chunk_cuts(len(STREAM)))
def test_chunk_size_invariance(cuts: list[int]) -> None:
    assert_chunk_invariant(lambda: make_block("framer", max_bit_errors=3), STREAM, RATE, cuts)


def test_gap_annotation_drops_packet_in_flight() -> None:
    start_second = 41 + len(packet_bits(REPORTS[0])) + 13
    cut = start_second + 80
    blk = make_block("framer")
    _, notes = run_block(blk, [STREAM], RATE, annotations=[Annotation(cut, "gap")])
    payloads = [bytes.fromhex(n.data["payload_hex"]) for n in notes["payload"]]
    assert payloads == [REPORTS[0], REPORTS[2], REPORTS[3]]
    assert blk.readings()["packets_dropped"] == 1


def test_start_jump_drops_packet_in_flight() -> None:
    blk = make_block("framer")
    blk.configure({"in": StreamSpec("uint8", RATE)})
    pkt = packet_bits(REPORTS[1])
    blk.deliver(Chunk(pkt[:90], 0, RATE))
    blk.deliver(Chunk(np.concatenate([pkt[90:], packet_bits(b"ok")]), 1000, RATE))
    blk.finish()
    notes = [a for _, c in blk.take_output() for a in c.annotations]
    assert [a.data["payload_hex"] for a in notes] == [b"ok".hex()]


def test_packet_log_writes_json_lines(tmp_path) -> None:
    framer = make_block("framer")
    out, notes = run_block(framer, [bit_stream(corrupt=0)], RATE)
    log = make_block("packets", path=str(tmp_path / "frost.jsonl"))
    marked = notes["payload"]
    run_block(log, [out["payload"]], RATE, annotations=marked)
    lines = (tmp_path / "frost.jsonl").read_text().splitlines()
    records = [json.loads(line) for line in lines]   # every line parses as JSON
    assert [r["packet"] for r in records] == [1, 2, 3, 4]
    assert [r["crc_ok"] for r in records] == [False, True, True, True]
    assert [r["length"] for r in records] == [len(r) for r in REPORTS]
    assert records[1]["payload_hex"] == REPORTS[1].hex()
    assert records[1]["sync_errors"] == 0 and records[1]["start"] == marked[1].data["start"]
    assert log.readings()["packets_written"] == 4


def test_packet_log_to_stdout(capsys) -> None:
    out, notes = run_block(make_block("framer"), [STREAM], RATE)
    run_block(make_block("packets", path="-"), [out["payload"]], RATE,
              annotations=notes["payload"])
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 4 and json.loads(lines[0])["payload_hex"] == REPORTS[0].hex()


def test_packet_log_needs_an_existing_folder(tmp_path) -> None:
    log = make_block("packets", path=str(tmp_path / "missing" / "x.jsonl"))
    with pytest.raises(ParamError, match="path"):
        log.configure({"in": StreamSpec("uint8", RATE)})
