"""Benchmark of the receive chain: every speed and memory figure of phasefree, from one run.

    python tools/bench.py              # full run (a few minutes), human-readable table
    python tools/bench.py --quick      # well under a minute
    python tools/bench.py --json       # one JSON object on stdout
    python tools/bench.py --tiny       # smallest sizes, for the smoke test (figures are noisy)

What it measures, each figure side by side with the one it is compared to in the same run:

receivers
    every shipped loopback receiver (``configs/loopback-*.toml``) through the threaded runtime,
    the source replaced by a replay of samples the ``sim`` block generated beforehand, at
    chunk sizes 4k, 16k and 64k: Msamples/s of receiver input. The runtime runs as shipped:
    its observers (eye, spectrum, snr, behind taps) in the background (``stream/cpus.py``),
    so on this saturated core they take what the receive path leaves and their taps drop the
    rest; ``observed`` gives the fraction of the tapped chunks they took (the fastest 64k run).
references
    the same blocks, configured the same way, called in order in one thread with no runtime
    (64k chunks), every observer on every chunk. The reference runs on the one core the
    runtime pins its block threads to, so a neighbour's load on that core slows both sides,
    rather than only the pinned one.
overhead
    like for like: the runtime with its observers beside the receive path
    (``observers = "equal"``, ``receivers_equal``, where they see nearly every chunk) over the
    reference, each 64k run of it right after a reference run.
start_stop_ms
    a run of one 64k chunk through the runtime: the fixed cost of starting the block threads
    and ending the stream through them, paid once per run. The receivers' runs are long
    enough (10 M samples in the full run) that it is a few per cent of them.
kernels
    each stage alone on its real input (captured from a reference run): Msamples/s of the
    stage's own input (bits/s for the framer and the BER meter).
links
    a link hop (``stream.link``, with the wire frame) over inproc, ipc and tcp against raw
    pyzmq PUSH/PULL sending the same frames, both ends as a thread pair on one core under the
    batch policy (as a process's block threads run; libzmq's I/O thread on the core too), so
    the ratio is of the hop's cost. On
    inproc the link hands the array over beside a header-only message (``frame.encode_held``)
    while raw pyzmq carries the whole frame, so its ratio can pass 1.
processes
    the OOK receiver divided into two parts (two ``Runner`` processes, one core each, joined by
    an ``ipc://`` crossing; the cut where the reference's busy times balance) against the whole
    receiver in one process on one core, observers beside the receive path in both: speedup
    (``process_msps`` also gives one process left on all cores). Every process maps the same
    tape file, runs a few chunks inline first (no cold start), and is timed from the moment
    all of them are running.
peak_rss_mb, rss_growth
    peak resident memory of a full receiver run (source included) of 3 units of length, and
    its ratio to the run of 1 unit: bounded memory gives about 1.
latency_ms
    median time from a chunk leaving a real-time paced source to its samples reaching a sink
    behind a decimator and a matched filter.

Speed targets are judged here, never in timed tests. The machine may be shared: compare the
ratios, which are measured side by side, rather than absolute figures between runs.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing as mp
import os
import resource
import socket
import sys
import tempfile
import threading
import time
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import zmq  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

import blocks  # noqa: E402, F401  (registers the block kinds)
from blocks._fir import antialias_taps, fir_decimate  # noqa: E402
from blocks._mixer import frequency_shift, tone_row  # noqa: E402
from blocks._packets import packet_bits  # noqa: E402
from blocks.conditioning import Decimate, MatchedFilter  # noqa: E402
from blocks.framing import Framer  # noqa: E402
from stream import frame  # noqa: E402
from stream.block import Block, Port, Source, StreamSpec  # noqa: E402
from stream.chunk import Chunk  # noqa: E402
from stream.cpus import batch_policy, choose_cpus, pinned  # noqa: E402
from stream.graph import Pipeline  # noqa: E402
from stream.link import LinkCounters, open_link  # noqa: E402
from stream.loader import pipeline_from_dict  # noqa: E402
from stream.memory import keep_freed_memory  # noqa: E402
from stream.params import Param  # noqa: E402
from stream.parts import choose_parts  # noqa: E402
from stream.runner import Runner  # noqa: E402

SCHEMES = ("ook", "2fsk", "dbpsk", "dqpsk")
CHUNKS = (4096, 16384, 65536)
REFERENCE_CHUNK = 65536
#: Chunks a bench child process runs inline before its timed run (so it starts warm).
WARM_CHUNKS = 4
#: Input rate of the 8-bit SDR the targets are set against (samples/s).
SDR_RATE = 2.4e6


@dataclass(frozen=True)
class Sizes:
    """How much work each section does (samples, messages, repeats)."""

    samples: int
    process_samples: int
    repeats: int
    link_messages: int
    link_repeats: int
    memory_symbols: int
    latency_s: float


SIZES = {
    # long enough that a run's fixed start and stop cost (``start_stop_ms``, reported on its
    # own) is a few per cent of a receiver's run and of the two-process run
    "full": Sizes(samples=10_000_000, process_samples=24_000_000, repeats=5,
                  link_messages=3000, link_repeats=7,
                  memory_symbols=60_000, latency_s=3.0),
    # three repeats even when quick: single runs of the same code on a shared 2-core machine
    # gave runtime/reference ratios anywhere from 0.5 to 1.3
    "quick": Sizes(samples=2_000_000, process_samples=8_000_000, repeats=3,
                   link_messages=1000, link_repeats=5,
                   memory_symbols=15_000, latency_s=1.0),
    "tiny": Sizes(samples=120_000, process_samples=240_000, repeats=1,
                  link_messages=20, link_repeats=1,
                  memory_symbols=2_000, latency_s=0.2),
}


# ----------------------------------------------------------------------------------------------
# bench-only blocks: a replay source and a timing probe


#: Sample arrays the replay source plays, by name (filled before a pipeline is built).
TAPES: dict[str, np.ndarray] = {}
#: Emit and arrival times recorded by the replay source and the probe, by tape name.
STAMPS: dict[str, dict[str, list[tuple[int, float]]]] = {}


#: Set in a bench child process: ``(ready, go)``; the replay source, once the run has
#: started, sets ``ready`` and waits for ``go`` before its first chunk.
START_GATE: list[Any] = []


class ReplaySource(Source):
    """Play an in-memory sample array (bench only)."""

    kind = "bench-replay"
    outputs = (Port("out", "complex64", "the tape's samples"),)
    params: ClassVar[tuple[Param, ...]] = (
        *Source.common_params,
        Param("tape", str, "", doc="name of the array in TAPES"),
    )

    def setup(self, inputs):
        self._tape = TAPES[self.p.tape]
        self._at = 0
        self._stamps = STAMPS.setdefault(self.p.tape, {"emit": [], "seen": []})["emit"]
        return super().setup(inputs)

    def produce(self) -> bool:
        if self._at == 0 and START_GATE:
            ready, go = START_GATE
            ready.set()
            go.wait()
        n = self.p.chunk_size
        piece = self._tape[self._at:self._at + n]
        self._at += piece.shape[0]
        self._stamps.append((self._at, time.perf_counter()))
        self.emit(piece)
        return self._at < self._tape.shape[0]


class Probe(Block):
    """Record when samples arrive (bench only)."""

    kind = "bench-probe"
    inputs = (Port("in", "any", "anything"),)
    params = (Param("tape", str, "", doc="name of the tape whose stamps to add to"),)

    def setup(self, inputs):
        self._seen = STAMPS.setdefault(self.p.tape, {"emit": [], "seen": []})["seen"]
        return {}

    def process(self, chunk: Chunk) -> None:
        self._seen.append((chunk.stop, time.perf_counter()))


# ----------------------------------------------------------------------------------------------
# pipelines


def config_doc(scheme: str) -> dict[str, Any]:
    """The parsed shipped loopback pipeline file of a scheme."""
    with open(ROOT / "configs" / f"loopback-{scheme}.toml", "rb") as f:
        return tomllib.load(f)


def doc_with_replay(doc: dict[str, Any], tape: str,
                    chunk: int = REFERENCE_CHUNK) -> dict[str, Any]:
    """A copy of a pipeline document whose source is a replay of ``TAPES[tape]``."""
    doc = json.loads(json.dumps(doc))
    doc["blocks"]["src"] = {"kind": "bench-replay", "tape": tape, "chunk_size": chunk}
    return doc


def replay_pipeline(scheme: str, tape: str, chunk: int) -> Pipeline:
    """The scheme's receiver with its source replaced by a replay of ``TAPES[tape]``."""
    return pipeline_from_dict(doc_with_replay(config_doc(scheme), tape, chunk))


