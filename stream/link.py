"""Links and taps: moving chunks between block threads over ZeroMQ.

A *link* is lossless: PUSH -> PULL with a bounded high-water mark, so a slow consumer makes its
producer wait (backpressure). A *tap* is lossy: XPUB (with ``XPUB_NODROP``, so a full queue is
reported to the sender instead of silently discarded) -> SUB; when the observer is behind, the
chunk is dropped and counted, and the producer never waits. Only the end-of-stream message
waits on a tap, so observers always learn that the stream ended.

Inside one process (``inproc://``) the samples do not go through ZeroMQ: the message carries
the header only, and the chunk itself waits in the link's hand-over queue until the receiving
thread takes the message it belongs to (``frame.encode_held``, ``frame.decode_held``). ZeroMQ
still carries every message, so backpressure, drops and sequence numbers work as they do
between processes; what is saved is libzmq releasing each large zero-copy buffer through
pyzmq's collector thread, one more thread wake-up per chunk per hop (a pass-through hop on
one core: about 18 us with the buffer in the message, 5-6 us with it handed over).

Sequence numbers make loss visible: every message on a link carries the next number (a dropped
tap chunk uses one up too), and the receiving end counts the numbers that never arrived.
Frames that fail to decode are counted and logged, never raised into the block.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from dataclasses import dataclass

import zmq

from stream import frame
from stream.chunk import Chunk
from stream.errors import LinkClosed

__all__ = ["Inlet", "LinkCounters", "LinkStatistics", "Outlet", "open_link"]

log = logging.getLogger("phasefree.link")

#: Longest a link's send or receive waits inside libzmq before it looks at the abort flag again.
_WAIT_MS = 50


@dataclass(frozen=True)
class LinkStatistics:
    """A link's counters at one moment; ``depth`` is messages sent but not yet received."""

    label: str
    tap: bool
    sent: int
    received: int
    dropped: int
    gaps: int
    rejected: int
    depth: int


class LinkCounters:
    """Counters shared by the two ends of one link (each end writes its own fields)."""

    def __init__(self, label: str, tap: bool) -> None:
        self.label = label
        self.tap = tap
        self.sent = 0
        self.dropped = 0
        self.received = 0
        self.gaps = 0
        self.rejected = 0

    def statistics(self) -> LinkStatistics:
        """A frozen record of the counters."""
        # a chunk a tap dropped was never queued, yet the receiver counts its number as a gap:
        # only the gaps beyond the drops are messages that were sent and lost on the way
        lost = max(0, self.gaps - self.dropped)
        depth = max(0, self.sent - self.received - lost)
        return LinkStatistics(self.label, self.tap, self.sent, self.received, self.dropped,
                              self.gaps, self.rejected, depth)

    def __repr__(self) -> str:
        s = self.statistics()
        kind = "tap" if self.tap else "link"
        return f"<{kind} {self.label}: depth={s.depth} sent={s.sent} dropped={s.dropped}>"


#: The chunks that stay in memory beside each DATA message on an in-process link, oldest first
#: (``frame.encode_held``). Only the sending thread appends and takes back (a refused send),
#: only the receiving thread takes from the front, once per message whose header says so
#: (which only code inside the process can send: the address is the runner's own).
Parcels = deque[Chunk]


class Outlet:
    """The sending end of a link or tap; used by exactly one thread at a time.

    ``parcels`` is the hand-over queue of a link inside one process (None: the samples travel
    in the messages).
    """

    def __init__(self, sock: zmq.Socket, counters: LinkCounters, abort: threading.Event,
                 parcels: Parcels | None = None) -> None:
        self.sock = sock
        self.counters = counters
        self.abort = abort
        self.parcels = parcels
        self.seq = 0
        self.position = 0

    def _encode(self, chunk: Chunk) -> list:
        if self.parcels is None:
            return frame.encode(chunk, self.seq)
        header, held = frame.encode_held(chunk, self.seq)
        self.parcels.append(held)
        return [header]

    def _send(self, parts: list, flags: int) -> None:
        if len(parts) == 1:  # a lone part: cheaper than a multipart message of one
            self.sock.send(parts[0], flags=flags, copy=True)
        else:
            self.sock.send_multipart(parts, flags=flags, copy=False)

    def _take_back(self) -> None:
        """Forget the parcel of a message that was not sent."""
        if self.parcels is not None:
            self.parcels.pop()

    def send(self, chunk: Chunk) -> bool:
        """Send one chunk; a link waits for room, a tap drops when full.

        Returns
        -------
        bool
            True if sent, False if dropped (taps only).

        Raises
        ------
        LinkClosed
            If the run is aborted while waiting for room.
        """
        parts = self._encode(chunk)
        self.seq += 1
        self.position = chunk.start + chunk.samples.shape[0]
        if self.counters.tap:
            try:
                self._send(parts, zmq.NOBLOCK)
            except zmq.Again:
                self._take_back()
                self.counters.dropped += 1
                return False
        else:
            try:
                self._send_waiting(parts)
            except LinkClosed:
                self._take_back()
                raise
        self.counters.sent += 1
        return True

    def offer(self, chunk: Chunk, wait: bool = False) -> bool:
        """Send one chunk if the link has room now (with ``wait``: within its send timeout,
        ~50 ms, woken as soon as there is room), never longer.

        Returns
        -------
        bool
            True if sent; False if the link is full (nothing was sent, no number used up).
        """
        parts = self._encode(chunk)
        try:
            self._send(parts, 0 if wait and not self.counters.tap else zmq.NOBLOCK)
        except zmq.Again:
            self._take_back()
            return False
        self.seq += 1
        self.position = chunk.stop
        self.counters.sent += 1
        return True

    def end(self, timeout_s: float | None = None) -> None:
        """Send end of stream, waiting for room on links and taps alike.

        The wait lasts until the run is aborted (or ``timeout_s``, if given): a consumer that is
        merely slow must still learn that the stream ended, or it would wait for ever.
        """
        parts = frame.encode_end(self.seq, self.position)
        self.seq += 1
        try:
            self._send_waiting(parts, timeout_s)
            self.counters.sent += 1
        except LinkClosed:
            log.debug("end of stream not delivered on %s", self.counters.label)

    def _send_waiting(self, parts: list, timeout_s: float | None = None) -> None:
        # A link's socket waits inside libzmq, with the GIL released, for at most _WAIT_MS
        # (its send timeout) per try, so a full link costs no exception per chunk and an abort
        # is still seen within _WAIT_MS. XPUB reports itself writable even when XPUB_NODROP
        # refuses, and blocks for ever without a timeout, so a tap tries and waits by time.
        tap = self.counters.tap
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        while True:
            try:
                waiting = not (tap or self.abort.is_set())
                self._send(parts, 0 if waiting else zmq.NOBLOCK)
                return
            except zmq.Again:
                if self.abort.is_set() or (deadline is not None and time.monotonic() > deadline):
                    raise LinkClosed(self.counters.label) from None
                if tap:
                    time.sleep(_WAIT_MS / 10000)

    def close(self) -> None:
        """Close the socket without lingering."""
        self.sock.close(linger=0)


