"""The threaded runner: one thread per block, ZeroMQ links between them, a clean stop.

Stopping has two stages. ``stop`` asks the sources to end their streams; the end travels down
the links, every block flushes (``finish``) and sinks close their files, so recordings are
complete. If the pipeline has not drained within ``drain_s``, or on ``abort`` (a second Ctrl-C,
or a block that failed), every thread leaves at its next chance and still calls ``finish`` so
files are closed.
"""

from __future__ import annotations

import itertools
import logging
import sys
import threading
import time
import traceback
from collections.abc import Callable
from typing import Any

import zmq
from threadpoolctl import ThreadpoolController

from stream.block import Block, Source
from stream.cpus import (
    OBSERVER_POLICIES,
    background_priority,
    batch_policy,
    choose_cpus,
    parse_cpus,
    pinned,
)
from stream.crossing import NetworkEnds
from stream.errors import BlockFailed, LinkClosed
from stream.frame import Message, MessageKind
from stream.graph import Pipeline
from stream.link import Inlet, LinkCounters, Outlet, open_link
from stream.memory import keep_freed_memory
from stream.parts import PartPlan

__all__ = ["Runner"]

log = logging.getLogger("phasefree.runner")
_run_ids = itertools.count()

StatusHook = Callable[[dict[str, Any]], None]

# Finding the loaded BLAS libraries scans every shared object of the process (milliseconds, a
# few percent of a short run), so the scan is kept and redone only once modules were imported
# since, which is how a new native library gets loaded.
_blas_scan: tuple[int, ThreadpoolController] | None = None


def _blas_controller() -> ThreadpoolController:
    global _blas_scan
    modules = len(sys.modules)
    if _blas_scan is None or _blas_scan[0] != modules:
        _blas_scan = (modules, ThreadpoolController())
    return _blas_scan[1]