def generate_tape(scheme: str, samples: int) -> np.ndarray:
    """Run the scheme's ``sim`` source into memory (once, outside every timing)."""
    doc = config_doc(scheme)
    doc["blocks"]["src"]["chunk_size"] = REFERENCE_CHUNK
    pipe = pipeline_from_dict(doc)
    src = pipe.blocks["src"]
    parts, got = [], 0
    while got < samples:
        src.produce()
        for _, chunk in src.take_output():
            parts.append(chunk.samples)
            got += len(chunk)
    tape = np.concatenate(parts)[:samples]
    tape.setflags(write=False)
    return tape


class Inline:
    """Run a validated pipeline's non-source blocks in one thread, no runtime: the reference.

    Each chunk goes through ``Block.deliver`` (``process`` plus the block's own counters) and
    on to the consumers of each output, depth first; ``finish`` runs in data-flow order.
    """

    def __init__(self, pipe: Pipeline, capture: bool = False) -> None:
        self.pipe = pipe
        self.order = [bid for bid in pipe.order() if bid not in pipe.sources()]
        self.routes: dict[tuple[str, str], list[tuple[str, str]]] = {}
        for e in pipe.edges:
            self.routes.setdefault((e.src, e.src_port), []).append((e.dst, e.dst_port))
        self.inputs: dict[str, list[Chunk]] | None = {b: [] for b in self.order} if capture \
            else None

    def push(self, block_id: str, chunk: Chunk) -> None:
        """Deliver one chunk to a block and pass on whatever it emits."""
        if self.inputs is not None:
            self.inputs[block_id].append(chunk)
        block = self.pipe.blocks[block_id]
        block.deliver(chunk)
        self._forward(block_id)

    def _forward(self, block_id: str) -> None:
        for port, out in self.pipe.blocks[block_id].take_output():
            for dst, dst_port in self.routes.get((block_id, port), ()):
                self.push(dst, Chunk(out.samples, out.start, out.rate, out.annotations,
                                     dst_port))

    def finish(self) -> None:
        """End of stream, block by block in data-flow order."""
        for bid in self.order:
            self.pipe.blocks[bid].timed("finish")
            self._forward(bid)

    def feed(self, tape: np.ndarray, chunk: int, rate: float) -> None:
        """Play a whole tape into the blocks behind the source, then finish."""
        (first, port), = self.routes[("src", "out")]
        for at in range(0, tape.shape[0], chunk):
            self.push(first, Chunk(tape[at:at + chunk], at, rate, (), port))
        self.finish()


