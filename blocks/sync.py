"""Feedforward synchronisation blocks: carrier frequency offset and symbol timing.

Both estimate over windows aligned to the absolute sample index and correct afterwards; there
is no loop. Each therefore holds back up to about one estimation window of samples (its
latency), and gives the same output for any chunking of its input. Annotations (a ``"gap"``
among them) are passed on at the output sample that holds their input instant; a gap does not
restart the estimators, so the window that straddles it gives one poorer estimate.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from blocks._cfo import (
    CorrelatorState,
    design_lag_estimator,
    offset_from_correlation,
    windowed_lag_correlation,
)
from blocks._mixer import oscillator, tone_row
from blocks._scratch import HeldSamples, work_array
from blocks._timing import (
    LineState,
    ToneMetricState,
    cubic_interpolate,
    segment_strobes,
    spectral_line,
    timing_phase,
    tone_metric,
    unwrap_phase,
)
from blocks.conditioning import PendingNotes, require_finite
from stream.block import Block, Port, StreamSpec
from stream.chunk import Chunk
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["Cfo", "Timing"]

_SYMBOL_RATE = Param("symbol_rate", float, REQUIRED, unit="Hz", low=0, low_open=True,
                     doc="nominal symbol rate")
# Knots of the timing track used for the clock-error reading.
_CLOCK_FIT_KNOTS = 16


class Cfo(Block):
    """Estimate the carrier frequency offset per window and remove it (feedforward)."""

    kind = "cfo"
    inputs = (Port("in", "complex64", "IQ samples before the matched filter"),)
    outputs = (Port("out", "complex64", "IQ samples with the offset removed"),)
    params = (
        _SYMBOL_RATE,
        Param("max_offset_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="largest offset to handle (default: a quarter of the symbol rate)"),
        Param("deviation_hz", float, 0.0, unit="Hz", low=0,
              doc="2-FSK peak deviation (0 for ook, dbpsk, dqpsk)"),
        Param("window_symbols", int, 8192, unit="symbols", low=16, high=1 << 22,
              doc="estimation window; also the block's latency"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Design the lag estimator (``blocks._cfo.design_lag_estimator``).

        Place the block before the matched filter (a filter matched to the unshifted pulse
        would cut the shifted spectrum unevenly and bias the estimate) and after any DC
        removal (a DC spike pulls the estimate towards 0 Hz). Each window of
        ``window_symbols`` symbols is derotated with its own estimate, the oscillator phase
        running on continuously across windows, so the block's latency is one window.
        """
        rate = inputs["in"].rate
        rs = self.p.symbol_rate
        max_offset = 0.25 * rs if self.p.max_offset_hz is None else self.p.max_offset_hz
        try:
            self._design = design_lag_estimator(rate, rs, max_offset, self.p.deviation_hz)
        except ValueError as err:
            raise ParamError("max_offset_hz", f"{err} (input rate {rate:g} Hz)") from None
        self._rate = rate
        self._window = max(1, round(self.p.window_symbols * rate / rs))
        self._corr: CorrelatorState | None = None
        # Chunks not yet released; the last _fresh of them (_fresh_count samples) are not yet
        # correlated: they are correlated together once they complete a window, so the
        # prefilter runs on about a window at a time whatever the chunk size.
        self._held: list[np.ndarray] = []
        self._held_count = 0
        self._fresh = 0
        self._fresh_count = 0
        self._phase = 0.0
        self._estimate = 0.0
        self._windows = 0
        self._notes = PendingNotes()
        return {"out": StreamSpec("complex64", rate)}

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        self._notes.add(chunk.annotations)
        self._held.append(chunk.samples)
        self._held_count += len(chunk)
        self._fresh += 1
        self._fresh_count += len(chunk)
        filled = self._corr.window.filled if self._corr is not None else 0
        if filled + self._fresh_count >= self._window:
            self._correlate()

    def _correlate(self) -> None:
        """Correlate the fresh samples; derotate and emit each window they complete."""
        fresh = self._held[len(self._held) - self._fresh:]
        if len(fresh) == 1:
            x = fresh[0]
        else:
            x = np.concatenate(fresh, out=work_array("cfo.fresh", self._fresh_count,
                                                     np.complex64))
        self._fresh = self._fresh_count = 0
        sums, self._corr = windowed_lag_correlation(x, self._design, self._window, self._corr)
        for r in sums:
            self._estimate = float(offset_from_correlation(r, self._design.lag, self._rate))
            self._windows += 1
            self._release(self._window)

    def finish(self) -> None:
        """Correct the last, incomplete window with its own estimate (if it has one)."""
        if self._fresh:
            self._correlate()
        if self._corr is not None and self._corr.window.partial != 0:
            self._estimate = float(offset_from_correlation(self._corr.window.partial,
                                                           self._design.lag, self._rate))
        self._release(self._held_count)
        self.emit(np.zeros(0, np.complex64), annotations=self._notes.rest(self.position()))

    def _release(self, count: int) -> None:
        """Derotate and emit the oldest ``count`` held samples with the current estimate."""
        if count == 0:
            return
        cycles = -self._estimate / self._rate
        # the oscillator, multiplied in place by the held chunks (blocks._mixer.frequency_shift
        # without joining them first)
        y, self._phase = oscillator(count, cycles, self._phase, tone_row(cycles))
        at = 0
        while at < count:
            piece = self._held[0]
            take = min(piece.shape[0], count - at)
            np.multiply(y[at:at + take], piece[:take], out=y[at:at + take])
            if take < piece.shape[0]:
                self._held[0] = piece[take:]
            else:
                del self._held[0]
            at += take
        self._held_count -= count
        self.emit(y, annotations=self._notes.due(self.position() + y.shape[0]))

    def readings(self) -> dict[str, Any]:
        return {"cfo_hz": self._estimate, "windows": self._windows,
                "lag_samples": self._design.lag,
                "unambiguous_hz": self._design.unambiguous_hz}