class Runner:
    """Run a validated pipeline with one thread per block.

    Parameters
    ----------
    pipeline : Pipeline
        A validated pipeline (``Pipeline.validate`` or the loader has configured it).
    queue_depth : int or None
        Chunks a link holds (per end) before the producer waits (default: the pipeline's).
    drain_s : float
        How long a stop may take to drain before the run is aborted.
    part : PartPlan or None
        Run only these parts of a divided pipeline (``stream.parts.plan_part``); links to the
        other parts travel over their crossings' addresses. None runs every block.
    cpus : str, int, list of int or None
        Cores of the block threads (``stream.cpus``; default: the pipeline's ``cpus``,
        normally ``"auto"``: one core per process).
    observers : str or None
        ``"background"``: the blocks behind taps run below the receive path's priority,
        ``"equal"``: beside it (``stream.cpus``; default: the pipeline's ``observers``).
    """

    def __init__(self, pipeline: Pipeline, queue_depth: int | None = None,
                 drain_s: float = 1.5, part: PartPlan | None = None,
                 cpus: str | int | list[int] | None = None,
                 observers: str | None = None) -> None:
        if not pipeline.validated:
            pipeline.validate()
        self.pipeline = pipeline
        self.queue_depth = queue_depth or pipeline.queue_depth
        self.drain_s = drain_s
        self.stopping = threading.Event()
        self.aborting = threading.Event()
        self.reason = "end-of-stream"
        self.failure: BlockFailed | None = None
        self.failure_trace = ""
        self.links: dict[str, LinkCounters] = {}
        self.block_ids = [b for b in pipeline.blocks if part is None or b in part.blocks]
        self._network = NetworkEnds(part, self._fail) if part is not None else None
        part_index = None
        if part is not None and pipeline.layout is not None:
            part_index = list(pipeline.layout.parts).index(part.names[0])
        setting = pipeline.cpus if cpus is None else parse_cpus(cpus)
        #: The cores the block threads run on (None: wherever the system puts them).
        self.cpus = choose_cpus(setting, part_index)
        self.observers = pipeline.observers if observers is None else observers
        if self.observers not in OBSERVER_POLICIES:
            raise ValueError(f"observers must be one of {', '.join(OBSERVER_POLICIES)} "
                             f"(got {self.observers!r})")
        #: Blocks whose threads run in the background (``stream.cpus``).
        self.background = pipeline.behind_taps() if self.observers == "background" else set()
        self._readings: dict[str, dict[str, Any]] = {bid: {} for bid in pipeline.blocks}
        self._views: dict[str, dict[str, Any]] = {bid: {} for bid in pipeline.blocks}
        self._threads: list[threading.Thread] = []
        self._t0 = 0.0
        self._t_end: float | None = None

    # -- control ------------------------------------------------------------------------------
    def stop(self, reason: str = "stopped") -> None:
        """End the run cleanly: sources end their streams and the pipeline drains."""
        if not self.stopping.is_set():
            if self.reason == "end-of-stream":
                self.reason = reason
            self.stopping.set()

    def abort(self) -> None:
        """End the run now: every block leaves at its next chance (files are still closed)."""
        self.stop("stopped")
        self.aborting.set()

    def _fail(self, block_id: str, err: BaseException) -> None:
        if self.failure is None:
            self.failure = BlockFailed(block_id, err)
            self.failure_trace = traceback.format_exc()
            self.reason = "error"
        self.aborting.set()
        self.stopping.set()

    # -- running ------------------------------------------------------------------------------
    def run(self, seconds: float | None = None, on_status: StatusHook | None = None,
            status_interval: float = 1.0,
            until: Callable[[dict[str, Any]], bool] | None = None) -> dict[str, Any]:
        """Run until the streams end, ``seconds`` pass, ``until(status)`` holds, or ``stop``.

        Returns
        -------
        dict
            The summary: ``{"event": "summary", "reason": ..., "seconds": ..., "blocks": ...,
            "links": ...}`` (plus ``"error"`` when a block failed).
        """
        keep_freed_memory()
        ctx = zmq.Context()
        # every block has its own thread already: BLAS splitting a small product over more
        # threads only adds contention (measured up to 20x slower on a loaded 2-core machine)
        blas = _blas_controller().limit(limits=1, user_api="blas")
        try:
            self._start(ctx)
            next_status = self._t0 + status_interval
            drain_deadline: float | None = None
            while any(t.is_alive() for t in self._threads):
                now = time.monotonic()
                if seconds is not None and now - self._t0 >= seconds:
                    self.stop("time-limit")
                if until is not None and not self.stopping.is_set() and until(self.status()):
                    self.stop("stopped")
                if self.stopping.is_set() and drain_deadline is None:
                    drain_deadline = now + self.drain_s
                if drain_deadline is not None and now > drain_deadline:
                    self.aborting.set()
                if on_status is not None and now >= next_status:
                    on_status(self.status())
                    next_status += status_interval * max(1, int((now - next_status)
                                                                // status_interval) + 1)
                alive = next((t for t in self._threads if t.is_alive()), None)
                if alive is not None:
                    alive.join(0.02)
            self._t_end = time.monotonic()
        finally:
            self.aborting.set()
            for t in self._threads:
                t.join(1.0)
            if self._network is not None:
                self._network.close()
            ctx.destroy(linger=0)
            blas.restore_original_limits()
        return self.summary()

    def _start(self, ctx: zmq.Context) -> None:
        run_id = next(_run_ids)
        outlets: dict[str, list[tuple[str, Outlet]]] = {b: [] for b in self.block_ids}
        inlets: dict[str, list[Inlet]] = {b: [] for b in self.block_ids}
        relays: list[threading.Thread] = []
        for i, edge in enumerate(self.pipeline.edges):
            if edge.src not in outlets and edge.dst not in inlets:
                continue  # both ends run in another process
            address = f"inproc://phasefree-{id(self)}-{run_id}-{i}"
            if self._network is not None and self._network.crosses(edge):
                counters, out_end, in_end, relay = self._network.open(
                    ctx, edge, address, self.stopping, self.aborting, self.queue_depth)
                relays.append(relay)
            else:
                counters = LinkCounters(edge.label(), edge.tap)
                out_end, in_end = open_link(ctx, address, counters, edge.dst_port,
                                            self.aborting, self.queue_depth)
            self.links[edge.label()] = counters
            if out_end is not None:
                outlets[edge.src].append((edge.src_port, out_end))
            if in_end is not None:
                inlets[edge.dst].append(in_end)
        self._threads.extend(relays)
        self._t0 = time.monotonic()
        for bid in self.pipeline.order():
            if bid not in outlets:
                continue
            block = self.pipeline.blocks[bid]
            target = self._source_loop if isinstance(block, Source) else self._block_loop
            t = threading.Thread(target=self._guard, name=f"block-{bid}",
                                 args=(target, block, inlets[bid], outlets[bid]), daemon=True)
            self._threads.append(t)
        # after the sockets exist: libzmq's own I/O threads (network crossings) stay free
        with pinned(self.cpus):
            for t in self._threads:
                t.start()

    def _guard(self, target: Callable, block: Block, inlets: list[Inlet],
               outlets: list[tuple[str, Outlet]]) -> None:
        batch_policy()
        if block.id in self.background:
            background_priority()
        try:
            target(block, inlets, outlets)
        except LinkClosed:
            pass
        except Exception as err:  # a failing block stops the pipeline with its id
            log.debug("block %s failed", block.id, exc_info=True)
            self._fail(block.id, err)
        finally:
            self._refresh(block, force=True)
            for _, outlet in outlets:
                outlet.close()
            for inlet in inlets:
                inlet.close()

    def _forward(self, block: Block, outlets: list[tuple[str, Outlet]]) -> None:
        for port, chunk in block.take_output():
            for name, outlet in outlets:
                if name == port:
                    outlet.send(chunk)

    def _end(self, block: Block, outlets: list[tuple[str, Outlet]]) -> None:
        try:
            block.timed("finish")
            if not self.aborting.is_set():
                self._forward(block, outlets)
        finally:
            if not self.aborting.is_set():
                # lossless links first: an observer behind a tap must not hold up the chain's end
                for _, outlet in sorted(outlets, key=lambda pair: pair[1].counters.tap):
                    outlet.end()

    def _source_loop(self, block: Source, inlets: list[Inlet],
                     outlets: list[tuple[str, Outlet]]) -> None:
        paced = bool(block.p.realtime)
        rate = block.rate
        first_port = block.outputs[0].name
        t0 = time.monotonic()
        try:
            while not self.stopping.is_set():
                more = block.timed("produce")
                self._forward(block, outlets)
                self._refresh(block)
                if not more:
                    break
                if paced:
                    ahead = t0 + block.position(first_port) / rate - time.monotonic()
                    if ahead > 0:
                        self.stopping.wait(ahead)
        finally:
            self._end(block, outlets)

    def _block_loop(self, block: Block, inlets: list[Inlet],
                    outlets: list[tuple[str, Outlet]]) -> None:
        try:
            if len(inlets) == 1:
                self._one_inlet(block, inlets[0], outlets)
            else:
                self._many_inlets(block, inlets, outlets)
        finally:
            self._end(block, outlets)

    def _take(self, block: Block, msg: Message | None,
              outlets: list[tuple[str, Outlet]]) -> bool:
        """Hand a received message to the block; True if it ended its inlet's stream."""
        if msg is None:
            return False
        if msg.kind is MessageKind.DATA:
            block.deliver(msg.chunk)
            self._forward(block, outlets)
            self._refresh(block)
            return False
        return msg.kind is MessageKind.END

    def _one_inlet(self, block: Block, inlet: Inlet, outlets: list[tuple[str, Outlet]]) -> None:
        # the common case: wait inside the receive itself (its timeout bounds how late an
        # abort is seen), one call per chunk instead of a poll and a receive
        while not self.aborting.is_set():
            if self._take(block, inlet.receive(wait=True), outlets):
                return

    def _many_inlets(self, block: Block, inlets: list[Inlet],
                     outlets: list[tuple[str, Outlet]]) -> None:
        poller = zmq.Poller()
        by_socket = {}
        for inlet in inlets:
            poller.register(inlet.sock, zmq.POLLIN)
            by_socket[inlet.sock] = inlet
        open_inlets = len(inlets)
        while open_inlets and not self.aborting.is_set():
            for sock, _ in poller.poll(50):
                if self._take(block, by_socket[sock].receive(), outlets):
                    poller.unregister(sock)
                    open_inlets -= 1

    def _refresh(self, block: Block, force: bool = False) -> None:
        now = time.monotonic()
        last = self._readings[block.id].get("_t", 0.0)
        if force or now - last >= 0.25:
            snap = dict(block.readings())
            snap["_t"] = now
            self._readings[block.id] = snap
            self._views[block.id] = block.views()

    # -- reporting ----------------------------------------------------------------------------
    def elapsed(self) -> float:
        """Seconds since the run started (until it ended)."""
        end = self._t_end if self._t_end is not None else time.monotonic()
        return max(0.0, end - self._t0) if self._t0 else 0.0

    def block_status(self, block_id: str) -> dict[str, Any]:
        """Counters and readings of one block."""
        block = self.pipeline.blocks[block_id]
        s = block.statistics()
        elapsed = self.elapsed() or 1e-9
        out: dict[str, Any] = {k: v for k, v in self._readings[block_id].items() if k != "_t"}
        out.update(kind=block.kind, samples_in=s.samples_in, samples_out=s.samples_out,
                   chunks_in=s.chunks_in, chunks_out=s.chunks_out, busy_s=round(s.busy_s, 6),
                   busy=round(min(1.0, s.busy_s / elapsed), 4))
        return out

    def status(self) -> dict[str, Any]:
        """A status record: every block's counters and readings, every link's counters."""
        return {
            "event": "status",
            "pipeline": self.pipeline.name,
            "seconds": round(self.elapsed(), 3),
            "blocks": {bid: self.block_status(bid) for bid in self.block_ids},
            "links": {label: vars(c.statistics()) for label, c in self.links.items()},
        }

    def views(self) -> dict[str, dict[str, Any]]:
        """Each block's bulky figures (``Block.views``) as last refreshed by its thread."""
        return {bid: v for bid, v in self._views.items() if v}

    def summary(self) -> dict[str, Any]:
        """The end-of-run record (``event: summary``)."""
        out = self.status()
        out["event"] = "summary"
        out["reason"] = self.reason
        out["cpus"] = "all" if self.cpus is None else sorted(self.cpus)
        out["observers"] = self.observers
        if self.failure is not None:
            out["error"] = {"block": self.failure.block_id, "message": str(self.failure.error),
                            "type": type(self.failure.error).__name__}
        return out
