"""The PRBS bit error tester: exact counts, acquisition, loss of sync, packets, chunking.

The reference for every count is the test itself: the transmitted bits are the ITU-T O.150
sequence from ``blocks._prbs`` (checked against a shift register in test_prbs.py), and errors,
slips, bursts and gaps are injected at known places, so the counts the tester must report are
known exactly. Acquisition costs ``degree + acquire_bits`` uncounted bits (the design rule in
``blocks/_bert.py``).
"""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from blocks._bert import BertConfig, bert_finish, bert_update, clopper_pearson
from blocks._prbs import PRBS_NAMES, PRBS_POLYNOMIALS, prbs_sequence
from blocks.meters import BitErrorMeter
from stream.chunk import Annotation
from stream.errors import ParamError
from tests.chunking import make_block, run_block, split

RATE = 9600.0


def pattern(name: str, count: int, offset: int = 0) -> np.ndarray:
    bits, _ = prbs_sequence(name, offset + count)
    return bits[offset:].copy()


def run_kernel(bits, config, cuts=(), packets=(), gaps=()):
    """Feed ``bits`` cut at ``cuts`` (chunk starts continuous), then finish."""
    state = None
    edges = [0, *sorted({c for c in cuts if 0 < c < len(bits)}), len(bits)]
    for a, b in itertools.pairwise(edges):
        state = bert_update(bits[a:b], a, config, state,
                            packets=[(i, n) for i, n in packets if a <= i < b],
                            gaps=[g for g in gaps if a <= g < b])
    return bert_finish(config, state)


def acquisition(name: str, config: BertConfig) -> int:
    return PRBS_POLYNOMIALS[name].degree + config.acquire_bits


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_errors_at_known_positions_are_counted_exactly(name):
    config = BertConfig(pattern=name)
    rx = pattern(name, 30_000, offset=4321)
    where = [500, 501, 2000, 7777, 12_345, 29_990]
    rx[where] ^= 1
    s = run_kernel(rx, config)
    assert s.errors == len(where)
    assert s.bits == len(rx) - acquisition(name, config)
    assert s.locked and not s.inverted and s.sync_losses == 0


@pytest.mark.parametrize("name", ["prbs9", "prbs15"])
def test_inverted_polarity_is_locked_and_reported(name):
    config = BertConfig(pattern=name)
    rx = 1 - pattern(name, 10_000, offset=77)
    rx[[3000, 6000]] ^= 1
    s = run_kernel(rx, config)
    assert s.inverted and s.locked
    assert (s.bits, s.errors) == (len(rx) - acquisition(name, config), 2)


def test_random_data_and_stuck_lines_never_lock():
    # A random stream passes 64 recurrence checks in a row with probability 2^-64 per try
    # (common practice); a constant line is the all-zero register, which is refused.
    config = BertConfig(pattern="prbs9")
    rng = np.random.default_rng(5)
    for rx in (rng.integers(0, 2, 200_000, dtype=np.uint8), np.zeros(5000, np.uint8),
               np.ones(5000, np.uint8)):
        s = run_kernel(rx, config)
        assert (s.bits, s.errors, s.locked) == (0, 0, False)


@pytest.mark.parametrize("slip", ["drop", "insert"])
# the lock comes 79 bits in, so 512-bit windows start at 6223 and 6735: slips early, midway,
# and late in a window (6700: too few errors there to fail it; the next window fails)
@pytest.mark.parametrize("at", [6230, 6500, 6700, 6730])
def test_bit_slip_costs_one_reacquisition_and_no_errors(slip, at):
    config = BertConfig(pattern="prbs15")
    rx = pattern("prbs15", 20_000, offset=999)
    rx[[1000, 15_000]] ^= 1
    rx = np.delete(rx, at) if slip == "drop" else np.insert(rx, at, 1 - rx[at])
    s = run_kernel(rx, config)
    assert s.sync_losses == 1 and s.locked
    assert s.errors == 2
    # re-acquisition starts at the first mismatch the slip causes, with the bits before it
    # as history: it costs acquire_bits plus up to degree (+ a few) bits
    lost = len(rx) - s.bits - 2 * acquisition("prbs15", config)
    assert -15 <= lost <= 8


def test_long_error_burst_is_a_loss_and_is_not_counted():
    config = BertConfig(pattern="prbs15")
    rx = pattern("prbs15", 30_000, offset=12)
    rng = np.random.default_rng(8)
    rx[10_000:13_000] = rng.integers(0, 2, 3000)  # garbage: the link dropped out
    rx[[2000, 20_000, 25_000]] ^= 1
    s = run_kernel(rx, config)
    assert s.sync_losses == 1 and s.locked
    assert s.errors == 3
    lost = len(rx) - s.bits - 3000 - 2 * acquisition("prbs15", config)
    assert -8 <= lost <= 8


