"""The pipeline graph: blocks, the links between their ports, and validation before running.

Validation finds every structural problem before a sample moves: unknown or missing ports, an
input fed twice or not at all, outputs nobody consumes (unless the port allows it), cycles,
dtype mismatches, and rate mismatches between the inputs of one block. It then configures each
block in data-flow order, so a block's ``setup`` sees the real rates of its inputs.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

from stream.block import Block, Source, StreamSpec
from stream.errors import ParamError, PipelineError

__all__ = ["Edge", "Pipeline", "parse_endpoint"]


@dataclass(frozen=True)
class Edge:
    """One connection from an output port to an input port.

    ``tap`` marks a lossy observation point (PUB/SUB, drops counted); otherwise the link is
    lossless with backpressure. ``key`` locates the edge in the pipeline file for messages.
    """

    src: str
    src_port: str
    dst: str
    dst_port: str
    tap: bool = False
    key: str = "pipeline.links"
    spec: StreamSpec | None = field(default=None, compare=False)

    def label(self) -> str:
        """``src.port -> dst.port`` (``~>`` for a tap)."""
        arrow = "~>" if self.tap else "->"
        return f"{self.src}.{self.src_port} {arrow} {self.dst}.{self.dst_port}"


def parse_endpoint(text: str) -> tuple[str, str | None]:
    """Split ``"id.port"`` into ``("id", "port")``; ``"id"`` gives ``("id", None)``."""
    text = text.strip()
    block_id, _, port = text.partition(".")
    return block_id, (port or None)


class Pipeline:
    """A graph of blocks joined by links.

    Parameters
    ----------
    name : str
        Name shown in status and summary.
    queue_depth : int
        Chunks each link holds before its producer waits.
    cpus : str or tuple of int
        Cores for the block threads (``stream.cpus``): ``"auto"``, ``"all"`` or core numbers.
    observers : str
        ``"background"``: the blocks behind taps run below the receive path's priority;
        ``"equal"``: beside it (``stream.cpus``).
    """

    def __init__(self, name: str = "pipeline", queue_depth: int = 8,
                 cpus: str | tuple[int, ...] = "auto", observers: str = "background") -> None:
        self.name = name
        self.queue_depth = queue_depth
        self.cpus = cpus
        self.observers = observers
        self.blocks: dict[str, Block] = {}
        self.edges: list[Edge] = []
        self._keys: dict[str, str] = {}
        self.validated = False
        #: The parts and crossings (``stream.parts.Layout``) when the file divides the pipeline.
        self.layout: Any = None

    def add(self, block: Block, key: str | None = None) -> Block:
        """Add a block under its id; ``key`` locates it in the pipeline file."""
        if block.id in self.blocks:
            raise PipelineError(key or f"blocks.{block.id}", "duplicate block id")
        self.blocks[block.id] = block
        self._keys[block.id] = key or f"blocks.{block.id}"
        self.validated = False
        return block

    def connect(self, src: str, dst: str, tap: bool = False,
                key: str = "pipeline.links") -> Edge:
        """Link ``src`` (``"id"`` or ``"id.port"``) to ``dst``; a tap if ``tap``."""
        s_id, s_port = parse_endpoint(src)
        d_id, d_port = parse_endpoint(dst)
        s_port = self._port(s_id, s_port, "out", key).name
        d_port = self._port(d_id, d_port, "in", key).name
        edge = Edge(s_id, s_port, d_id, d_port, tap, key)
        self.edges.append(edge)
        self.validated = False
        return edge

    def _port(self, block_id: str, port: str | None, side: str, key: str):
        block = self.blocks.get(block_id)
        if block is None:
            known = ", ".join(self.blocks) or "none"
            raise PipelineError(key, f"unknown block {block_id!r} (blocks: {known})")
        try:
            return type(block).port(side, port)
        except KeyError as err:
            raise PipelineError(key, f"block {block_id!r}: {err.args[0]}") from None

    # -- queries ------------------------------------------------------------------------------
    def sources(self) -> list[str]:
        """Ids of the blocks with no inputs."""
        return [bid for bid, b in self.blocks.items() if isinstance(b, Source)]

    def inputs_of(self, block_id: str) -> list[Edge]:
        """Edges arriving at ``block_id``."""
        return [e for e in self.edges if e.dst == block_id]

    def outputs_of(self, block_id: str) -> list[Edge]:
        """Edges leaving ``block_id``."""
        return [e for e in self.edges if e.src == block_id]

    def order(self) -> list[str]:
        """Block ids in data-flow order (every block after all of its upstream blocks).

        Raises
        ------
        PipelineError
            If the links form a cycle (the message names the blocks on it).
        """
        pending = {bid: {e.src for e in self.inputs_of(bid)} for bid in self.blocks}
        done: list[str] = []
        while pending:
            ready = [bid for bid, ups in pending.items() if not ups]
            if not ready:
                raise PipelineError("pipeline.links",
                                    f"links form a cycle through {', '.join(sorted(pending))}")
            for bid in ready:
                del pending[bid]
                done.append(bid)
            for ups in pending.values():
                ups.difference_update(ready)
        return done

    def behind_taps(self) -> set[str]:
        """Ids of the observers: the blocks that every path from a source reaches through a
        tap (a block fed by taps, and the blocks fed only by such blocks)."""
        behind: set[str] = set()
        for bid in self.order():
            ins = self.inputs_of(bid)
            if ins and all(e.tap or e.src in behind for e in ins):
                behind.add(bid)
        return behind

    def key_of(self, block_id: str) -> str:
        """Where the block is declared in the pipeline file."""
        return self._keys.get(block_id, f"blocks.{block_id}")

    # -- validation ---------------------------------------------------------------------------
    def validate(self) -> None:
        """Check the graph and configure every block in data-flow order.

        Raises
        ------
        PipelineError
            For the first problem found, with the key path it concerns.
        """
        if not self.blocks:
            raise PipelineError("blocks", "the pipeline has no blocks")
        if not self.sources():
            raise PipelineError("blocks", "the pipeline has no source block")
        self._check_ports()
        specs: dict[tuple[str, str], StreamSpec] = {}
        resolved: list[Edge] = []
        for bid in self.order():
            block = self.blocks[bid]
            key = self.key_of(bid)
            ins: dict[str, StreamSpec] = {}
            for edge in self.inputs_of(bid):
                spec = specs[(edge.src, edge.src_port)]
                port = type(block).port("in", edge.dst_port)
                if not port.accepts(spec.dtype):
                    raise PipelineError(edge.key, f"dtype mismatch on {edge.label()}: "
                                        f"{edge.src}.{edge.src_port} gives {spec.dtype}, "
                                        f"{edge.dst}.{edge.dst_port} takes {port.dtype_text()}")
                ins[edge.dst_port] = spec
            rates = {s.rate for s in ins.values()}
            if len(rates) > 1 and not type(block).mixed_rates:
                listing = ", ".join(f"{p} at {s.rate:g}" for p, s in ins.items())
                raise PipelineError(key, f"rate mismatch between inputs: {listing} samples/s")
            try:
                outs = block.configure(ins)
            except ParamError as err:
                raise PipelineError(f"{key}.{err.name}", err.message) from None
            except ValueError as err:
                raise PipelineError(key, str(err)) from None
            for port_name, spec in outs.items():
                specs[(bid, port_name)] = spec
        for edge in self.edges:
            resolved.append(Edge(edge.src, edge.src_port, edge.dst, edge.dst_port, edge.tap,
                                 edge.key, specs[(edge.src, edge.src_port)]))
        self.edges = resolved
        self.validated = True

    def _check_ports(self) -> None:
        fed: dict[tuple[str, str], Edge] = {}
        for edge in self.edges:
            target = (edge.dst, edge.dst_port)
            if target in fed:
                raise PipelineError(edge.key, f"input {edge.dst}.{edge.dst_port} is fed twice "
                                    f"({fed[target].label()} and {edge.label()})")
            fed[target] = edge
        used = {(e.src, e.src_port) for e in self.edges}
        for bid, block in self.blocks.items():
            for port in type(block).inputs:
                if (bid, port.name) not in fed and not port.optional:
                    raise PipelineError(self.key_of(bid),
                                        f"input port {bid}.{port.name} is not connected")
            for port in type(block).outputs:
                if (bid, port.name) not in used and not port.optional:
                    raise PipelineError(self.key_of(bid),
                                        f"output port {bid}.{port.name} is not connected "
                                        "(link it to a block, e.g. a discard sink)")

    def __iter__(self) -> Iterator[Block]:
        return iter(self.blocks.values())

    def __repr__(self) -> str:
        return f"<Pipeline {self.name!r}: {len(self.blocks)} blocks, {len(self.edges)} links>"
