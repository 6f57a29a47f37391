"""The block contract: ports, parameters, the per-chunk method and per-block statistics.

A block validates its parameters and precomputes in ``setup`` ("prepare once"), then only
computes in ``process`` ("apply many"). It sees nothing but the chunks on its input ports and
hands results to ``emit``; the runtime (threads and ZeroMQ links, or the inline executor) moves
them on. Subclasses define the class attributes ``kind``, ``inputs``, ``outputs`` and ``params``;
defining ``kind`` registers the class.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from stream import registry
from stream.chunk import DTYPES, Annotation, Chunk
from stream.errors import ParamError
from stream.params import Param, validate_params

__all__ = ["Block", "BlockStatistics", "Param", "ParamError", "Port", "Source", "StreamSpec"]

#: Output dtype meaning "the dtype of the block's single input".
SAME = "same"
#: Input dtype meaning "any sample type".
ANY = "any"


@dataclass(frozen=True)
class Port:
    """A named input or output of a block.

    Parameters
    ----------
    name : str
        Port name, written ``block.port`` in links.
    dtype : str or tuple of str
        Accepted dtype names (inputs), the produced dtype (outputs), ``"same"`` (output dtype
        equals the single input's) or ``"any"`` (inputs).
    doc : str
        One line saying what flows on the port.
    optional : bool
        An output that may be left unconnected, or an input that may be left unfed.
    """

    name: str
    dtype: str | tuple[str, ...]
    doc: str = ""
    optional: bool = False

    def accepts(self, dtype: str) -> bool:
        """Whether an input port accepts samples of ``dtype``."""
        if self.dtype == ANY:
            return True
        allowed = (self.dtype,) if isinstance(self.dtype, str) else self.dtype
        return dtype in allowed

    def dtype_text(self) -> str:
        """The accepted or produced dtypes as text."""
        return self.dtype if isinstance(self.dtype, str) else " | ".join(self.dtype)


@dataclass(frozen=True)
class StreamSpec:
    """What flows on a port: sample dtype name and nominal sample rate (samples/s)."""

    dtype: str
    rate: float


@dataclass(frozen=True)
class BlockStatistics:
    """Counters every block keeps; read by the status view, the summary and the monitor."""

    samples_in: int
    samples_out: int
    chunks_in: int
    chunks_out: int
    busy_s: float


class Block:
    """Base class of every processing element.

    Parameters
    ----------
    block_id : str
        The block's id in its pipeline (used in every message about it).
    **values
        Parameter values; validated against ``params``.
    """

    kind: ClassVar[str] = ""
    inputs: ClassVar[tuple[Port, ...]] = ()
    outputs: ClassVar[tuple[Port, ...]] = ()
    params: ClassVar[tuple[Param, ...]] = ()
    #: Whether the inputs may run at different rates (e.g. a sink that takes samples on one
    #: port and events from the bit stream on another); otherwise a mismatch is an error.
    mixed_rates: ClassVar[bool] = False

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.__dict__.get("kind"):
            registry.register(cls)

    def __init__(self, block_id: str = "", **values: Any) -> None:
        self.id = block_id or self.kind
        self.p = validate_params(self.params, values)
        self.output_specs: dict[str, StreamSpec] = {}
        self.input_specs: dict[str, StreamSpec] = {}
        self._positions: dict[str, int] = {}
        self._outbox: list[tuple[str, Chunk]] = []
        self._samples_in = 0
        self._samples_out = 0
        self._chunks_in = 0
        self._chunks_out = 0
        self._busy = 0.0

    # -- description -----------------------------------------------------------------------
    @classmethod
    def summary(cls) -> str:
        """The kind's one-line description (first line of the class docstring)."""
        return (cls.__doc__ or "").strip().splitlines()[0] if cls.__doc__ else ""

    @classmethod
    def port(cls, side: str, name: str | None) -> Port:
        """Find a port by side (``"in"`` or ``"out"``) and name.

        None picks the only port, or on the input side the only one that is not optional.

        Raises
        ------
        KeyError
            With a message naming the ports that exist.
        """
        ports = cls.inputs if side == "in" else cls.outputs
        word = "input" if side == "in" else "output"
        if name is None:
            if len(ports) == 1:
                return ports[0]
            required = [p for p in ports if not p.optional]
            if side == "in" and len(required) == 1:
                return required[0]  # the optional inputs must be named
            if not ports:
                raise KeyError(f"kind {cls.kind!r} has no {word} port")
            names = ", ".join(p.name for p in ports)
            raise KeyError(f"kind {cls.kind!r} has {word} ports {names}: name one")
        for p in ports:
            if p.name == name:
                return p
        names = ", ".join(p.name for p in ports) or "none"
        raise KeyError(f"kind {cls.kind!r} has no {word} port {name!r} ({word}s: {names})")

    # -- lifecycle ---------------------------------------------------------------------------
    def configure(self, inputs: Mapping[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Check the input streams, run ``setup`` and record the output streams (runtime use)."""
        self.input_specs = dict(inputs)
        specs = self.setup(dict(inputs))
        self.output_specs = dict(specs)
        self._positions = {name: 0 for name in self.output_specs}
        return self.output_specs

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Prepare for running, given each input port's stream; return each output's stream.

        The default gives every output the rate of the first input and its declared dtype
        (``"same"``: the input's dtype). Override to precompute and to change rates; raise
        ``ParamError`` for problems that involve several parameters or the input rate.
        """
        first = next(iter(inputs.values()), None)
        out: dict[str, StreamSpec] = {}
        for port in self.outputs:
            if first is None:
                raise NotImplementedError(f"{type(self).__name__} must define setup()")
            dtype = first.dtype if port.dtype == SAME else port.dtype
            out[port.name] = StreamSpec(str(dtype), first.rate)
        return out

    def process(self, chunk: Chunk) -> None:
        """Consume one input chunk; call ``emit`` for whatever it produces."""
        raise NotImplementedError

    def finish(self) -> None:
        """End of stream on every input: emit what is held back. Default: nothing."""

    def readings(self) -> dict[str, Any]:
        """Block-specific figures (BER, estimates, counts) for status and summary."""
        return {}

    def views(self) -> dict[str, Any]:
        """Bulky figures (eye histogram, spectrum, BER history) for the monitor and snapshots.

        Kept out of ``readings`` so the once-a-second status lines stay small. Values must be
        JSON-serialisable (lists, not arrays).
        """
        return {}

    # -- output ------------------------------------------------------------------------------
    def emit(self, samples: np.ndarray, port: str | None = None,
             annotations: tuple[Annotation, ...] | list[Annotation] = ()) -> None:
        """Send ``samples`` out of ``port`` (default: the only output).

        The chunk's ``start`` and ``rate`` are set from the port's running position and its
        configured stream. ``samples`` must already have the port's dtype.
        """
        name = port if port is not None else self.outputs[0].name
        spec = self.output_specs.get(name)
        if spec is None:
            raise KeyError(f"block {self.id!r}: no configured output port {name!r}")
        arr = np.asarray(samples)
        if arr.dtype != DTYPES[spec.dtype] or arr.ndim != 1:
            raise TypeError(f"block {self.id!r} port {name!r} must emit 1-D {spec.dtype}, "
                            f"got {arr.ndim}-D {arr.dtype}")
        if arr.shape[0] == 0 and not annotations:
            return
        start = self._positions[name]
        self._positions[name] = start + arr.shape[0]
        self._outbox.append((name, Chunk(arr, start, spec.rate, tuple(annotations))))

    def take_output(self) -> list[tuple[str, Chunk]]:
        """Hand over (and forget) what was emitted since the last call (runtime use)."""
        out, self._outbox = self._outbox, []
        for _, chunk in out:
            self._chunks_out += 1
            self._samples_out += len(chunk)
        return out

    def position(self, port: str | None = None) -> int:
        """Number of samples emitted so far on ``port``: the next chunk's ``start``."""
        return self._positions[port if port is not None else self.outputs[0].name]

    # -- accounting --------------------------------------------------------------------------
    def deliver(self, chunk: Chunk) -> None:
        """Count, time and process one input chunk (runtime use)."""
        self._chunks_in += 1
        self._samples_in += len(chunk)
        t0 = time.perf_counter()
        try:
            self.process(chunk)
        finally:
            self._busy += time.perf_counter() - t0

    def timed(self, method: str) -> Any:
        """Call ``produce`` or ``finish`` with its time counted as busy (runtime use)."""
        t0 = time.perf_counter()
        try:
            return getattr(self, method)()
        finally:
            self._busy += time.perf_counter() - t0

    def statistics(self) -> BlockStatistics:
        """The block's counters as a frozen record."""
        return BlockStatistics(self._samples_in, self._samples_out, self._chunks_in,
                               self._chunks_out, self._busy)

    def __repr__(self) -> str:
        s = self.statistics()
        return (f"<{type(self).__name__} {self.id!r} kind={self.kind!r} in={s.samples_in} "
                f"out={s.samples_out}>")


class Source(Block):
    """Base class of blocks with no inputs; the runtime calls ``produce`` until it is done."""

    #: Parameters every source has; subclasses write ``params = Source.common_params + (...)``.
    common_params: ClassVar[tuple[Param, ...]] = (
        Param("sample_rate", float, None, unit="Hz", low=0, low_open=True,
              doc="output sample rate (default: the pipeline's sample_rate)"),
        Param("chunk_size", int, 16384, unit="samples", low=1, high=1 << 22,
              doc="samples per produced chunk"),
        Param("realtime", bool, False, doc="pace output to the wall-clock sample rate"),
    )
    params: ClassVar[tuple[Param, ...]] = common_params

    @property
    def rate(self) -> float:
        """The source's sample rate (after the pipeline default was applied)."""
        if self.p.sample_rate is None:
            raise ParamError("sample_rate",
                             "is required (set it on the block or as pipeline.sample_rate)")
        return float(self.p.sample_rate)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Outputs run at ``sample_rate`` with their declared dtypes."""
        rate = self.rate
        return {port.name: StreamSpec(str(port.dtype), rate) for port in self.outputs}

    def produce(self) -> bool:
        """Emit the next chunk; return False once the stream has ended."""
        raise NotImplementedError

    def skip(self, samples: int, port: str | None = None) -> None:
        """Advance ``port``'s position past ``samples`` that were lost (the stream has a hole).

        The next chunk's ``start`` jumps by ``samples``, so every consumer sees the gap.
        """
        if samples < 0:
            raise ValueError(f"samples must be >= 0 (got {samples})")
        name = port if port is not None else self.outputs[0].name
        self._positions[name] += int(samples)

    def process(self, chunk: Chunk) -> None:  # pragma: no cover - sources have no inputs
        raise TypeError(f"source {self.id!r} has no inputs")
