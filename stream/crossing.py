"""The network ends of a link between two processes: relays with heartbeats, sessions, rebasing.

A block never talks to the network. Each end of a crossing (a link whose two blocks run in
different processes, see :mod:`stream.parts`) is a *relay* thread holding two sockets: an
in-process hop to or from the block (an ordinary link, so the block code does not change) and a
DEALER socket on the crossing's ``ipc://`` or ``tcp://`` address. DEALER on both ends because
the link must be heard both ways: with a single peer it moves messages in order like PUSH/PULL,
queues at most the high-water mark (so a slow receiver still holds its sender back, across
hosts too), and reconnects by itself after a TCP connection drops — but it also lets the
receiver answer with heartbeats and acknowledge the end of the stream.

What travels (wire frames of :mod:`stream.frame`)::

    sender -> receiver   SESSION (seq 0, a random id), DATA ..., HEARTBEAT after 1 s idle, END
    receiver -> sender   HEARTBEAT every second, END once the sender's END has arrived

A peer heard from within :data:`STALE_S` seconds is ``up``; silent longer, ``stale``; after the
connection dropped, ``gone``; never heard, ``waiting``. Status shows the state and the age of
the last message heard (``peer_state``, ``last_seen_s``).

Restarts. A sender that restarts (a board rebooted, a process killed and started again) begins
its sequence numbers and sample indices at 0 again, under a new session id. The receiver sees
the new SESSION (or, should that be lost, a sequence number that went backwards), counts a
restart, and carries on with one monotonic stream index: the new session's indices are rebased
to follow on from the last sample delivered, and a ``"gap"`` annotation on the first sample
after the outage carries ``samples_missing`` estimated from the outage time and the sample rate
(``"estimated": true``). Within a session, sequence numbers that never arrived are counted as
gaps, and a jump of the sample index is annotated with the exact number of missing samples.
Downstream blocks restart their detectors at the annotation, as they do for any gap.

Stopping never hangs: sockets linger 0 and every wait is bounded. A stopping sender gives its
peer :data:`STOP_GRACE_S` to take what is queued and acknowledge the end, then discards the
rest; a stopping receiver ends the stream downstream at once.
"""

from __future__ import annotations

import contextlib
import logging
import secrets
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

import zmq
from zmq.utils.monitor import recv_monitor_message

from stream import frame
from stream.chunk import Annotation, Chunk
from stream.curve import PeerGuard
from stream.frame import MessageKind
from stream.graph import Edge
from stream.link import Inlet, LinkCounters, LinkStatistics, Outlet, open_link
from stream.parts import Crossing, CrossingKeys, PartPlan

__all__ = ["HEARTBEAT_S", "STALE_S", "STOP_GRACE_S", "CrossingCounters", "CrossingStatistics",
           "NetworkEnds"]

log = logging.getLogger("phasefree.crossing")

#: Seconds of silence after which an end sends a heartbeat.
HEARTBEAT_S = 1.0
#: Seconds of silence after which a peer is shown as stale.
STALE_S = 3.0
#: Seconds a stopping sender waits for its peer before discarding what is left.
STOP_GRACE_S = 0.4
#: Reconnection interval bounds (ms): quick after a restart, backing off while a peer is away.
RECONNECT_MS = (100, 2000)
#: Peer states in which a sender stops waiting for the end of its stream to be acknowledged.
LOST = ("stale", "gone")
_POLL_MS = 50
_LOG_EVERY_S = 10.0
_EVENTS = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_DISCONNECTED
           | zmq.EVENT_HANDSHAKE_FAILED_AUTH | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
           | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL)


@dataclass(frozen=True)
class CrossingStatistics(LinkStatistics):
    """A crossing's counters: the link's, plus the peer's state and the restarts seen.

    ``sent``/``received`` count DATA messages on the wire; ``depth`` is what waits on the
    in-process hop; ``dropped`` what a stopping sender discarded; ``refused`` peers turned away
    for their key (binding end) or refusals of this end's key (connecting end).
    """

    address: str
    side: str
    binds: bool
    curve: bool
    peer_state: str
    last_seen_s: float | None
    sessions: int
    restarts: int
    samples_missing: int
    refused: int


