"""Test source, gain and the counting sink: the smallest blocks, for benches and tests."""

from __future__ import annotations

import time
from typing import ClassVar

import numpy as np

from stream.block import Block, Port, Source, StreamSpec
from stream.chunk import Chunk
from stream.errors import ParamError
from stream.params import Param

__all__ = ["Discard", "Gain", "ToneSource"]


class ToneSource(Source):
    """Seeded test signal: a tone plus Gaussian noise, complex or real."""

    kind = "tone"
    outputs = (Port("out", ("complex64", "float32"), "the test signal"),)
    params: ClassVar[tuple[Param, ...]] = (
        *Source.common_params,
        Param("frequency_hz", float, 1000.0, unit="Hz", doc="tone frequency"),
        Param("amplitude", float, 1.0, low=0, doc="tone amplitude (0 for noise only)"),
        Param("noise_power", float, 0.0, low=0, doc="noise variance per sample"),
        Param("dtype", str, "complex64", choices=("complex64", "float32"),
              doc="sample type: complex64 (IQ) or float32 (real)"),
        Param("samples", int, 0, unit="samples", low=0,
              doc="total samples before end of stream (0: endless)"),
        Param("seed", int, 1, low=0, doc="noise generator seed"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = self.rate
        if abs(self.p.frequency_hz) >= rate / 2:
            raise ParamError("frequency_hz", f"must be below half the sample rate "
                             f"{rate / 2:g} Hz (got {self.p.frequency_hz:g})")
        self._rng = np.random.default_rng(self.p.seed)
        self._step = 2 * np.pi * self.p.frequency_hz / rate
        return {"out": StreamSpec(self.p.dtype, rate)}

    def produce(self) -> bool:
        n = self.p.chunk_size
        start = self.position()
        if self.p.samples:
            n = min(n, self.p.samples - start)
            if n <= 0:
                return False
        phase = self._step * np.arange(start, start + n, dtype=np.float64)
        sigma = np.sqrt(self.p.noise_power)
        if self.p.dtype == "complex64":
            x = self.p.amplitude * np.exp(1j * phase)
            if sigma:
                x = x + sigma * np.sqrt(0.5) * (self._rng.standard_normal(n)
                                                + 1j * self._rng.standard_normal(n))
            self.emit(x.astype(np.complex64))
        else:
            x = self.p.amplitude * np.cos(phase)
            if sigma:
                x = x + sigma * self._rng.standard_normal(n)
            self.emit(x.astype(np.float32))
        return True


class Gain(Block):
    """Multiply every sample by a constant gain."""

    kind = "gain"
    inputs = (Port("in", ("complex64", "float32")),)
    outputs = (Port("out", "same"),)
    params = (Param("gain_db", float, 0.0, unit="dB", low=-300, high=300,
                    doc="gain applied to every sample"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._g = np.float32(10 ** (self.p.gain_db / 20))
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        self.emit(chunk.samples * self._g, annotations=chunk.annotations)


class Discard(Block):
    """Count and drop everything: a sink for benches and tests."""

    kind = "discard"
    inputs = (Port("in", "any"),)
    params = (Param("delay_s", float, 0.0, unit="s", low=0, high=10,
                    doc="sleep this long per chunk (simulates a slow consumer)"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._count = 0
        return {}

    def process(self, chunk: Chunk) -> None:
        if self.p.delay_s:
            time.sleep(self.p.delay_s)
        self._count += len(chunk)

    def readings(self) -> dict[str, int]:
        return {"samples": self._count}