class Inlet:
    """The receiving end of a link or tap, for one input port (``parcels`` as for Outlet)."""

    def __init__(self, sock: zmq.Socket, counters: LinkCounters, port: str,
                 parcels: Parcels | None = None) -> None:
        self.sock = sock
        self.counters = counters
        self.port = port
        self.parcels = parcels
        self.expected = 0
        self.ended = False

    def receive(self, wait: bool = False) -> frame.Message | None:
        """Read one message: one already waiting, or with ``wait``, the next within ~50 ms.

        Without ``wait`` the caller polled the socket first. With ``wait`` the inlet waits
        inside libzmq (the GIL released) for at most its receive timeout, so a caller looping
        on it sees an abort within that time.

        Returns None when nothing valid arrived: a rejected frame is counted and logged.
        """
        flags = 0 if wait else zmq.NOBLOCK
        parcels = self.parcels
        try:
            if parcels is None:
                parts = self.sock.recv_multipart(flags=flags, copy=False)
            else:  # a DATA message is its header alone, its chunk waits in the parcels
                parts = [self.sock.recv(flags=flags, copy=True)]
        except zmq.Again:
            return None
        held = parcels is not None and frame.is_held(parts[0])
        if parcels is not None and not held:
            while self.sock.get(zmq.RCVMORE):
                parts.append(self.sock.recv(copy=False))
        try:
            if not held:
                msg = frame.decode(parts, self.port)
            elif parcels:
                msg = frame.decode_held(parts[0], parcels.popleft(), self.port)
            else:
                raise frame.FrameError("parts", "a held header with no chunk handed over")
        except frame.FrameError as err:
            self.counters.rejected += 1
            log.warning("link %s: rejected frame: %s", self.counters.label, err)
            return None
        if msg.seq > self.expected:
            self.counters.gaps += msg.seq - self.expected
        self.expected = msg.seq + 1
        if msg.kind is frame.MessageKind.DATA:
            self.counters.received += 1
        elif msg.kind is frame.MessageKind.END:
            self.counters.received += 1
            self.ended = True
        return msg

    def close(self) -> None:
        """Close the socket without lingering."""
        self.sock.close(linger=0)


def open_link(ctx: zmq.Context, address: str, counters: LinkCounters, port: str,
              abort: threading.Event, depth: int) -> tuple[Outlet, Inlet]:
    """Create both ends of a link (PUSH/PULL) or tap (XPUB/SUB) on ``address``.

    On an ``inproc://`` address the samples are handed over beside the messages (module
    docstring). For a tap this waits until the subscription has reached the publisher, so the
    first chunks are not lost to the subscription handshake.
    """
    if counters.tap:
        tx = ctx.socket(zmq.XPUB)
        tx.setsockopt(zmq.XPUB_NODROP, 1)
        tx.setsockopt(zmq.SNDHWM, depth)
        rx = ctx.socket(zmq.SUB)
        rx.setsockopt(zmq.RCVHWM, depth)
        rx.setsockopt(zmq.SUBSCRIBE, b"")
    else:
        tx = ctx.socket(zmq.PUSH)
        tx.setsockopt(zmq.SNDHWM, depth)
        rx = ctx.socket(zmq.PULL)
        rx.setsockopt(zmq.RCVHWM, depth)
    for sock in (tx, rx):
        sock.setsockopt(zmq.LINGER, 0)
    rx.setsockopt(zmq.RCVTIMEO, _WAIT_MS)
    if not counters.tap:
        tx.setsockopt(zmq.SNDTIMEO, _WAIT_MS)
    # the publishing side binds: a subscription made before the publisher connects is not
    # forwarded to it on inproc (seen with libzmq 4.3), so taps always bind the XPUB end
    binder, connector = (tx, rx) if counters.tap else (rx, tx)
    try:
        binder.bind(address)
        connector.connect(address)
    except zmq.ZMQError as err:
        tx.close(linger=0)
        rx.close(linger=0)
        raise OSError(f"cannot open link {counters.label} on {address}: {err}") from err
    if counters.tap and not tx.poll(2000, zmq.POLLIN):
        raise OSError(f"tap {counters.label}: subscription did not arrive on {address}")
    if counters.tap:
        tx.recv()  # the subscription message
    parcels: Parcels | None = deque() if address.startswith("inproc://") else None
    return Outlet(tx, counters, abort, parcels), Inlet(rx, counters, port, parcels)