def test_short_burst_in_sync_counts_as_errors():
    # 40 wrong bits in a row stay under 20 % of a 512-bit window: the pattern is still
    # aligned, so a tester counts them as errors (common practice for in-sync bursts).
    config = BertConfig(pattern="prbs9")
    rx = pattern("prbs9", 5000)
    rx[2000:2040] ^= 1
    s = run_kernel(rx, config)
    assert (s.errors, s.sync_losses) == (40, 0)


def test_gap_resets_sync_and_is_never_counted():
    config = BertConfig(pattern="prbs15")
    tx = pattern("prbs15", 20_000, offset=3)
    head, tail = tx[:8000], tx[11_000:]  # 3000 bits never arrive
    tail = tail.copy()
    tail[5000] ^= 1
    state = bert_update(head, 0, config)
    state = bert_update(tail, 11_000, config, state)  # start jumps forward
    s = bert_finish(config, state)
    acq = acquisition("prbs15", config)
    assert s.gaps == 1 and s.errors == 1 and s.sync_losses == 0
    assert s.bits == len(head) + len(tail) - 2 * acq
    # the same bits joined, with a "gap" annotation where they meet
    joined = np.concatenate((head, tail))
    s2 = run_kernel(joined, config, cuts=(3000, 9000), gaps=(8000,))
    assert (s2.bits, s2.errors, s2.gaps, s2.sync_losses) == (s.bits, 1, 1, 0)


def packet_stream(lost=(), ruined=(), n_packets=30, payload_bits=256, offset=100):
    """Payload bits of a packet link: consecutive prbs9 segments, some packets missing."""
    tx = pattern("prbs9", n_packets * payload_bits, offset=offset)
    rng = np.random.default_rng(11)
    parts, notes, start = [], [], 0
    for k in range(n_packets):
        if k in lost:
            continue
        body = tx[k * payload_bits:(k + 1) * payload_bits].copy()
        if k in ruined:
            body = rng.integers(0, 2, payload_bits, dtype=np.uint8)
        parts.append(body)
        notes.append((start, payload_bits))
        start += payload_bits
    return np.concatenate(parts), notes


def test_packets_mode_counts_payload_errors_per_packet():
    config = BertConfig(pattern="prbs9", framing="packets")
    rx, notes = packet_stream(lost=(7, 8, 19), ruined=(12,))
    acq = acquisition("prbs9", config)
    # errors at known payload places, away from the re-acquisition runs
    received = [k for k in range(30) if k not in (7, 8, 19)]
    hits = {3: [10, 200], 9: [150], 20: [100, 101, 255], 25: [0]}
    for k, places in hits.items():
        base = received.index(k) * 256
        rx[[base + i for i in places]] ^= 1
    s = run_kernel(rx, config, packets=notes)
    # acquisition in packets 0, 9 (after the lost 7-8), 13 (after the ruined 12), 20
    reacquired = 4
    counted = len(received) - 1  # every packet but the ruined one
    assert s.packets == counted
    assert s.bits == counted * 256 - reacquired * acq
    assert s.errors == 2 + 1 + 3 + 1
    assert s.errored_packets == 4
    assert s.sync_losses == 3  # continuation failed at packets 9, 12 and 20


def test_packet_with_a_misread_length_is_counted_up_to_its_garbage_tail():
    # A length byte hit by errors makes the framer pass on bits beyond the payload: those are
    # not the pattern, and must not be counted as bit errors.
    config = BertConfig(pattern="prbs9", framing="packets")
    rx, notes = packet_stream(n_packets=8)
    tail = np.random.default_rng(6).integers(0, 2, 700, dtype=np.uint8)
    rx = np.concatenate((rx[:4 * 256], tail, rx[4 * 256:]))
    notes = [(i, n) for i, n in notes[:3]] + [(3 * 256, 256 + 700)] + [
        (i + 700, n) for i, n in notes[4:]]
    rx[[3 * 256 + 100, 6 * 256 + 700 + 50]] ^= 1
    s = run_kernel(rx, config, packets=notes)
    acq = acquisition("prbs9", config)
    assert s.errors == 2
    assert s.packets == 8 and s.sync_losses == 1
    # every true payload bit but two acquisitions (start, and after the tail), give or take
    # the few tail bits that match the pattern by chance before the first mismatch
    extra = s.bits - (8 * 256 - 2 * acq)
    assert 0 <= extra <= 8


def test_packets_mode_ignores_bits_outside_packets():
    config = BertConfig(pattern="prbs9", framing="packets")
    rx, notes = packet_stream(n_packets=6)
    junk = np.random.default_rng(2).integers(0, 2, 100, dtype=np.uint8)
    rx2 = np.concatenate((rx[:512], junk, rx[512:]))
    notes2 = [(i if i < 512 else i + 100, n) for i, n in notes]
    a = run_kernel(rx, config, packets=notes)
    b = run_kernel(rx2, config, packets=notes2)
    assert (a.bits, a.errors, a.packets) == (b.bits, b.errors, b.packets) == (
        6 * 256 - acquisition("prbs9", config), 0, 6)


