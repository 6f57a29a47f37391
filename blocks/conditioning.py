"""Conditioning blocks: mixer, matched filter, decimation, DC removal, gain normalisation.

They sit between a source and the synchronisation blocks. Each is a thin wrapper that designs
its kernel once in ``setup`` and carries the kernel state from chunk to chunk, so any chunking
of the input gives the same output. Annotations are carried across, moved by the block's
delay and rate change (see :class:`PendingNotes`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

import numpy as np

from blocks._agc import PowerWindowState, rms_normalise
from blocks._dcblock import dc_block, dc_block_design
from blocks._fir import FirState, antialias_taps, fir_decimate
from blocks._mixer import frequency_shift, tone_row
from blocks._pulses import gaussian_taps, rect_taps, rrc_taps
from stream.block import Block, Port, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["Agc", "DcBlock", "Decimate", "MatchedFilter", "Mixer", "PendingNotes",
           "require_finite"]

_IQ_OR_REAL = ("complex64", "float32")


def require_finite(block: Block, chunk: Chunk) -> None:
    """Raise ``ValueError`` naming the first NaN or infinite input sample of a chunk.

    Used by blocks whose state would carry a bad sample into every later output. A finite
    sum of the squares of all the values proves them all finite (a NaN or an infinity makes
    any such sum NaN or infinite), so only a chunk whose sum is not finite is searched sample
    by sample. The sum is one BLAS dot product of the values with themselves, a quarter of
    the time of ``numpy.add.reduce`` over a 64k chunk (pairwise summation) on the project's
    test machine; a finite chunk whose squares overflow is searched and passes.
    """
    x = np.asarray(chunk.samples)
    flat = x.reshape(-1)
    parts = flat.view(flat.real.dtype) if np.iscomplexobj(flat) else flat
    with np.errstate(over="ignore", invalid="ignore"):
        total = np.dot(parts, parts)
    if np.isfinite(total):
        return
    bad = ~np.isfinite(x)
    if bad.any():
        raise ValueError(f"block {block.id!r}: input sample {chunk.start + int(np.argmax(bad))}"
                         " is NaN or infinite")


class PendingNotes:
    """Annotations waiting for the output sample they have been moved to.

    A block with a delay or a rate change maps each input annotation to an output index that
    may lie beyond what it has emitted so far; ``due`` hands each one over with the output
    chunk that holds its index, ``rest`` the ones left at end of stream.
    """

    def __init__(self) -> None:
        self._held: list[Annotation] = []

    def add(self, notes: Iterable[Annotation]) -> None:
        """Hold annotations already moved to their output index."""
        self._held.extend(notes)

    def due(self, stop: int) -> tuple[Annotation, ...]:
        """Remove and return the held annotations whose index is below ``stop``."""
        out = tuple(a for a in self._held if a.index < stop)
        if out:
            self._held = [a for a in self._held if a.index >= stop]
        return out

    def rest(self, at: int) -> tuple[Annotation, ...]:
        """Remove and return everything held, indices beyond ``at`` moved to ``at``."""
        out = tuple(a if a.index <= at else a.moved(at) for a in self._held)
        self._held = []
        return out


class Mixer(Block):
    """Shift the spectrum by a fixed frequency with a phase-continuous oscillator."""

    kind = "mixer"
    inputs = (Port("in", "complex64", "IQ samples"),)
    outputs = (Port("out", "complex64", "IQ samples, frequency-shifted"),)
    params = (Param("offset_hz", float, 0.0, unit="Hz",
                    doc="shift applied: a component at f Hz comes out at f + offset_hz "
                        "(use -f to bring a signal at +f to 0 Hz)"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = inputs["in"].rate
        if not abs(self.p.offset_hz) < rate / 2:
            raise ParamError("offset_hz", f"must be below half the sample rate {rate / 2:g} Hz "
                                          f"in magnitude (got {self.p.offset_hz:g})")
        self._cycles = self.p.offset_hz / rate
        self._row = tone_row(self._cycles)
        self._phase = 0.0
        return {"out": StreamSpec("complex64", rate)}

    def process(self, chunk: Chunk) -> None:
        y, self._phase = frequency_shift(chunk.samples, self._cycles, self._phase, self._row)
        self.emit(y, annotations=chunk.annotations)


class _FirBlock(Block):
    """Shared plumbing of the FIR blocks: taps and factor from setup, delay, flush at end."""

    inputs = (Port("in", _IQ_OR_REAL, "samples"),)
    outputs = (Port("out", "same", "filtered samples"),)
    _taps: np.ndarray
    _factor: int = 1

    def _start(self, spec: StreamSpec, taps: np.ndarray, factor: int) -> dict[str, StreamSpec]:
        self._taps = np.asarray(taps, dtype=np.float32)
        self._taps.setflags(write=False)
        self._factor = factor
        self._dtype = np.dtype(spec.dtype)
        self._state: FirState | None = None
        self._notes = PendingNotes()
        #: Group delay of the (symmetric) filter in input samples.
        self.delay = (self._taps.shape[0] - 1) / 2.0
        return {"out": StreamSpec(spec.dtype, spec.rate / factor)}

    def _out_index(self, index: int) -> int:
        """First output sample at or after the instant where input ``index`` comes out."""
        return math.ceil((index + self.delay) / self._factor)

    def _run(self, x: np.ndarray, notes: tuple[Annotation, ...]) -> None:
        self._notes.add(a.moved(self._out_index(a.index)) for a in notes)
        y, self._state = fir_decimate(x, self._taps, self._factor, self._state)
        self.emit(y, annotations=self._notes.due(self.position() + y.shape[0]))

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        self._run(chunk.samples, chunk.annotations)

    def finish(self) -> None:
        """Push the filter delay's worth of zeros through so the last input comes out."""
        self._run(np.zeros(math.ceil(self.delay), dtype=self._dtype), ())
        self.emit(np.zeros(0, dtype=self._dtype), annotations=self._notes.rest(self.position()))

    def readings(self) -> dict[str, Any]:
        return {"taps": int(self._taps.shape[0]),
                "delay_samples": self.delay / self._factor}