class CrossingCounters(LinkCounters):
    """Counters of one end of a crossing (written by its relay thread, read by status)."""

    def __init__(self, label: str, crossing: Crossing, side: str) -> None:
        super().__init__(label, tap=False)
        self.address = crossing.address
        self.side = side
        self.binds = crossing.binds_here(side)
        self.curve = crossing.curve
        self.hop: LinkCounters | None = None
        self.last_seen: float | None = None
        self.connected: bool | None = None
        self.sessions = 0
        self.restarts = 0
        self.samples_missing = 0
        self.refused = 0

    def peer_state(self, now: float | None = None) -> str:
        """``waiting``, ``up``, ``stale`` or ``gone`` (see the module docstring)."""
        if self.last_seen is None:
            return "waiting"
        if self.connected is False:
            return "gone"
        now = time.monotonic() if now is None else now
        return "stale" if now - self.last_seen >= STALE_S else "up"

    def statistics(self) -> CrossingStatistics:
        """A frozen record of the counters and the peer's state."""
        now = time.monotonic()
        depth = self.hop.statistics().depth if self.hop is not None else 0
        age = None if self.last_seen is None else round(now - self.last_seen, 3)
        return CrossingStatistics(self.label, False, self.sent, self.received, self.dropped,
                                  self.gaps, self.rejected, depth, self.address, self.side,
                                  self.binds, self.curve, self.peer_state(now), age,
                                  self.sessions, self.restarts, self.samples_missing,
                                  self.refused)

    def __repr__(self) -> str:
        return (f"<crossing {self.label} ({self.side}, {self.address}): "
                f"peer {self.peer_state()}, sent={self.sent} received={self.received}>")


