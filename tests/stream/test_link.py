"""Tests for links and taps (stream/link.py): rejected frames, gaps, drops, depth, the end.

Every wait on a socket is a poll with a timeout; nothing here sleeps to wait for a condition.
The one fixed wait (``test_end_of_stream_waits_for_room``) is there to outlast the give-up time
an earlier version had, and asserts that nothing happened during it.
"""

from __future__ import annotations

import itertools
import struct
import threading
from collections.abc import Iterator

import numpy as np
import pytest
import zmq

from stream import frame
from stream.chunk import Chunk
from stream.errors import LinkClosed
from stream.link import Inlet, LinkCounters, Outlet, open_link

POLL_MS = 2000
_addresses = itertools.count()


@pytest.fixture
def ctx() -> Iterator[zmq.Context]:
    context = zmq.Context()
    yield context
    context.destroy(linger=0)


def _address() -> str:
    return f"inproc://test-link-{next(_addresses)}"


def _chunk(i: int, n: int = 16) -> Chunk:
    return Chunk(np.full(n, i, np.float32), i * n, 1000.0)


def _open(ctx: zmq.Context, *, tap: bool, depth: int = 2, address: str | None = None,
          ) -> tuple[Outlet, Inlet, threading.Event]:
    abort = threading.Event()
    counters = LinkCounters("a.out -> b.in", tap)
    outlet, inlet = open_link(ctx, address or _address(), counters, "in", abort, depth)
    return outlet, inlet, abort


def _receive(inlet: Inlet) -> frame.Message | None:
    """Wait (bounded) for one message to arrive, then let the inlet read it."""
    assert inlet.sock.poll(POLL_MS, zmq.POLLIN), "nothing arrived within the poll timeout"
    return inlet.receive()


def _injector(ctx: zmq.Context, address: str) -> zmq.Socket:
    """A second PUSH socket feeding the same PULL end, as a misbehaving peer would."""
    sock = ctx.socket(zmq.PUSH)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(address)
    return sock


def _send_when_room(outlet: Outlet, chunk: Chunk) -> None:
    """Offer ``chunk`` to a tap until it takes it (bounded); refusals count as drops.

    libzmq tells the sending socket about room freed by the reader a little later, so a tap may
    refuse a chunk just after its queue emptied.
    """
    for _ in range(2000):
        if outlet.send(chunk):
            return
        threading.Event().wait(0.001)
    raise AssertionError("the tap never had room again")


def _fill(outlet: Outlet, abort: threading.Event) -> int:
    """Send chunks on a lossless link until it is full; return how many it took.

    With ``abort`` set, a send that would wait raises LinkClosed at once instead.
    """
    abort.set()
    sent = 0
    with pytest.raises(LinkClosed):
        for i in range(1000):
            outlet.send(_chunk(i))
            sent += 1
    abort.clear()
    return sent


def _fill_tap(outlet: Outlet, offers: int = 40) -> int:
    """Offer ``offers`` chunks to a tap nobody reads; return how many it queued."""
    return sum(outlet.send(_chunk(i)) for i in range(offers))


def _check_pairing(msg: frame.Message, n: int = 16) -> int:
    """The chunk number of a ``_chunk`` message, after checking its samples are its own."""
    i = msg.chunk.start // n
    np.testing.assert_array_equal(msg.chunk.samples, _chunk(i, n).samples)
    return i


GARBAGE = [
    pytest.param([b""], id="empty-part"),
    pytest.param([b"junk"], id="short-header"),
    pytest.param([b"XXXX" + bytes(frame.HEADER_SIZE - 4)], id="bad-magic"),
    pytest.param([struct.pack(frame.HEADER_FORMAT, frame.MAGIC, 99, 1, 2, 0, 0, 0, 1.0, 1),
                  bytes(4)], id="bad-version"),
    pytest.param([struct.pack(frame.HEADER_FORMAT, frame.MAGIC, 1, 1, 2, 0, 0, 0, 1.0, 4),
                  bytes(3)], id="truncated-samples"),
    pytest.param([struct.pack(frame.HEADER_FORMAT, frame.MAGIC, 1, 1, 2, 0, 0, 0,
                              float("nan"), 1), bytes(4)], id="nan-rate"),
    pytest.param([struct.pack(frame.HEADER_FORMAT, frame.MAGIC, 1, 1, 2, 1, 0, 0, 1.0, 1),
                  bytes(4), b"{not json"], id="bad-annotations"),
    pytest.param([struct.pack(frame.HEADER_FORMAT, frame.MAGIC, 1, 77, 0, 0, 0, 0, 0.0, 0)],
                 id="unknown-kind"),
]