class Timing(Block):
    """Recover symbol timing (Oerder & Meyr spectral line) and resample at the strobes."""

    kind = "timing"
    inputs = (Port("in", "complex64", "matched-filter output (or raw 2-FSK for metric tones)"),)
    outputs = (Port("out", "complex64", "samples_per_symbol_out samples per symbol"),)
    params = (
        _SYMBOL_RATE,
        Param("samples_per_symbol_out", int, 1, unit="samples", low=1, high=64,
              doc="1: one sample per symbol at the optimum instant; S > 1: S samples spanning "
                  "each symbol"),
        Param("window_symbols", int, 512, unit="symbols", low=16, high=1 << 20,
              doc="estimation window; keep clock error * window_symbols well below 0.5"),
        Param("metric", str, "envelope", choices=("envelope", "tones"),
              doc="envelope: |x|^2 after a matched filter; tones: 2-FSK tone correlators"),
        Param("deviation_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="2-FSK peak deviation (required for metric tones)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Check the rates and lay out the strobe instants of one symbol.

        With ``metric = "envelope"`` the spectral line of ``|x|**2`` peaks at the matched
        filter's optimum instant ``t_k``; the ``S`` output samples of symbol ``k`` are taken at
        ``t_k + ((s + 1/2) / S - 1/2) T``, ``s = 0 .. S - 1`` (just ``t_k`` for ``S = 1``).
        With ``metric = "tones"`` the line peaks at the last sample of each symbol, ``e_k``;
        the symbol's samples are ``e_k - T + 1 .. e_k`` and the output instants
        ``e_k - T + 1/2 + (s + 1/2) T / S``, i.e. the original samples when ``S = T``.
        The latency is about 1.5 windows.
        """
        rate = inputs["in"].rate
        rs = self.p.symbol_rate
        sps = rate / rs
        if sps < 2:
            raise ParamError("symbol_rate", f"needs at least 2 input samples per symbol "
                                            f"(input {rate:g} Hz, got {rs:g})")
        tones = self.p.metric == "tones"
        if tones and self.p.deviation_hz is None:
            raise ParamError("deviation_hz", "is required with metric 'tones'")
        if tones and not self.p.deviation_hz < rate / 2:
            raise ParamError("deviation_hz", f"must be below half the input rate {rate / 2:g} "
                                             f"Hz (got {self.p.deviation_hz:g})")
        s_out = self.p.samples_per_symbol_out
        fraction = (np.arange(s_out) + 0.5) / s_out
        self._offsets = fraction * sps + (0.5 - sps if tones else -0.5 * sps)
        # (instant, 1) @ _spread = instant + offsets, row by row (exact: products with 1)
        self._spread = np.vstack((np.ones(s_out), self._offsets))
        self._sps = sps
        self._tones = tones
        self._cycles = rs / rate
        self._row = tone_row(-self._cycles)
        self._window = max(1, round(self.p.window_symbols * sps))
        self._line: LineState | None = None
        self._metric_state: ToneMetricState | None = None
        self._input = HeldSamples()                     # input not yet done with
        self._consumed = 0
        self._knots: list[tuple[float, float]] = []
        # Start of the next strobe segment and the phase there (None: no knot yet).
        self._seg_start = 1.0 - float(self._offsets[0])
        self._seg_theta: float | None = None
        self._next_symbol: int | None = None
        # Strobe instants (one per symbol) of the segments found in this call, interpolated
        # together by _flush; input before _keep_from (absolute) is no longer needed after that.
        self._when: list[np.ndarray] = []
        self._keep_from = 0
        self._symbols = 0
        self._notes = PendingNotes()
        return {"out": StreamSpec("complex64", rs * s_out)}

    def _metric(self, x: np.ndarray) -> np.ndarray:
        if not self._tones:
            pairs = x.view(np.float32)
            squares = np.multiply(pairs, pairs, dtype=np.float64,
                                  out=work_array("timing.squares", pairs.shape[0], np.float64))
            return np.add(squares[0::2], squares[1::2],
                          out=work_array("timing.metric", x.shape[0], np.float64))
        z, self._metric_state = tone_metric(x, self.p.deviation_hz / self.input_specs["in"].rate,
                                            max(1, round(self._sps)), self._metric_state)
        return z

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        self._notes.add(chunk.annotations)
        x = chunk.samples
        self._input.append(x)
        first_window = self._consumed // self._window
        self._consumed += x.shape[0]
        sums, self._line = spectral_line(self._metric(x), self._cycles, self._window,
                                         self._line, self._row)
        if sums.shape[0]:
            centres = (first_window + np.arange(sums.shape[0])) * self._window \
                + (self._window - 1) / 2.0
            self._add_knots(centres, timing_phase(sums))
        self._flush()

    def finish(self) -> None:
        """Use the incomplete last window, then strobe up to the end of the input."""
        if self._line is not None and self._line.window.filled and (
                not self._knots or 2 * self._line.window.filled >= self._window):
            filled = self._line.window.filled
            end = self._input.end
            self._add_knots(np.array([end - (filled + 1) / 2.0]),
                            np.array([timing_phase(self._line.window.partial)]))
        if self._knots:
            last = self._input.end - 3 - float(self._offsets[-1])
            if last > self._seg_start:
                self._strobe(np.array([last]), np.array([self._knots[-1][1]]))
        self._flush()
        self.emit(np.zeros(0, np.complex64), annotations=self._notes.rest(self.position()))

    def _add_knots(self, centres: np.ndarray, thetas: np.ndarray) -> None:
        """Unwrap the window phases onto the track and strobe up to the new knots."""
        previous = self._knots[-1][1] if self._knots else None
        track = np.empty(thetas.shape[0])
        for i, theta in enumerate(thetas.tolist()):
            previous = track[i] = unwrap_phase(theta, previous)
        self._knots.extend(zip(centres.tolist(), track.tolist(), strict=True))
        del self._knots[:-_CLOCK_FIT_KNOTS]
        ahead = centres > self._seg_start
        if ahead.any():
            self._strobe(centres[ahead], track[ahead])

    def _strobe(self, ends: np.ndarray, theta_ends: np.ndarray) -> None:
        """Schedule the symbols whose strobes lie between the segment start and each end."""
        theta_start = theta_ends[0] if self._seg_theta is None else self._seg_theta
        starts = np.concatenate(([self._seg_start], ends[:-1]))
        first, instants = segment_strobes(starts, ends,
                                          np.concatenate(([theta_start], theta_ends[:-1])),
                                          theta_ends, self._sps)
        if self._next_symbol is not None and first != self._next_symbol:
            raise RuntimeError(f"block {self.id!r}: timing track lost continuity "
                               f"(symbol {first}, expected {self._next_symbol})")
        self._next_symbol = first + instants.shape[0]
        self._seg_start, self._seg_theta = float(ends[-1]), float(theta_ends[-1])
        if not instants.shape[0]:
            return
        self._when.append(instants)
        self._symbols += instants.shape[0]
        # the next strobe lies at or after the last end
        self._keep_from = math.floor(self._seg_start + self._offsets[0]) - 2

    def _flush(self) -> None:
        """Interpolate and emit the scheduled strobes in one go, then drop input done with."""
        if self._when:
            instants = np.concatenate(self._when) if len(self._when) > 1 else self._when[0]
            self._when = []
            # the output instants relative to the buffer, symbol after symbol
            rows = np.empty((instants.shape[0], 2))
            rows[:, 0] = instants - self._input.start
            rows[:, 1] = 1.0
            when = np.matmul(rows, self._spread, out=work_array(
                "timing.when", (instants.shape[0], self._spread.shape[1]), np.float64)).reshape(-1)
            y = cubic_interpolate(self._input.samples, when)
            due = self._notes.due(self._input.start + math.floor(when[-1]) + 1)
            start = self.position()
            notes = tuple(a.moved(start + int(np.searchsorted(when, a.index - self._input.start)))
                          for a in due)
            self.emit(y, annotations=notes)
        self._input.drop_before(self._keep_from)

    def readings(self) -> dict[str, Any]:
        out: dict[str, Any] = {"symbols": self._symbols}
        if self._knots:
            out["timing_phase"] = self._knots[-1][1] % 1.0
        if len(self._knots) >= 2:
            t, theta = np.array(self._knots).T
            slope = np.polyfit(t, theta, 1)[0]
            out["clock_ppm"] = float(-1e6 * slope * self._sps)
        return out