def best_of(repeats: int, run: Callable[[], float]) -> float:
    """The shortest of ``repeats`` timings (seconds): the least disturbed by other load."""
    return min(run() for _ in range(repeats))


def time_runtime(scheme: str, tape: str, chunk: int, observers: str = "background",
                 ) -> tuple[float, float]:
    """One run through the runtime: seconds, and the fraction of the chunks sent into taps
    that the observers took (1 without taps)."""
    pipe = replay_pipeline(scheme, tape, chunk)
    runner = Runner(pipe, observers=observers)
    t0 = time.perf_counter()
    summary = runner.run()
    elapsed = time.perf_counter() - t0
    if summary["reason"] != "end-of-stream":
        raise RuntimeError(f"{scheme} at chunk {chunk}: run ended by {summary['reason']}: "
                           f"{summary.get('error')}")
    # a tap's ``sent`` counts its END message too, which every tap of a run that reached the
    # end of its stream delivered
    taps = [c for c in runner.links.values() if c.tap]
    taken = sum(c.sent - 1 for c in taps)
    offered = taken + sum(c.dropped for c in taps)
    return elapsed, taken / offered if offered else 1.0


def time_reference(scheme: str, tape: str, rate: float) -> float:
    inline = Inline(replay_pipeline(scheme, tape, REFERENCE_CHUNK))
    t0 = time.perf_counter()
    inline.feed(TAPES[tape], REFERENCE_CHUNK, rate)
    return time.perf_counter() - t0


@dataclass(frozen=True)
class SchemeFigures:
    """One scheme's receiver figures (Msamples/s unless named otherwise)."""

    receivers: dict[str, float]         # by chunk size, observers in the background
    equal: float                        # 64k, observers beside the receive path
    reference: float
    observed: float                     # fraction of tapped chunks taken (64k, background)
    start_stop_ms: float
    captured: dict[str, list[Chunk]]    # each block's input in a reference run


def bench_receivers(sizes: Sizes) -> dict[str, SchemeFigures]:
    """Runtime and reference figures per scheme (``SchemeFigures``)."""
    # the reference on the core the runtime pins its block threads to ("auto": the caller's),
    # so neither side escapes to the other core when a neighbour loads one of them
    with pinned(choose_cpus("auto")):
        return {scheme: _bench_scheme(scheme, sizes) for scheme in SCHEMES}