@pytest.mark.parametrize("parts", GARBAGE)
def test_garbage_is_rejected_and_counted_never_raised(ctx, parts):
    address = _address()
    outlet, inlet, _ = _open(ctx, tap=False, address=address)
    rogue = _injector(ctx, address)
    try:
        rogue.send_multipart(parts)
        assert _receive(inlet) is None
        assert inlet.counters.rejected == 1
        # the link still works after the bad frame, and the bad frame cost no sequence number
        outlet.send(_chunk(0))
        msg = _receive(inlet)
        assert msg is not None and msg.kind is frame.MessageKind.DATA
        np.testing.assert_array_equal(msg.chunk.samples, _chunk(0).samples)
        s = inlet.counters.statistics()
        assert (s.rejected, s.received, s.gaps, s.depth) == (1, 1, 0, 0)
    finally:
        rogue.close(linger=0)
        outlet.close()
        inlet.close()


def test_received_chunk_carries_the_inlet_port(ctx):
    outlet, inlet, _ = _open(ctx, tap=False)
    try:
        outlet.send(_chunk(3))
        msg = _receive(inlet)
        assert msg.chunk.port == "in"
        assert msg.chunk.start == _chunk(3).start
    finally:
        outlet.close()
        inlet.close()


def test_sequence_gaps_are_counted(ctx):
    address = _address()
    outlet, inlet, _ = _open(ctx, tap=False, address=address)
    rogue = _injector(ctx, address)
    try:
        for seq in (0, 1, 5, 6, 10):        # 2, 3, 4 and 7, 8, 9 never arrive
            rogue.send_multipart(frame.encode(_chunk(seq), seq))
            assert _receive(inlet).seq == seq
        rogue.send_multipart(frame.encode_end(11, 11 * 16))
        assert _receive(inlet).kind is frame.MessageKind.END
        s = inlet.counters.statistics()
        assert s.gaps == 6
        assert s.received == 6               # five chunks and the end of stream
        assert s.rejected == 0
        assert inlet.ended
    finally:
        rogue.close(linger=0)
        outlet.close()
        inlet.close()


def test_tap_with_no_room_drops_and_counts_without_waiting(ctx):
    outlet, inlet, _ = _open(ctx, tap=True, depth=2)
    try:
        results = [outlet.send(_chunk(i)) for i in range(40)]
        accepted = sum(results)
        assert 0 < accepted < 40
        assert results[:accepted] == [True] * accepted   # the first ones fit, then drops
        s = outlet.counters.statistics()
        assert (s.sent, s.dropped) == (accepted, 40 - accepted)
        # the queued chunks arrive intact, each with its own samples (the dropped ones left no
        # array behind in the hand-over queue); the dropped ones show up as a gap at the next one
        assert [_check_pairing(_receive(inlet)) for _ in range(accepted)] == list(range(accepted))
        _send_when_room(outlet, _chunk(40))
        assert _check_pairing(_receive(inlet)) == 40
        assert not outlet.parcels
        s = outlet.counters.statistics()
        assert s.dropped >= 40 - accepted
        assert s.gaps == s.dropped
        assert s.received == accepted + 1
    finally:
        outlet.close()
        inlet.close()


def test_tap_depth_counts_what_is_queued_despite_drops(ctx):
    # depth is what was sent and not yet received; chunks the tap dropped were never queued
    outlet, inlet, _ = _open(ctx, tap=True, depth=2)
    try:
        accepted = _fill_tap(outlet)
        assert outlet.counters.dropped > 0
        assert outlet.counters.statistics().depth == accepted
        _receive(inlet)
        assert outlet.counters.statistics().depth == accepted - 1
        for _ in range(accepted - 1):
            _receive(inlet)
        assert outlet.counters.statistics().depth == 0
        _send_when_room(outlet, _chunk(40))  # after the gap is seen, depth is still right
        assert outlet.counters.statistics().depth == 1
        _receive(inlet)
        assert outlet.counters.statistics().depth == 0
    finally:
        outlet.close()
        inlet.close()


def test_link_depth_is_bounded_by_both_ends(ctx):
    outlet, inlet, abort = _open(ctx, tap=False, depth=3)
    try:
        accepted = _fill(outlet, abort)
        # each end holds at most `depth` chunks (libzmq high-water marks, one per socket)
        assert 0 < accepted <= 2 * 3
        assert outlet.counters.statistics().depth == accepted
    finally:
        outlet.close()
        inlet.close()


def test_full_link_send_raises_link_closed_on_abort(ctx):
    outlet, inlet, abort = _open(ctx, tap=False, depth=1)
    try:
        accepted = _fill(outlet, abort)
        abort.set()
        with pytest.raises(LinkClosed):
            outlet.send(_chunk(accepted))
        assert outlet.counters.sent == accepted
    finally:
        outlet.close()
        inlet.close()


@pytest.mark.parametrize("tap", [False, True], ids=["link", "tap"])
def test_end_of_stream_waits_for_room(ctx, tap):
    """A consumer slower than a couple of seconds per chunk still learns the stream ended."""
    outlet, inlet, abort = _open(ctx, tap=tap, depth=1)
    try:
        queued = _fill_tap(outlet) if tap else _fill(outlet, abort)
        ender = threading.Thread(target=outlet.end, daemon=True)
        ender.start()
        ender.join(2.5)                       # longer than the old 2 s give-up time
        assert ender.is_alive(), "end of stream was given up while the consumer was busy"
        kinds = [_receive(inlet).kind for _ in range(queued + 1)]
        ender.join(POLL_MS / 1000)
        assert not ender.is_alive()
        assert kinds[-1] is frame.MessageKind.END
        assert inlet.ended
    finally:
        abort.set()
        outlet.close()
        inlet.close()


