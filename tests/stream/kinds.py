"""Block kinds that exist only for the runtime's tests.

Every kind name starts with ``test_`` so it cannot collide with a built-in kind. Importing this
module registers them. A block that must wait for the test (``test_hold``) waits on a named
``threading.Event`` from :func:`gate`, never on the clock.
"""

from __future__ import annotations

import os
import threading
import time
from typing import ClassVar

import numpy as np

from stream.block import Block, Port, Source, StreamSpec
from stream.chunk import Chunk
from stream.params import Param

__all__ = ["Bits", "Cores", "Fail", "Hold", "Join", "Probe", "Slow", "Split", "gate"]

_IQ_OR_REAL = ("complex64", "float32")
_GATES: dict[str, threading.Event] = {}


def gate(name: str) -> threading.Event:
    """A fresh, closed gate under ``name`` for ``test_hold`` blocks to wait on."""
    _GATES[name] = threading.Event()
    return _GATES[name]


class Slow(Block):
    """Pass samples through unchanged, sleeping a fixed time per chunk (a slow consumer)."""

    kind = "test_slow"
    inputs = (Port("in", _IQ_OR_REAL),)
    outputs = (Port("out", "same"),)
    params = (Param("delay_s", float, 0.002, unit="s", low=0, high=1),)

    def process(self, chunk: Chunk) -> None:
        time.sleep(self.p.delay_s)
        self.emit(chunk.samples, annotations=chunk.annotations)


class Hold(Block):
    """Count chunks; the first one is held until the named gate opens (a stuck observer)."""

    kind = "test_hold"
    inputs = (Port("in", "any"),)
    params = (Param("gate", str, doc="name given to tests.stream.kinds.gate()"),
              Param("hold_s", float, 30.0, unit="s", low=0, high=120,
                    doc="longest wait for the gate, so a broken run fails instead of hanging"))

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._gate = _GATES[self.p.gate]
        self._chunks = 0
        self._timed_out = 0
        return {}

    def process(self, chunk: Chunk) -> None:
        if not self._gate.wait(self.p.hold_s):
            self._timed_out = 1
            self._gate.set()
        self._chunks += 1

    def readings(self) -> dict[str, int]:
        return {"chunks": self._chunks, "timed_out": self._timed_out}


class Probe(Block):
    """Pass samples through and record what it saw: chunks, breaks in ``start``, the end."""

    kind = "test_probe"
    inputs = (Port("in", _IQ_OR_REAL),)
    outputs = (Port("out", "same"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._next = 0
        self._breaks = 0
        self._finished = 0
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        self._breaks += chunk.start != self._next
        self._next = chunk.stop
        self.emit(chunk.samples, annotations=chunk.annotations)

    def finish(self) -> None:
        self._finished += 1

    def readings(self) -> dict[str, int]:
        return {"breaks": self._breaks, "finished": self._finished, "seen": self._next}


class Fail(Block):
    """Pass samples through, then raise on chunk number ``after`` (counting from 0)."""

    kind = "test_fail"
    inputs = (Port("in", _IQ_OR_REAL),)
    outputs = (Port("out", "same"),)
    params = (Param("after", int, 3, low=0),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._chunks = 0
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        if self._chunks == self.p.after:
            raise RuntimeError(f"deliberate failure on chunk {self._chunks}")
        self._chunks += 1
        self.emit(chunk.samples)


class Join(Block):
    """Two inputs: pass ``a`` through, count ``b`` (a block fed by two links)."""

    kind = "test_join"
    inputs = (Port("a", _IQ_OR_REAL), Port("b", _IQ_OR_REAL))
    outputs = (Port("out", "same"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._counts = {"a": 0, "b": 0}
        self._finished = 0
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        assert chunk.port is not None
        self._counts[chunk.port] += len(chunk)
        if chunk.port == "a":
            self.emit(chunk.samples)

    def finish(self) -> None:
        self._finished += 1

    def readings(self) -> dict[str, int]:
        return {"a": self._counts["a"], "b": self._counts["b"], "finished": self._finished}


class Bits(Source):
    """A source of hard bits (uint8), for dtype checks."""

    kind = "test_bits"
    outputs = (Port("out", "uint8"),)
    params: ClassVar[tuple[Param, ...]] = Source.common_params

    def produce(self) -> bool:
        self.emit(np.zeros(self.p.chunk_size, np.uint8))
        return False


class Split(Source):
    """A source with two outputs, ``i`` and ``q`` (float32), for port-name checks."""

    kind = "test_split"
    outputs = (Port("i", "float32"), Port("q", "float32"))
    params: ClassVar[tuple[Param, ...]] = Source.common_params

    def produce(self) -> bool:
        for port in ("i", "q"):
            self.emit(np.zeros(self.p.chunk_size, np.float32), port=port)
        return False


class Cores(Block):
    """Pass samples through and report the cores, scheduling policy and nice value of its
    thread."""

    kind = "test_cores"
    inputs = (Port("in", _IQ_OR_REAL),)
    outputs = (Port("out", "same"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._cores: list[int] = []
        self._policy = -1
        self._nice: int | None = None
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        self._cores = sorted(os.sched_getaffinity(0))
        self._policy = os.sched_getscheduler(0)
        self._nice = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
        self.emit(chunk.samples)

    def readings(self) -> dict[str, list[int] | int | None]:
        return {"cores": self._cores, "policy": self._policy, "nice": self._nice}