def _bench_scheme(scheme: str, sizes: Sizes) -> SchemeFigures:
    tape = f"rx-{scheme}"
    TAPES[tape] = generate_tape(scheme, sizes.samples)
    TAPES[f"one-{scheme}"] = TAPES[tape][:REFERENCE_CHUNK]
    start_stop = 1e3 * best_of(sizes.repeats, lambda: time_runtime(
        scheme, f"one-{scheme}", REFERENCE_CHUNK)[0])
    n = TAPES[tape].shape[0]
    rate = float(config_doc(scheme)["pipeline"]["sample_rate"])
    # side by side: the reference, then the like-for-like runtime run (the pair the overhead
    # is judged on), then the runtime as shipped at every chunk size; best of the repeats
    ref_times, equal_times = [], []
    runs: dict[int, list[tuple[float, float]]] = {c: [] for c in CHUNKS}
    for _ in range(sizes.repeats):
        ref_times.append(time_reference(scheme, tape, rate))
        equal_times.append(time_runtime(scheme, tape, REFERENCE_CHUNK, "equal")[0])
        for c in sorted(CHUNKS, reverse=True):
            runs[c].append(time_runtime(scheme, tape, c))
    inline = Inline(replay_pipeline(scheme, tape, REFERENCE_CHUNK), capture=True)
    inline.feed(TAPES[tape], REFERENCE_CHUNK, rate)
    assert inline.inputs is not None
    return SchemeFigures(
        receivers={str(c): n / min(runs[c])[0] / 1e6 for c in CHUNKS},
        equal=n / min(equal_times) / 1e6, reference=n / min(ref_times) / 1e6,
        observed=min(runs[REFERENCE_CHUNK])[1], start_stop_ms=start_stop,
        captured=inline.inputs)


# ----------------------------------------------------------------------------------------------
# kernels


def time_block(scheme: str, block_id: str, chunks: list[Chunk], repeats: int) -> float:
    """Items/s (millions) of one configured block fed its captured input, alone."""
    count = sum(len(c) for c in chunks)

    def once() -> float:
        block = replay_pipeline(scheme, f"rx-{scheme}", REFERENCE_CHUNK).blocks[block_id]
        t0 = time.perf_counter()
        for c in chunks:
            block.deliver(c)
            block.take_output()
        block.timed("finish")
        return time.perf_counter() - t0

    return count / best_of(repeats, once) / 1e6


def bench_kernels(sizes: Sizes, captured: dict[str, dict[str, list[Chunk]]]) -> dict[str, float]:
    """Each stage alone, on the input it sees in the receiver."""
    out: dict[str, float] = {}
    tape = TAPES["rx-dbpsk"]
    rate = 250_000.0

    def mixer() -> float:
        cycles = 1_300 / rate
        row, phase = tone_row(cycles), 0.0
        t0 = time.perf_counter()
        for at in range(0, tape.shape[0], REFERENCE_CHUNK):
            _, phase = frequency_shift(tape[at:at + REFERENCE_CHUNK], cycles, phase, row)
        return time.perf_counter() - t0

    def decimate_kernel() -> float:
        taps, state = antialias_taps(5), None
        t0 = time.perf_counter()
        for at in range(0, tape.shape[0], REFERENCE_CHUNK):
            _, state = fir_decimate(tape[at:at + REFERENCE_CHUNK], taps, 5, state)
        return time.perf_counter() - t0

    out["mixer"] = tape.shape[0] / best_of(sizes.repeats, mixer) / 1e6
    out["decimate"] = tape.shape[0] / best_of(sizes.repeats, decimate_kernel) / 1e6
    stages = {
        "cfo": ("dbpsk", "cfo"),
        "matched_filter": ("dbpsk", "mf"),
        "timing_envelope": ("dbpsk", "timing"),
        "timing_tones": ("2fsk", "timing"),
        "energy_detect": ("ook", "det"),
        "fsk_detect": ("2fsk", "det"),
        "dbpsk_detect": ("dbpsk", "det"),
        "dqpsk_detect": ("dqpsk", "det"),
        "ber": ("ook", "ber"),
    }
    for name, (scheme, bid) in stages.items():
        out[name] = time_block(scheme, bid, captured[scheme][bid], sizes.repeats)
    out["framer"] = bench_framer(sizes)
    return out


def bench_framer(sizes: Sizes) -> float:
    """Bits/s (millions) of the framer on packets separated by random bits."""
    rng = np.random.default_rng(5)
    one = []
    while sum(p.shape[0] for p in one) < sizes.samples // 4:
        payload = bytes(rng.integers(0, 256, 16, dtype=np.uint8))
        one.append(packet_bits(payload))
        one.append(rng.integers(0, 2, 96, dtype=np.uint8))
    bits = np.concatenate(one)
    pieces = [Chunk(bits[a:a + 4096], a, 9600.0) for a in range(0, bits.shape[0], 4096)]

    def once() -> float:
        block = Framer("framer")
        block.configure({"in": StreamSpec("uint8", 9600.0)})
        t0 = time.perf_counter()
        for c in pieces:
            block.deliver(c)
            block.take_output()
        block.timed("finish")
        if not block.readings().get("packets"):
            raise RuntimeError("framer bench found no packets")
        return time.perf_counter() - t0

    return bits.shape[0] / best_of(sizes.repeats, once) / 1e6


# ----------------------------------------------------------------------------------------------
# links