class MatchedFilter(_FirBlock):
    """Filter with the matched filter of the transmitted pulse (rect, Gaussian or RRC)."""

    kind = "matched_filter"
    params = (
        Param("shape", str, "rrc", choices=("rect", "gaussian", "rrc"),
              doc="pulse shape: rect (NRZ), gaussian or rrc (root raised cosine)"),
        Param("symbol_rate", float, REQUIRED, unit="Hz", low=0, low_open=True,
              doc="symbol rate; taps are designed for input rate / symbol_rate samples/symbol"),
        Param("rolloff", float, 0.35, low=0, high=1, doc="rrc roll-off factor"),
        Param("bt", float, 0.5, low=0, low_open=True, high=10,
              doc="gaussian pulse bandwidth-time product"),
        Param("span_symbols", int, 8, unit="symbols", low=1, high=64,
              doc="length of rrc and gaussian taps"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Design the taps: the pulse scaled to unit energy.

        Unit energy (``sum(taps**2) == 1``) keeps the noise variance per sample unchanged,
        and a symbol sent as ``a * p`` with ``p`` the unit-energy pulse of ``blocks/_pulses.py``
        comes out as ``a`` at the optimum instant (common practice for a matched filter).
        The delay is ``(len(taps) - 1) / 2`` input samples; annotations move with it.
        """
        spec = inputs["in"]
        sps = spec.rate / self.p.symbol_rate
        if sps < 1:
            raise ParamError("symbol_rate", f"must not exceed the input rate {spec.rate:g} Hz "
                                            f"(got {self.p.symbol_rate:g})")
        if self.p.shape == "rrc":
            taps = rrc_taps(sps, self.p.rolloff, self.p.span_symbols)
        elif self.p.shape == "gaussian":
            taps = gaussian_taps(sps, self.p.bt, self.p.span_symbols)
        else:
            taps = rect_taps(sps)
        taps = taps / np.sqrt(np.sum(taps**2))
        return self._start(spec, taps, 1)


class Decimate(_FirBlock):
    """Low-pass filter and keep every factor-th sample (polyphase: only kept outputs computed)."""

    kind = "decimate"
    params = (
        Param("factor", int, REQUIRED, low=1, high=4096, doc="decimation factor"),
        Param("cutoff_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="anti-alias cut-off (default: the output Nyquist frequency)"),
        Param("taps", int, None, low=1, high=1 << 16,
              doc="anti-alias filter length (default: 20 * factor + 1)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Design a Kaiser-window low-pass (``blocks._fir.antialias_taps``)."""
        spec = inputs["in"]
        nyquist = spec.rate / 2
        cutoff = None
        if self.p.cutoff_hz is not None:
            if not self.p.cutoff_hz < nyquist:
                raise ParamError("cutoff_hz", f"must be below half the input rate {nyquist:g} "
                                              f"Hz (got {self.p.cutoff_hz:g})")
            cutoff = self.p.cutoff_hz / nyquist
        taps = antialias_taps(self.p.factor, cutoff, self.p.taps)
        return self._start(spec, taps, self.p.factor)


class DcBlock(Block):
    """Remove DC with a first-order high-pass IIR (corner frequency in Hz)."""

    kind = "dc_block"
    inputs = (Port("in", _IQ_OR_REAL, "samples"),)
    outputs = (Port("out", "same", "samples without DC"),)
    params = (Param("corner_hz", float, 100.0, unit="Hz", low=0, low_open=True,
                    doc="-3 dB corner; place before the mixer, where the wanted signal "
                        "is away from 0 Hz"),)

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = inputs["in"].rate
        if not self.p.corner_hz < rate / 2:
            raise ParamError("corner_hz", f"must be below half the sample rate {rate / 2:g} Hz "
                                          f"(got {self.p.corner_hz:g})")
        self._b, self._a = dc_block_design(self.p.corner_hz, rate)
        self._zi: np.ndarray | None = None
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        y, self._zi = dc_block(chunk.samples, self._b, self._a, self._zi)
        self.emit(y, annotations=chunk.annotations)


class Agc(Block):
    """Normalise the level by the RMS over a causal sliding window (feedforward, no loop)."""

    kind = "agc"
    inputs = (Port("in", _IQ_OR_REAL, "samples"),)
    outputs = (Port("out", "same", "samples at the target RMS level"),)
    params = (
        Param("window_s", float, 0.01, unit="s", low=0, low_open=True, high=60,
              doc="length of the power-averaging window"),
        Param("level", float, 1.0, low=0, low_open=True, doc="output RMS level"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._window = max(1, round(self.p.window_s * inputs["in"].rate))
        self._state: PowerWindowState | None = None
        self._gain = 0.0
        return super().setup(inputs)

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        y, gain, self._state = rms_normalise(chunk.samples, self._window, self.p.level,
                                             self._state)
        if gain.shape[0]:
            self._gain = float(gain[-1])
        self.emit(y, annotations=chunk.annotations)

    def readings(self) -> dict[str, Any]:
        out: dict[str, Any] = {"window_samples": self._window}
        if self._gain > 0:
            out["gain_db"] = 20 * math.log10(self._gain)
        return out
