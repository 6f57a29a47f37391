"""Tests of the packet format and the sync-word search (blocks/_packets.py).

Payloads are orchard frost reports, e.g. b"node 17 -1.5C".
"""

from __future__ import annotations

import binascii
import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from blocks._packets import (
    DEFAULT_SYNC_WORD,
    find_packets,
    packet_bits,
    sync_distances,
    sync_word_bits,
)

REPORT = b"node 17 -1.5C"


def test_layout_and_crc() -> None:
    bits = packet_bits(REPORT, preamble_bits=8)
    assert bits.dtype == np.uint8
    assert list(bits[:8]) == [1, 0, 1, 0, 1, 0, 1, 0]
    assert int("".join(map(str, bits[8:40])), 2) == DEFAULT_SYNC_WORD
    body = np.packbits(bits[40:]).tobytes()
    assert body[0] == len(REPORT) and body[1:-2] == REPORT
    # Reference: Python's binascii.crc_hqx is CRC-CCITT (poly 0x1021, MSB first); with initial
    # value 0xFFFF it is CRC-16/CCITT-FALSE.
    assert int.from_bytes(body[-2:], "big") == binascii.crc_hqx(body[:-2], 0xFFFF)


def test_default_sync_word_has_peak_sidelobe_three() -> None:
    # Aperiodic autocorrelation in +/-1 form computed directly (common practice); 3 is the
    # lowest peak sidelobe for length 32 (Leukhin & Potekhin 2013; from memory).
    s = 2 * sync_word_bits().astype(int) - 1
    side = [abs(int(np.dot(s[k:], s[:-k]))) for k in range(1, 32)]
    assert max(side) == 3
    # No window straddling an alternating preamble and the word is within 14 bits of it.
    stream = np.concatenate([packet_bits(b"", 32)[:64]])
    dist = [int(np.sum(stream[i:i + 32] != stream[32:64])) for i in range(32)]
    assert min(dist) >= 14


def test_sync_distances_match_naive_loop() -> None:
    rng = np.random.default_rng(1)
    bits = rng.integers(0, 2, 200).astype(np.uint8)
    ref = sync_word_bits()
    naive = [int(np.sum(bits[i:i + 32] != ref)) for i in range(len(bits) - 31)]
    np.testing.assert_array_equal(sync_distances(bits), naive)
    assert sync_distances(bits[:31]).size == 0


def run(stream: np.ndarray, cuts: list[int], max_bit_errors: int = 0) -> list:
    edges = [0, *sorted({c for c in cuts if 0 < c < len(stream)}), len(stream)]
    found, state = [], None
    for a, b in itertools.pairwise(edges):
        got, state = find_packets(stream[a:b], a, max_bit_errors, state=state)
        found += got
    got, _ = find_packets(np.zeros(0, np.uint8), len(stream), max_bit_errors, state=state,
                          final=True)
    return found + got


@pytest.mark.parametrize("offset", range(0, 70))
def test_found_at_every_offset(offset: int) -> None:
    rng = np.random.default_rng(offset)
    pkt = packet_bits(REPORT)
    stream = np.concatenate([rng.integers(0, 2, offset), pkt, rng.integers(0, 2, 9)])
    found = run(stream.astype(np.uint8), [])
    assert [(p.start, p.payload, p.crc_ok) for p in found] == [(offset + 32, REPORT, True)]


@settings(max_examples=60, deadline=None)
@given(cuts=st.lists(st.integers(1, 900), max_size=10))
def test_packets_split_across_pieces(cuts: list[int]) -> None:
    rng = np.random.default_rng(7)
    parts = [rng.integers(0, 2, 37), packet_bits(REPORT), rng.integers(0, 2, 5),
             packet_bits(bytes(range(40)), 16), packet_bits(b""), rng.integers(0, 2, 3)]
    stream = np.concatenate(parts).astype(np.uint8)
    whole = run(stream, [])
    assert [p.payload for p in whole] == [REPORT, bytes(range(40)), b""]
    assert run(stream, cuts) == whole


@pytest.mark.parametrize("max_bit_errors", [0, 2, 4])
@pytest.mark.parametrize("k", range(0, 7))
def test_sync_errors_accepted_iff_within_limit(max_bit_errors: int, k: int) -> None:
    bits = packet_bits(REPORT, preamble_bits=0)
    flip = np.random.default_rng(k).choice(32, k, replace=False)
    bits[flip] ^= 1
    stream = np.concatenate([np.zeros(3, np.uint8), bits])
    found = run(stream, [], max_bit_errors)
    if k <= max_bit_errors:
        assert [(p.sync_errors, p.crc_ok) for p in found] == [(k, True)]
    else:
        assert found == []


def test_corrupted_payload_is_flagged() -> None:
    bits = packet_bits(REPORT)
    bits[32 + 32 + 8 + 5] ^= 1
    (p,) = run(bits, [])
    assert not p.crc_ok and p.crc_received != p.crc_computed and p.payload != REPORT


def test_gap_drops_the_packet_in_flight() -> None:
    pkt = packet_bits(REPORT)
    first, second = pkt[:100], pkt[100:]
    got, state = find_packets(first, 0)
    assert got == [] and state.in_flight
    # The rest arrives after a jump of the stream index: the packet is lost, a later one found.
    got, state = find_packets(np.concatenate([second, packet_bits(b"ok")]), 500, state=state)
    assert [p.payload for p in got] == [b"ok"] and got[0].start >= 500


def test_bad_arguments_are_named() -> None:
    with pytest.raises(ValueError, match="payload"):
        packet_bits(bytes(256))
    with pytest.raises(ValueError, match="max_bit_errors"):
        find_packets(np.zeros(40, np.uint8), max_bit_errors=32)
    with pytest.raises(ValueError, match="sync_word"):
        sync_word_bits(1 << 32)