def _free_tcp_address() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return f"tcp://127.0.0.1:{s.getsockname()[1]}"


def _address(transport: str, tag: str, tmp: str) -> str:
    if transport == "inproc":
        return f"inproc://bench-{tag}"
    if transport == "ipc":
        return f"ipc://{tmp}/{tag}.sock"
    return _free_tcp_address()


def time_link(ctx: zmq.Context, address: str, chunk: Chunk, messages: int) -> float:
    """Seconds to move ``messages`` chunks through a phasefree link, end included.

    The chunks exist before the clock starts, as the raw side's array does: what is timed is
    the hop (``Outlet.send``, the wire frame both ways, ``Inlet.receive``), not the making of
    the chunks, which is the producing block's work.
    """
    chunks = [Chunk(chunk.samples, i * len(chunk), chunk.rate) for i in range(messages)]
    abort = threading.Event()
    outlet, inlet = open_link(ctx, address, LinkCounters("bench", False), "in", abort, 8)
    got = [0]

    def receive() -> None:
        # as the runner reads a block's single inlet: wait inside the receive itself
        batch_policy()
        deadline = time.monotonic() + 5.0
        while time.monotonic() < deadline:
            msg = inlet.receive(wait=True)
            if msg is None:
                continue
            if msg.kind is frame.MessageKind.END:
                return
            got[0] += len(msg.chunk)

    t = threading.Thread(target=receive)
    t0 = time.perf_counter()
    t.start()
    for piece in chunks:
        outlet.send(piece)
    outlet.end()
    t.join()
    elapsed = time.perf_counter() - t0
    outlet.close()
    inlet.close()
    if got[0] != messages * len(chunk):
        raise RuntimeError(f"link on {address} delivered {got[0]} samples")
    return elapsed


def time_raw(ctx: zmq.Context, address: str, chunk: Chunk, messages: int) -> float:
    """Seconds for raw pyzmq PUSH/PULL to move the same frames (header part + samples)."""
    tx, rx = ctx.socket(zmq.PUSH), ctx.socket(zmq.PULL)
    for s in (tx, rx):
        s.setsockopt(zmq.LINGER, 0)
    tx.setsockopt(zmq.SNDHWM, 8)
    rx.setsockopt(zmq.RCVHWM, 8)
    rx.bind(address)
    tx.connect(address)
    header = bytes(frame.HEADER_SIZE)
    got = [0]

    def receive() -> None:
        batch_policy()
        for _ in range(messages):
            parts = rx.recv_multipart(copy=False)
            got[0] += np.frombuffer(parts[1].buffer, dtype=np.complex64).shape[0]

    t = threading.Thread(target=receive)
    t0 = time.perf_counter()
    t.start()
    for _ in range(messages):
        tx.send_multipart([header, chunk.samples], copy=False)
    t.join()
    elapsed = time.perf_counter() - t0
    tx.close()
    rx.close()
    if got[0] != messages * len(chunk):
        raise RuntimeError(f"raw pyzmq on {address} delivered {got[0]} samples")
    return elapsed


def bench_links(sizes: Sizes) -> tuple[dict[str, float], dict[str, float]]:
    """Link hop over raw pyzmq for the same 16k-sample frames; and link Msamples/s."""
    result: list[tuple[dict[str, float], dict[str, float]]] = []

    def as_block_thread() -> None:
        # both ends run as a runner's block threads do, under the batch policy, in threads
        # of their own (the caller keeps its policy); see _bench_links
        batch_policy()
        result.append(_bench_links(sizes))

    sender = threading.Thread(target=as_block_thread)
    sender.start()
    sender.join()
    if not result:
        raise RuntimeError("the link bench failed (see the traceback above)")
    return result[0]


def _bench_links(sizes: Sizes) -> tuple[dict[str, float], dict[str, float]]:
    chunk = Chunk(TAPES["rx-ook"][:16384], 0, 250_000.0)
    ratios, speeds = {}, {}
    # both ends and libzmq's I/O thread on one core, as a process's block threads run by
    # default (stream/cpus.py): the hop's cost. With the threads free on the 2-core machine,
    # two identical raw tcp runs differed by up to 1.8x (best of 7 each), so a ratio measured
    # that way said more about thread placement than about the link. Both ends also run under
    # the batch policy, as block threads do: under the normal one a woken receiver preempts
    # the sender, and 15 raw tcp runs gave a median of 286 Msamples/s and a best of 465,
    # against 673 and 680 under the batch policy (ad-hoc script, one run each).
    with pinned(choose_cpus("auto")), tempfile.TemporaryDirectory(prefix="pf-bench-") as tmp:
        ctx = zmq.Context()
        for transport in ("inproc", "ipc", "tcp"):
            link_t, raw_t = [], []
            # a hop takes tens of microseconds: many short alternating runs, best of each,
            # so a burst of other load on a shared machine does not decide the ratio
            for i in range(sizes.link_repeats):
                raw_t.append(time_raw(ctx, _address(transport, f"raw{i}", tmp), chunk,
                                      sizes.link_messages))
                link_t.append(time_link(ctx, _address(transport, f"link{i}", tmp), chunk,
                                        sizes.link_messages))
            ratios[transport] = min(raw_t) / min(link_t)
            speeds[transport] = sizes.link_messages * len(chunk) / min(link_t) / 1e6
        ctx.term()
    return ratios, speeds