class _Relay:
    """What both ends share: the network socket, its monitor, heartbeats, bounded logging."""

    def __init__(self, ctx: zmq.Context, edge: Edge, crossing: Crossing, side: str,
                 keys: CrossingKeys | None, guard: PeerGuard | None, counters: CrossingCounters,
                 stopping: threading.Event, aborting: threading.Event, depth: int) -> None:
        self.edge = edge
        self.label = edge.label()
        self.counters = counters
        self.stopping = stopping
        self.aborting = aborting
        self.seq = 0
        self.last_sent = 0.0
        self._logged: dict[str, float] = {}
        sock = ctx.socket(zmq.DEALER)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SNDHWM, depth)
        sock.setsockopt(zmq.RCVHWM, depth)
        sock.setsockopt(zmq.RECONNECT_IVL, RECONNECT_MS[0])
        sock.setsockopt(zmq.RECONNECT_IVL_MAX, RECONNECT_MS[1])
        binding = crossing.binds_here(side)
        if keys is not None:
            if binding:
                assert guard is not None
                guard.admit(self.label, keys.admitted, self._refused_here)
                sock.setsockopt(zmq.ZAP_DOMAIN, self.label.encode())
                sock.setsockopt(zmq.ZAP_ENFORCE_DOMAIN, 1)
                sock.curve_server = True
            else:
                sock.curve_serverkey = keys.listener_public
            sock.curve_publickey = keys.own.public
            sock.curve_secretkey = keys.own.secret
        self.monitor = sock.get_monitor_socket(_EVENTS)
        self.sock = sock
        try:
            if binding:
                sock.bind(crossing.address)
            else:
                sock.connect(crossing.address)
        except zmq.ZMQError as err:
            self.close()
            verb = "bind" if binding else "connect to"
            raise OSError(f"link {self.label}: cannot {verb} {crossing.address}: {err}") from err

    # -- peer state -----------------------------------------------------------------------------
    def _refused_here(self, key: bytes) -> None:
        self.counters.refused += 1

    def _note_every(self, what: str, level: int, text: str, *args: object) -> None:
        """Log ``text``, but the same ``what`` at most once per :data:`_LOG_EVERY_S`."""
        now = time.monotonic()
        if now - self._logged.get(what, -_LOG_EVERY_S) >= _LOG_EVERY_S:
            self._logged[what] = now
            log.log(level, text, *args)

    def _read_monitor(self) -> None:
        while True:
            try:
                event = recv_monitor_message(self.monitor, flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            kind = event["event"]
            if kind == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self.counters.connected = True
                log.info("link %s: connected on %s", self.label, self.counters.address)
            elif kind == zmq.EVENT_DISCONNECTED:
                if self.counters.connected:
                    log.warning("link %s: peer disconnected from %s", self.label,
                                self.counters.address)
                self.counters.connected = False
            elif kind == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                if not self.counters.binds:
                    self.counters.refused += 1
                self._note_every("auth", logging.ERROR, "link %s: the peer at %s refused this "
                                 "end's key (status %s)", self.label, self.counters.address,
                                 event.get("value"))
            else:
                self._note_every("protocol", logging.WARNING, "link %s: handshake with a peer "
                                 "on %s failed (a peer without the right keys, or not a "
                                 "phasefree link?)", self.label, self.counters.address)

    def _heard(self, now: float) -> None:
        self.counters.last_seen = now
        self.counters.connected = True  # whatever dropped before, this peer is connected

    def _send_control(self, parts: list[bytes], now: float) -> bool:
        try:
            self.sock.send_multipart(parts, flags=zmq.NOBLOCK)
        except zmq.Again:
            return False
        self.seq += 1
        self.last_sent = now
        return True

    def _beat(self, now: float) -> None:
        # a full queue means the peer is behind, not that it needs a heartbeat: skip it then
        if (now - self.last_sent >= HEARTBEAT_S
                and not self._send_control(frame.encode_heartbeat(self.seq), now)):
            self.last_sent = now

    def _receive(self) -> frame.Message | None:
        try:
            parts = self.sock.recv_multipart(flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return None
        try:
            return frame.decode(parts)
        except frame.FrameError as err:
            self.counters.rejected += 1
            self._note_every("frame", logging.WARNING, "link %s: rejected frame: %s",
                             self.label, err)
            return None

    def close(self) -> None:
        """Close the sockets without lingering."""
        with contextlib.suppress(zmq.ZMQError):
            self.sock.disable_monitor()
        self.monitor.close(linger=0)
        self.sock.close(linger=0)


class _SendingEnd(_Relay):
    """Reads the block's chunks from the hop and sends them to the receiving process."""

    def __init__(self, *args: object, hop: Inlet, **kw: object) -> None:
        super().__init__(*args, **kw)  # type: ignore[arg-type]
        self.hop = hop
        self.session = secrets.randbelow(2**63 - 1) + 1

    def run(self) -> None:
        pending: list | None = frame.encode_session(self.seq, self.session)
        pending_is_data = False
        ended = acked = end_sent = False
        stop_t: float | None = None
        poller = zmq.Poller()
        poller.register(self.monitor, zmq.POLLIN)
        poller.register(self.sock, zmq.POLLIN)
        hop_registered = room_registered = False
        while not self.aborting.is_set():
            now = time.monotonic()
            if self.stopping.is_set() and stop_t is None:
                stop_t = now
            giving_up = stop_t is not None and (
                now - stop_t > STOP_GRACE_S or self.counters.peer_state(now) != "up")
            if pending is not None:
                if giving_up:
                    self.counters.dropped += pending_is_data
                    pending = None
                elif self._offer(pending, now):
                    self.counters.sent += pending_is_data
                    end_sent = end_sent or ended
                    pending = None
            if ended and pending is None and (acked or giving_up or not end_sent
                                              or self.counters.peer_state(now) in LOST):
                log.debug("link %s: leaving (end %s)", self.label,
                          "acknowledged" if acked else "not acknowledged")
                break
            # a message waiting for room: woken when the network socket has room again
            want_room = pending is not None
            if want_room != room_registered:
                poller.modify(self.sock, zmq.POLLIN | (zmq.POLLOUT if want_room else 0))
                room_registered = want_room
            want_hop = pending is None and not ended
            if want_hop != hop_registered:
                if want_hop:
                    poller.register(self.hop.sock, zmq.POLLIN)
                else:
                    poller.unregister(self.hop.sock)
                hop_registered = want_hop
            events = dict(poller.poll(5 if pending is not None else _POLL_MS))
            if self.monitor in events:
                self._read_monitor()
            if events.get(self.sock, 0) & zmq.POLLIN:
                acked = self._read_peer(now) or acked
            if hop_registered and self.hop.sock in events:
                msg = self.hop.receive()
                if msg is not None and msg.kind is MessageKind.DATA:
                    assert msg.chunk is not None
                    pending, pending_is_data = frame.encode(msg.chunk, self.seq), True
                elif msg is not None and msg.kind is MessageKind.END:
                    pending, pending_is_data = frame.encode_end(self.seq, msg.start), False
                    ended = True
                    log.debug("link %s: end of stream at sample %d", self.label, msg.start)
            if pending is None and not ended:
                self._beat(time.monotonic())

    def _offer(self, parts: list, now: float) -> bool:
        try:
            self.sock.send_multipart(parts, flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return False
        self.seq += 1
        self.last_sent = now
        return True

    def _read_peer(self, now: float) -> bool:
        """Read what the receiver sent; True once it acknowledged the end of the stream."""
        acked = False
        while (msg := self._receive()) is not None:
            self._heard(now)
            if msg.kind is MessageKind.END:
                acked = True
            elif msg.kind is MessageKind.DATA:
                self.counters.rejected += 1
                self._note_every("data", logging.WARNING, "link %s: the receiving end sent "
                                 "samples; ignored", self.label)
        return acked


class _ReceivingEnd(_Relay):
    """Receives the sending process's chunks, rebases them, and hands them to the block."""

    def __init__(self, *args: object, hop: Outlet, **kw: object) -> None:
        super().__init__(*args, **kw)  # type: ignore[arg-type]
        self.hop = hop
        self.session: int | None = None
        self.expected = 0
        self.restart_pending = False
        self.sender_next: int | None = None
        self.last_data_t = 0.0
        self.last_len = 0
        spec = self.edge.spec
        assert spec is not None
        self.spec = spec

    def run(self) -> None:
        pending: Chunk | None = None
        ended = False
        poller = zmq.Poller()
        poller.register(self.monitor, zmq.POLLIN)
        net_registered = False
        while not self.aborting.is_set():
            if self.stopping.is_set():
                break
            # waits inside libzmq until the block takes a chunk (a timer here left the
            # receiving part's core idle whenever its first block had emptied its queue)
            if pending is not None and self.hop.offer(pending, wait=True):
                pending = None
            if ended and pending is None:
                break
            want_net = pending is None and not ended
            if want_net != net_registered:
                if want_net:
                    poller.register(self.sock, zmq.POLLIN)
                else:
                    poller.unregister(self.sock)
                net_registered = want_net
            events = dict(poller.poll(5 if pending is not None else _POLL_MS))
            now = time.monotonic()
            if self.monitor in events:
                self._read_monitor()
            if net_registered and self.sock in events:
                msg = self._receive()
                if msg is not None:
                    self._heard(now)
                    self._sequence(msg)
                    if msg.kind is MessageKind.DATA:
                        assert msg.chunk is not None
                        pending = self._rebase(msg.chunk, now)
                    elif msg.kind is MessageKind.END:
                        self._send_control(frame.encode_end(self.seq, 0), now)
                        ended = True
            self._beat(time.monotonic())
        if not self.aborting.is_set():
            self.hop.end()

    def _sequence(self, msg: frame.Message) -> None:
        """Follow the sender's session and sequence numbers: count gaps and restarts."""
        new_id = msg.start if msg.kind is MessageKind.SESSION else None
        if self.session is None:
            self.session = new_id or 0
            self.counters.sessions += 1
        elif (new_id is not None and new_id != self.session) or msg.seq < self.expected:
            self.session = new_id or 0
            self.counters.sessions += 1
            self.counters.restarts += 1
            self.restart_pending = self.sender_next is not None
            log.warning("link %s: the sender restarted (its sequence begins again at %d)",
                        self.label, msg.seq)
        elif msg.seq > self.expected:
            self.counters.gaps += msg.seq - self.expected
        self.expected = msg.seq + 1

    def _rebase(self, chunk: Chunk, now: float) -> Chunk | None:
        """The chunk placed on the receiving stream's own index, gaps annotated."""
        if chunk.samples.dtype.name != self.spec.dtype or not _same_rate(chunk.rate,
                                                                         self.spec.rate):
            self.counters.rejected += 1
            self._note_every("spec", logging.ERROR, "link %s: received %s at %g samples/s, "
                             "the pipeline file says %s at %g (do both ends run the same "
                             "file?)", self.label, chunk.samples.dtype.name, chunk.rate,
                             self.spec.dtype, self.spec.rate)
            return None
        self.counters.received += 1
        here = self.hop.position
        notes: list[Annotation] = []
        if self.restart_pending:
            outage = now - self.last_data_t
            missing = max(0, round(outage * chunk.rate) - self.last_len)
            notes.append(Annotation(here, "gap", {
                "reason": "sender-restart", "samples_missing": missing, "estimated": True,
                "outage_s": round(outage, 3)}))
            self.counters.samples_missing += missing
        elif self.sender_next is not None and chunk.start != self.sender_next:
            missing = max(0, chunk.start - self.sender_next)
            notes.append(Annotation(here, "gap", {"reason": "lost", "samples_missing": missing,
                                                  "estimated": False}))
            self.counters.samples_missing += missing
        self.restart_pending = False
        self.sender_next = chunk.stop
        self.last_data_t = now
        self.last_len = len(chunk)
        shift = here - chunk.start
        notes.extend(a.moved(max(0, a.index + shift)) for a in chunk.annotations)
        return Chunk(chunk.samples, here, chunk.rate, tuple(notes))


def _same_rate(a: float, b: float) -> bool:
    return abs(a - b) <= 1e-9 * max(abs(a), abs(b))


class NetworkEnds:
    """The network ends of one process's crossings, and the CURVE guard they share.

    Parameters
    ----------
    plan : PartPlan
        The parts this process runs; its ``network`` crossings get relays.
    fail : callable
        ``fail(where, error)`` stops the run when a relay breaks unexpectedly.
    """

    def __init__(self, plan: PartPlan, fail: Callable[[str, BaseException], None]) -> None:
        self.plan = plan
        self.fail = fail
        self.by_edge = {edge: (crossing, side, keys)
                        for edge, crossing, side, keys in plan.network}
        self._guard: PeerGuard | None = None
        self._relays: list[_Relay] = []

    def crosses(self, edge: Edge) -> bool:
        """Whether ``edge`` leaves this process."""
        return edge in self.by_edge

    def open(self, ctx: zmq.Context, edge: Edge, hop_address: str, stopping: threading.Event,
             aborting: threading.Event, depth: int
             ) -> tuple[CrossingCounters, Outlet | None, Inlet | None, threading.Thread]:
        """Open one crossing's relay; return its counters, the block's end, and its thread.

        Returns the block's outlet (sending side) or inlet (receiving side); the other is None.

        Raises
        ------
        OSError
            If the address cannot be bound or connected.
        """
        crossing, side, keys = self.by_edge[edge]
        label = edge.label()
        counters = CrossingCounters(label, crossing, side)
        counters.hop = LinkCounters(f"{label} (hop)", tap=False)
        _warn_about(crossing, label)
        if keys is not None and crossing.binds_here(side) and self._guard is None:
            self._guard = PeerGuard(ctx)
        outlet, inlet = open_link(ctx, hop_address, counters.hop, edge.dst_port, aborting, depth)
        common = (ctx, edge, crossing, side, keys, self._guard, counters, stopping, aborting,
                  depth)
        try:
            if side == "sender":
                relay: _Relay = _SendingEnd(*common, hop=inlet)
                block_end: tuple[Outlet | None, Inlet | None] = (outlet, None)
            else:
                relay = _ReceivingEnd(*common, hop=outlet)
                block_end = (None, inlet)
        except OSError:
            outlet.close()
            inlet.close()
            raise
        self._relays.append(relay)
        thread = threading.Thread(target=self._guarded, args=(relay, outlet, inlet),
                                  name=f"crossing-{label}", daemon=True)
        return counters, *block_end, thread

    def _guarded(self, relay: _Relay, outlet: Outlet, inlet: Inlet) -> None:
        try:
            relay.run()
        except Exception as err:  # a broken relay stops the run with the link's label
            log.debug("relay of %s failed", relay.label, exc_info=True)
            self.fail(f"link {relay.label}", err)
        finally:
            relay.close()
            (inlet if isinstance(relay, _SendingEnd) else outlet).close()

    def close(self) -> None:
        """Stop the CURVE guard (after the relays have ended)."""
        if self._guard is not None:
            self._guard.stop()
            self._guard = None


def _warn_about(crossing: Crossing, label: str) -> None:
    if crossing.allow_remote:
        log.warning("link %s: %s is reachable beyond this machine (allow_remote = true)",
                    label, crossing.address)
    if crossing.scheme == "tcp" and not crossing.curve:
        log.warning("link %s: samples cross %s unencrypted and unauthenticated "
                    "(curve = false)", label, crossing.address)
