"""Detector blocks: OOK energy detection, 2-FSK tone correlation, DBPSK/DQPSK differential.

Each takes the ``timing`` block's output (complex64, ``samples_per_symbol`` samples per symbol,
sample ``S*k`` starting symbol ``k``) and puts hard bits on port ``bits`` (uint8) and soft
values on port ``soft`` (float32, positive = 1), both at the bit rate. A discontinuity on the
input (a chunk whose ``start`` skips ahead, or a ``"gap"`` annotation) restarts the detector
and is passed on as a ``"gap"`` annotation at the bit where it happened.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np

from blocks._dpsk_detect import dpsk_detect
from blocks._energy_detect import EnergyState, OokLevels, energy_detect
from blocks._fsk_detect import fsk_detect, tone_matrix
from stream.block import Block, Port, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["DpskDetect", "EnergyDetect", "FskDetect", "split_at_gaps"]

_SYMBOL_RATE = Param("symbol_rate", float, None, unit="Hz", low=0, low_open=True,
                     doc="symbol rate (default: input rate / samples per symbol)")


def split_at_gaps(chunk: Chunk, expected: int | None) -> list[tuple[np.ndarray, int, bool]]:
    """Cut a chunk where the stream is discontinuous.

    Parameters
    ----------
    chunk : Chunk
        An input chunk.
    expected : int or None
        The ``start`` a continuous chunk would have (None before the first chunk).

    Returns
    -------
    list of (samples, start, gap_before)
        Consecutive pieces; ``gap_before`` is true where the piece does not continue the one
        before it (a jump of ``start`` or a ``"gap"`` annotation at the piece's first sample).
    """
    continuous = expected is None or chunk.start == expected
    if continuous and not chunk.annotations:
        return [(chunk.samples, chunk.start, False)]
    cuts = sorted({a.index for a in chunk.annotations
                   if a.label == "gap" and chunk.start <= a.index < chunk.stop})
    first_gap = not continuous or (bool(cuts) and cuts[0] == chunk.start)
    edges = [chunk.start, *(c for c in cuts if c > chunk.start), chunk.stop]
    pieces = []
    for i, (a, b) in enumerate(itertools.pairwise(edges)):
        samples = chunk.samples[a - chunk.start:b - chunk.start]
        pieces.append((samples, a, first_gap if i == 0 else True))
    return pieces


class _Detector(Block):
    """Shared plumbing of the detectors: rates, finite-input check, gaps, two outputs."""

    inputs = (Port("in", "complex64", "symbol samples from the timing block"),)
    outputs = (Port("bits", "uint8", "hard decisions, one per bit"),
               Port("soft", "float32", "soft decisions, positive = 1", optional=True))
    #: Samples per symbol on the input and bits per symbol on the output (set in setup).
    sps: int = 1
    bits_per_symbol: int = 1

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = inputs["in"].rate
        symbol_rate = rate / self.sps
        if self.p.symbol_rate is not None:
            if abs(self.p.symbol_rate - symbol_rate) > 1e-6 * symbol_rate:
                raise ParamError(
                    "symbol_rate",
                    f"the input runs at {rate:g} samples/s, i.e. {symbol_rate:g} symbols/s "
                    f"at {self.sps} samples per symbol (got {self.p.symbol_rate:g})")
            symbol_rate = float(self.p.symbol_rate)
        self.symbol_rate = symbol_rate
        self._expected: int | None = None
        self._symbols = 0
        bit_rate = symbol_rate * self.bits_per_symbol
        return {"bits": StreamSpec("uint8", bit_rate), "soft": StreamSpec("float32", bit_rate)}

    def process(self, chunk: Chunk) -> None:
        bad = ~np.isfinite(chunk.samples)
        if bad.any():
            raise ValueError(f"block {self.id!r}: input sample {chunk.start + int(np.argmax(bad))}"
                             " is NaN or infinite")
        for samples, start, gap in split_at_gaps(chunk, self._expected):
            notes: tuple[Annotation, ...] = ()
            if gap:
                self._out(*self._detect(np.zeros(0, np.complex64), start, final=True))
                self._restart(start)
                notes = (Annotation(self.position("bits"), "gap",
                                    {"input_index": int(start)}),)
            self._out(*self._detect(samples, start, final=False), notes)
        self._expected = chunk.stop

    def finish(self) -> None:
        self._out(*self._detect(np.zeros(0, np.complex64), self._expected or 0, final=True))

    def _out(self, bits: np.ndarray, soft: np.ndarray,
             notes: tuple[Annotation, ...] = ()) -> None:
        self._symbols += bits.shape[0] // self.bits_per_symbol
        self.emit(bits, port="bits", annotations=notes)
        self.emit(soft, port="soft",
                  annotations=tuple(n.moved(self.position("soft")) for n in notes))

    def _detect(self, samples: np.ndarray, start: int, final: bool,
                ) -> tuple[np.ndarray, np.ndarray]:
        """Run the kernel on one continuous piece; return (bits, soft)."""
        raise NotImplementedError

    def _restart(self, start: int) -> None:
        """Forget the kernel state after a discontinuity before input sample ``start``."""
        raise NotImplementedError


class EnergyDetect(_Detector):
    """Decide OOK symbols by their energy against a threshold adapted to the signal."""

    kind = "energy_detect"
    params = (
        _SYMBOL_RATE,
        Param("window", int, 256, unit="symbols", low=16, high=1 << 16,
              doc="symbols per level-estimation window (decisions lag by up to one window)"),
        Param("false_alarm", float, 1e-3, low=1e-12, high=0.5,
              doc="probability of deciding 1 on noise alone, used in windows without signal"),
        Param("min_contrast_db", float, 10.0, unit="dB", low=3.0, high=40.0,
              doc="least on/off level ratio for a window to count as carrying a signal"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._contrast = 10.0 ** (self.p.min_contrast_db / 10.0)
        self._state: EnergyState | None = None
        self._last: OokLevels | None = None
        return super().setup(inputs)

    def _detect(self, samples: np.ndarray, start: int, final: bool,
                ) -> tuple[np.ndarray, np.ndarray]:
        bits, soft, levels, self._state = energy_detect(
            samples, self.p.window, self.p.false_alarm, self._contrast, self._state, final)
        if levels:
            self._last = levels[-1]
        return bits, soft

    def _restart(self, start: int) -> None:
        self._state = None

    def readings(self) -> dict[str, Any]:
        out: dict[str, Any] = {"symbols": self._symbols}
        lv = self._last
        if lv is not None:
            out.update(noise_floor=lv.noise_floor, on_level=lv.on_level,
                       threshold=lv.threshold, signal=int(lv.signal),
                       ones=lv.ones, zeros=lv.zeros, ones_mean=lv.ones_mean,
                       ones_var=lv.ones_var, zeros_mean=lv.zeros_mean, zeros_var=lv.zeros_var)
        return {k: (None if isinstance(v, float) and math.isnan(v) else v)
                for k, v in out.items()}


class FskDetect(_Detector):
    """Decide 2-FSK symbols by the larger of two tone-correlator energies (upper tone = 1)."""

    kind = "fsk_detect"
    params = (
        _SYMBOL_RATE,
        Param("samples_per_symbol", int, REQUIRED, unit="samples", low=2, high=1024,
              doc="input samples per symbol (the timing block's samples_per_symbol_out)"),
        Param("deviation_hz", float, REQUIRED, unit="Hz", low=0, low_open=True,
              doc="tone offset from the centre; tones at -deviation_hz (0) and +deviation_hz (1)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self.sps = self.p.samples_per_symbol
        rate = inputs["in"].rate
        if not rate > 2 * self.p.deviation_hz:
            raise ParamError("deviation_hz", f"must be below half the input rate {rate / 2:g} Hz "
                             f"(got {self.p.deviation_hz:g})")
        self._tones = tone_matrix(self.sps, self.p.deviation_hz, rate)
        self._rest: np.ndarray | None = None
        self._skip = 0
        return super().setup(inputs)

    def _detect(self, samples: np.ndarray, start: int, final: bool,
                ) -> tuple[np.ndarray, np.ndarray]:
        drop = min(self._skip, samples.shape[0])   # samples before the next symbol boundary
        self._skip -= drop
        bits, soft, self._rest = fsk_detect(samples[drop:], self._tones, self._rest)
        return bits, soft

    def _restart(self, start: int) -> None:
        self._rest = None
        self._skip = -start % self.sps


class DpskDetect(_Detector):
    """Differentially detect DBPSK or pi/4-DQPSK symbols (one sample per symbol)."""

    kind = "dpsk_detect"
    params = (
        _SYMBOL_RATE,
        Param("modulation", str, "dbpsk", choices=("dbpsk", "dqpsk"),
              doc="dbpsk, or dqpsk for pi/4-DQPSK (two bits per symbol, Gray coded)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self.bits_per_symbol = 2 if self.p.modulation == "dqpsk" else 1
        self._last: np.ndarray | None = None
        return super().setup(inputs)

    def _detect(self, samples: np.ndarray, start: int, final: bool,
                ) -> tuple[np.ndarray, np.ndarray]:
        bits, soft, self._last = dpsk_detect(samples, self.p.modulation, self._last)
        return bits, soft

    def _restart(self, start: int) -> None:
        self._last = None