# ----------------------------------------------------------------------------------------------
# two processes against one


SPLIT_SCHEME = "ook"


def chain_layout(scheme: str) -> tuple[list[str], dict[str, list[str]]]:
    """The main chain's endpoints as written (``det.bits``) and each block's observers."""
    links = config_doc(scheme)["pipeline"]["links"]
    chain: list[str] = []
    observers: dict[str, list[str]] = {}
    for text in links:
        if "~>" in text:
            producer, observer = (t.strip().split(".")[0] for t in text.split("~>"))
            observers.setdefault(producer, []).append(observer)
        else:
            chain = [t.strip() for t in text.split("->")]
    return chain, observers


def balanced_parts(scheme: str, busy: dict[str, float]) -> tuple[list[str], list[str], str]:
    """Cut the main chain in two parts of the most even busy time (observers stay with the
    block they watch, so no tap crosses): front ids, back ids, and the link text cut."""
    chain, observers = chain_layout(scheme)
    ids = [c.split(".")[0] for c in chain]

    def side(part: list[str]) -> list[str]:
        return [b for bid in part for b in (bid, *observers.get(bid, ()))]

    def cost(part: list[str]) -> float:
        return sum(busy.get(b, 0.0) for b in side(part))

    cut = min(range(1, len(ids)), key=lambda k: max(cost(ids[:k]), cost(ids[k:])))
    return side(ids[:cut]), side(ids[cut:]), f"{chain[cut - 1]} -> {chain[cut]}"


def _part_process(doc: dict[str, Any], tape_file: str, part: str | None, ready, go,
                  done) -> None:
    """Run a receiver (or one part of it) once ``go`` is set; report when it ended.

    The tape is mapped from the file the parent wrote (every process shares its pages), and
    the whole receiver first runs a few chunks of it inline, so no process starts cold."""
    keep_freed_memory()
    threadpool_limits(limits=1, user_api="blas")  # as main() does for the parent
    TAPES["split"] = np.load(tape_file, mmap_mode="r")
    warm = Inline(pipeline_from_dict(doc))  # the whole receiver, parts or none
    warm.feed(TAPES["split"][:WARM_CHUNKS * REFERENCE_CHUNK], REFERENCE_CHUNK,
              float(doc["pipeline"]["sample_rate"]))
    pipe = pipeline_from_dict(doc)
    plan = choose_parts(pipe, part) if part is not None else None
    cpus = doc["pipeline"].get("cpus")
    runner = Runner(pipe, part=plan, cpus=cpus)
    if plan is None or "src" in plan.blocks:
        START_GATE[:] = [ready, go]
    else:  # a part without the source waits for its input anyway
        ready.set()
    summary = runner.run()
    done.put((part, time.monotonic(), summary["reason"],
              int(summary["blocks"].get("ber", {}).get("bits") or 0)))


def _time_processes(doc: dict[str, Any], tape_file: str, parts: list[str | None]) -> float:
    """Seconds from the start signal until every process has ended its run."""
    spawn = mp.get_context("spawn")
    go, done = spawn.Event(), spawn.Queue()
    readies, procs = [], []
    for part in parts:
        ready = spawn.Event()
        proc = spawn.Process(target=_part_process, args=(doc, tape_file, part, ready, go, done))
        proc.start()
        readies.append(ready)
        procs.append(proc)
    for ready in readies:
        if not ready.wait(120):
            raise RuntimeError("a bench process did not start")
    t0 = time.monotonic()
    go.set()
    ends = [done.get(timeout=300) for _ in parts]
    for proc in procs:
        proc.join(10)
    for part, _, reason, _ in ends:
        if reason != "end-of-stream":
            raise RuntimeError(f"split bench: part {part} ended by {reason}")
    if not any(bits > 0 for *_, bits in ends):
        raise RuntimeError("split bench: the receiver counted no bits")
    return max(t for _, t, _, _ in ends) - t0