STREAM = pattern("prbs15", 12_000, offset=500)
STREAM[[700, 3000, 3001, 9000]] ^= 1
STREAM = np.delete(STREAM, 4500)
STREAM[6000:7500] = np.random.default_rng(4).integers(0, 2, 1500)
STREAM[8000:] ^= 1  # polarity flips for the rest


@settings(max_examples=40, deadline=None)
@given(cuts=st.lists(st.integers(min_value=1, max_value=len(STREAM) - 1), max_size=15))
def test_stream_counts_are_chunk_size_invariant(cuts):
    config = BertConfig(pattern="prbs15")
    whole = run_kernel(STREAM, config)
    parts = run_kernel(STREAM, config, cuts=cuts)
    assert parts == whole
    assert whole.inverted and whole.sync_losses >= 2


PACKETS, NOTES = packet_stream(lost=(5,), ruined=(9,), n_packets=16)
PACKETS[[300, 2000, 3333]] ^= 1


@settings(max_examples=40, deadline=None)
@given(cuts=st.lists(st.integers(min_value=1, max_value=len(PACKETS) - 1), max_size=15))
def test_packet_counts_are_chunk_size_invariant_through_the_block(cuts):
    notes = [Annotation(i, "packet", {"payload_bits": n, "crc_ok": True}) for i, n in NOTES]

    def readings(pieces):
        block = make_block("ber", pattern="prbs9", framing="packets")
        run_block(block, pieces, RATE, notes)
        return block.readings()

    assert readings(split(PACKETS, cuts)) == readings([PACKETS])


def test_block_readings_and_interval():
    block = make_block("ber", pattern="prbs9", confidence=0.9)
    rx = pattern("prbs9", 50_000, offset=5)
    rx[np.arange(1000, 50_000, 1000)] ^= 1
    run_block(block, [rx[:20_000], rx[20_000:]], RATE)
    r = block.readings()
    assert r["errors"] == 49 and r["bits"] == 50_000 - 9 - 64
    assert r["ber"] == pytest.approx(49 / r["bits"])
    ci = stats.binomtest(49, r["bits"]).proportion_ci(0.9, method="exact")
    assert (r["ber_low"], r["ber_high"]) == pytest.approx((ci.low, ci.high), rel=1e-9)
    assert r["locked"] == 1 and r["inverted"] == 0 and r["sync_losses"] == 0


def test_block_before_any_bits():
    block = make_block("ber")
    assert isinstance(block, BitErrorMeter)
    r = block.readings()
    assert (r["bits"], r["ber"], r["ber_low"], r["ber_high"]) == (0, 0.0, 0.0, 1.0)


@pytest.mark.parametrize(("errors", "bits"), [(0, 1000), (1, 1000), (37, 5000), (10, 10)])
def test_clopper_pearson_against_scipy(errors, bits):
    # scipy.stats.binomtest(...).proportion_ci(method="exact") is the Clopper-Pearson interval
    low, high = clopper_pearson(errors, bits, 0.95)
    ci = stats.binomtest(errors, bits).proportion_ci(0.95, method="exact")
    assert low == pytest.approx(ci.low, abs=1e-12)
    assert high == pytest.approx(ci.high, rel=1e-9)


def test_clopper_pearson_zero_errors_closed_form():
    # With k = 0 the exact upper limit solves (1 - p)^n = alpha/2 (Clopper & Pearson 1934).
    n = 2000
    assert clopper_pearson(0, n, 0.95)[1] == pytest.approx(1 - 0.025 ** (1 / n), rel=1e-10)


def test_bad_input_is_named():
    config = BertConfig()
    with pytest.raises(ValueError, match="1-D uint8"):
        bert_update(np.zeros(10, np.int32), 0, config)
    with pytest.raises(ValueError, match="0 or 1"):
        bert_update(np.array([0, 1, 2], np.uint8), 0, config)
    with pytest.raises(ValueError, match="payload_bits must be >= 0"):
        bert_update(np.zeros(10, np.uint8), 0, BertConfig(framing="packets"), packets=[(0, -1)])
    with pytest.raises(ValueError, match="outside the chunk"):
        bert_update(np.zeros(10, np.uint8), 0, config, gaps=[50])
    with pytest.raises(ValueError, match="loss_threshold"):
        BertConfig(loss_threshold=0.7)
    with pytest.raises(ValueError, match="pattern must be one of"):
        BertConfig(pattern="prbs31")
    with pytest.raises(ValueError, match="confidence"):
        clopper_pearson(1, 10, 1.5)
    with pytest.raises(ParamError, match="window_bits"):
        make_block("ber", window_bits=4)
    block = make_block("ber", framing="packets")
    with pytest.raises(ValueError, match="payload_bits"):
        run_block(block, [np.zeros(100, np.uint8)], RATE, [Annotation(0, "packet", {})])