def test_end_of_stream_on_a_full_link_gives_up_on_abort(ctx):
    outlet, inlet, abort = _open(ctx, tap=False, depth=1)
    try:
        accepted = _fill(outlet, abort)
        abort.set()
        outlet.end()                          # returns (logged, not raised)
        assert outlet.counters.sent == accepted
    finally:
        outlet.close()
        inlet.close()


def test_in_process_link_hands_the_array_over_without_a_copy(ctx, tmp_path):
    # inproc: the samples stay in memory beside the message (stream/link.py docstring);
    # ipc: they travel inside the message, so the receiver has its own copy
    for address, shared in ((_address(), True), (f"ipc://{tmp_path}/link", False)):
        outlet, inlet, _ = _open(ctx, tap=False, address=address)
        try:
            sent = _chunk(7, 100_000)              # above pyzmq's copy threshold
            outlet.send(sent)
            got = _receive(inlet).chunk
            assert np.shares_memory(got.samples, sent.samples) is shared
            assert not got.samples.flags.writeable
            np.testing.assert_array_equal(got.samples, sent.samples)
            assert (outlet.parcels is None) is not shared
            assert not outlet.parcels
        finally:
            outlet.close()
            inlet.close()


def test_refused_offers_and_aborted_sends_leave_no_array_behind(ctx):
    outlet, inlet, abort = _open(ctx, tap=False, depth=2)
    try:
        accepted = _fill(outlet, abort)           # the last send raised LinkClosed
        refused = outlet.offer(_chunk(accepted))
        assert not refused
        assert len(outlet.parcels) == accepted
        assert [_check_pairing(_receive(inlet)) for _ in range(accepted)] == list(range(accepted))
        _send_when_room(outlet, _chunk(accepted + 1))   # room is seen a little late
        assert _check_pairing(_receive(inlet)) == accepted + 1
    finally:
        outlet.close()
        inlet.close()


def test_a_whole_frame_from_another_sender_does_not_take_a_held_array(ctx):
    # a frame that carries its samples (written by anything but this link's own outlet) is read
    # whole, and the arrays waiting beside this link's messages stay with them
    address = _address()
    outlet, inlet, _ = _open(ctx, tap=False, depth=8, address=address)
    rogue = _injector(ctx, address)
    try:
        outlet.send(_chunk(1))
        rogue.send_multipart(frame.encode(_chunk(2), 0))
        outlet.send(_chunk(3))
        got = sorted(_check_pairing(_receive(inlet)) for _ in range(3))
        assert got == [1, 2, 3]
        assert not outlet.parcels
        assert inlet.counters.rejected == 0
    finally:
        rogue.close(linger=0)
        outlet.close()
        inlet.close()


def test_a_held_header_with_no_chunk_beside_it_is_rejected_and_counted(ctx):
    # only this link's outlet hands chunks over: a held header from any other sender finds no
    # parcel, and is a rejected frame, not a crash and not another message's samples
    address = _address()
    outlet, inlet, _ = _open(ctx, tap=False, depth=8, address=address)
    rogue = _injector(ctx, address)
    try:
        header, _ = frame.encode_held(_chunk(2), 0)
        rogue.send(header)
        assert _receive(inlet) is None
        assert inlet.counters.rejected == 1
        outlet.send(_chunk(3))
        assert _check_pairing(_receive(inlet)) == 3
    finally:
        rogue.close(linger=0)
        outlet.close()
        inlet.close()


def test_statistics_are_a_frozen_record_and_repr_says_what_it_holds():
    counters = LinkCounters("src.out ~> eye.in", tap=True)
    counters.sent, counters.dropped = 5, 2
    s = counters.statistics()
    with pytest.raises(AttributeError):
        s.sent = 0  # type: ignore[misc]
    assert "tap src.out ~> eye.in" in repr(counters)
    assert "dropped=2" in repr(counters)


def test_an_offer_that_waits_takes_the_room_a_reader_frees_and_gives_up_when_none_comes(ctx):
    # the receiving end of a crossing hands chunks to its block this way: woken by the room
    # itself, never by a timer, and never waiting longer than the link's send timeout
    outlet, inlet, abort = _open(ctx, tap=False, depth=2)
    try:
        accepted = _fill(outlet, abort)
        assert not outlet.offer(_chunk(accepted), wait=True)     # nobody reads: gives up
        assert len(outlet.parcels) == accepted
        reader = threading.Timer(0.01, lambda: [_receive(inlet) for _ in range(accepted)])
        reader.start()
        try:
            # the reader empties the link during the wait (libzmq reports the room a little
            # late, so a few tries may be needed; each wait is bounded by the send timeout)
            assert any(outlet.offer(_chunk(accepted), wait=True) for _ in range(20))
        finally:
            reader.join()
        assert _check_pairing(_receive(inlet)) == accepted
    finally:
        outlet.close()
        inlet.close()