def bench_processes(sizes: Sizes) -> tuple[float, dict[str, Any]]:
    """Speedup of the receiver divided in two parts (two processes, one core each, over ipc)
    against the whole receiver in one process (its block threads on one core). The run is
    long (``process_samples``): filling and draining the two-stage pipeline and starting and
    stopping the runs are fixed costs."""
    samples = sizes.process_samples
    TAPES["split"] = generate_tape(SPLIT_SCHEME, samples)
    inline = Inline(replay_pipeline(SPLIT_SCHEME, "split", REFERENCE_CHUNK))
    inline.feed(TAPES["split"][:sizes.samples], REFERENCE_CHUNK,
                float(config_doc(SPLIT_SCHEME)["pipeline"]["sample_rate"]))
    busy = {bid: b.statistics().busy_s for bid, b in inline.pipe.blocks.items()}
    front, back, cut = balanced_parts(SPLIT_SCHEME, busy)
    with tempfile.TemporaryDirectory(prefix="pf-bench-") as tmp:
        tape_file = os.path.join(tmp, "split.npy")
        np.save(tape_file, TAPES.pop("split"))
        whole = doc_with_replay(config_doc(SPLIT_SCHEME), "split")
        # like for like: in the background the observers of one process on a saturated core
        # would drop chunks those of two processes take, and the speedup would be of less work
        whole["pipeline"]["observers"] = "equal"
        spread = json.loads(json.dumps(whole))
        spread["pipeline"]["cpus"] = "all"
        split = json.loads(json.dumps(whole))
        split["parts"] = {"front": front, "back": back}
        split["crossings"] = {cut: {"address": f"ipc://{tmp}/split.sock"}}
        t_one, t_all, t_two = [], [], []
        for _ in range(sizes.repeats):
            t_one.append(_time_processes(whole, tape_file, [None]))
            t_all.append(_time_processes(spread, tape_file, [None]))
            t_two.append(_time_processes(split, tape_file, ["back", "front"]))
    return min(t_one) / min(t_two), {
        "one": samples / min(t_one) / 1e6,
        "one_all_cores": samples / min(t_all) / 1e6,
        "two": samples / min(t_two) / 1e6,
        "scheme": SPLIT_SCHEME, "cut": cut, "front": front, "back": back,
        "front_share": sum(busy[b] for b in front) / sum(busy[b] for b in front + back),
    }


# ----------------------------------------------------------------------------------------------
# memory and latency


def peak_rss_kib() -> float:
    """This process's own peak resident memory (KiB).

    Linux: ``VmHWM`` of ``/proc/self/status``, the high-water mark of this process's own
    memory map. ``getrusage``'s ``ru_maxrss`` is kept across ``fork`` and ``execve``
    (getrusage(2)), so a spawned child would report its parent's peak when that is higher:
    it is only the fallback where ``/proc`` is missing.
    """
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return float(line.split()[1])
    except OSError:
        pass
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _memory_child(symbols: int, result) -> None:
    doc = config_doc("ook")
    doc["blocks"]["src"].update(symbols=symbols, chunk_size=16384)
    summary = Runner(pipeline_from_dict(doc)).run()
    bits = summary["blocks"]["ber"]["bits"]
    result.put((peak_rss_kib(), bits))


def bench_memory(sizes: Sizes) -> tuple[float, float]:
    """Peak RSS (MB) of a 3-unit run (source included) and its ratio to a 1-unit run."""
    spawn = mp.get_context("spawn")
    peaks = []
    for units in (1, 3):
        result = spawn.Queue()
        child = spawn.Process(target=_memory_child, args=(units * sizes.memory_symbols, result))
        child.start()
        peak_kib, bits = result.get(timeout=300)
        child.join(10)
        if bits <= 0:
            raise RuntimeError("memory run counted no bits")
        peaks.append(peak_kib / 1024.0)
    return peaks[1], peaks[1] / peaks[0]


def bench_latency(sizes: Sizes) -> float:
    """Median ms from a paced source's chunk to its samples at a sink behind dec and mf."""
    rate, factor, chunk = 250_000.0, 5, 4096
    TAPES["latency"] = TAPES["rx-ook"][: int(sizes.latency_s * rate)]
    STAMPS["latency"] = {"emit": [], "seen": []}
    pipe = Pipeline("latency")
    pipe.add(ReplaySource("src", tape="latency", chunk_size=chunk, realtime=True,
                          sample_rate=rate))
    pipe.add(Decimate("dec", factor=factor))
    pipe.add(MatchedFilter("mf", shape="rect", symbol_rate=4_800.0))
    pipe.add(Probe("probe", tape="latency"))
    pipe.connect("src", "dec")
    pipe.connect("dec", "mf")
    pipe.connect("mf", "probe")
    pipe.validate()
    Runner(pipe).run()
    seen = STAMPS["latency"]["seen"]
    delays = []
    for stop, t_emit in STAMPS["latency"]["emit"]:
        need = math.ceil(stop / factor)
        arrival = next((t for s, t in seen if s >= need), None)
        if arrival is not None:
            delays.append(arrival - t_emit)
    if not delays:
        raise RuntimeError("latency probe saw no samples")
    return 1e3 * float(np.median(delays))


# ----------------------------------------------------------------------------------------------
# report


def run(sizes: Sizes) -> dict[str, Any]:
    """Every section, in one run."""
    schemes = bench_receivers(sizes)
    kernels = bench_kernels(sizes, {s: f.captured for s, f in schemes.items()})
    links, link_msps = bench_links(sizes)
    processes, process_msps = bench_processes(sizes)
    peak, growth = bench_memory(sizes)
    latency = bench_latency(sizes)
    return {
        "receivers": {s: f.receivers for s, f in schemes.items()},
        "observed": {s: f.observed for s, f in schemes.items()},
        "receivers_equal": {s: f.equal for s, f in schemes.items()},
        "references": {s: f.reference for s, f in schemes.items()},
        "overhead": {s: f.equal / f.reference for s, f in schemes.items()},
        "realtime_margin": {s: f.receivers[str(REFERENCE_CHUNK)] * 1e6 / SDR_RATE
                            for s, f in schemes.items()},
        "start_stop_ms": {s: f.start_stop_ms for s, f in schemes.items()},
        "kernels": kernels,
        "links": links,
        "link_msps": link_msps,
        "processes": processes,
        "process_msps": process_msps,
        "peak_rss_mb": peak,
        "rss_growth": growth,
        "latency_ms": latency,
    }


def table(result: dict[str, Any]) -> str:
    """The figures as a readable table, with the targets they are judged against."""
    lines = ["receivers through the runtime (Msamples/s of input; observers in the background)",
             f"  {'scheme':<7}" + "".join(f"{c:>9}" for c in CHUNKS)
             + f"{'x 2.4M':>8}{'observed':>10}"]
    for s in SCHEMES:
        r = result["receivers"][s]
        lines.append(f"  {s:<7}" + "".join(f"{r[str(c)]:>9.2f}" for c in CHUNKS)
                     + f"{result['realtime_margin'][s]:>8.1f}{result['observed'][s]:>10.2f}")
    lines.append("  target: x 2.4M >= 16 (64k chunks); observed: share of the tapped chunks "
                 "the observers took")
    lines.append("like for like at 64k: observers beside the receive path vs no runtime")
    lines.append(f"  {'scheme':<7}{'runtime':>9}{'no runtime':>12}{'ratio':>8}")
    for s in SCHEMES:
        lines.append(f"  {s:<7}{result['receivers_equal'][s]:>9.2f}"
                     f"{result['references'][s]:>12.2f}{result['overhead'][s]:>8.2f}")
    lines.append("  target: ratio >= 0.9")
    lines.append("  fixed cost of a run (start and stop, one 64k chunk): " + ", ".join(
        f"{s} {result['start_stop_ms'][s]:.0f} ms" for s in SCHEMES))
    lines.append("kernels alone (M items/s of their own input)")
    lines.extend(f"  {k:<16}{v:>9.2f}" for k, v in result["kernels"].items())
    lines.append("link hop vs raw pyzmq, 16k-sample frames (target >= 0.7)")
    lines.extend(f"  {k:<7} {v:>6.2f}  ({result['link_msps'][k]:.0f} Msamples/s)"
                 for k, v in result["links"].items())
    pm = result["process_msps"]
    lines.append(f"two processes vs one ({pm['scheme']}, cut at {pm['cut']}, observers beside "
                 "the receive path): "
                 f"{result['processes']:.2f}x  ({pm['two']:.2f} vs {pm['one']:.2f} Msamples/s; "
                 f"target >= 1.5; one process on all cores: {pm['one_all_cores']:.2f})")
    lines.append(f"peak RSS {result['peak_rss_mb']:.1f} MB, 3x run / 1x run = "
                 f"{result['rss_growth']:.2f} (bounded: about 1)")
    lines.append(f"latency at real-time pacing: {result['latency_ms']:.1f} ms (median)")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, under a minute")
    parser.add_argument("--tiny", action="store_true",
                        help="smallest sizes (smoke test; figures are not meaningful)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    args = parser.parse_args(argv)
    size = "tiny" if args.tiny or os.environ.get("PHASEFREE_BENCH_TINY") else (
        "quick" if args.quick else "full")
    # the runner does both at its start; done here first so the references run the same way
    # (one BLAS thread: the reference is one core's work, as the runtime's block threads are)
    keep_freed_memory()
    with threadpool_limits(limits=1, user_api="blas"):
        result = run(SIZES[size])
    result["size"] = size
    print(json.dumps(result, indent=None if args.json else 2) if args.json else table(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
