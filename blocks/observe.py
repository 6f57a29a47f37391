"""Observation meters: the eye diagram, the averaged spectrum and the Eb/N0 estimate.

They end a branch of the pipeline (usually a tap, so watching never slows the receiver) and
emit nothing: small figures go to ``readings`` (the status lines), the eye histogram and the
spectrum to ``views`` (the monitor page, ``/status`` and snapshots). Each estimates over
windows aligned to the absolute sample index, so any chunking gives the same figures.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any

import numpy as np

from blocks._eye import (
    QUANTITIES,
    eye_opening,
    histogram_add,
    q_factor,
    trace_quantity,
    trace_starts,
)
from blocks._fsk_detect import tone_matrix
from blocks._mixer import tone_row
from blocks._scratch import HeldSamples, work_array
from blocks._snr import OokFit, m2m4_powers, ook_level_fit, tone_pair_energies
from blocks._spectrum import SpectrumState, design_window, periodograms, update_average
from blocks._timing import LineState, spectral_line, timing_phase, tone_metric
from blocks._windows import WindowState
from blocks.conditioning import require_finite
from stream.block import Block, Port, StreamSpec
from stream.chunk import Chunk
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["Eye", "SnrEstimate", "Spectrum"]

#: Level axis of the automatic range, in units of the window's reference level (see Eye).
_AUTO_RANGE = {"envelope": (0.0, 2.5), "differential": (-2.0, 2.0)}
#: A window whose reference level differs from the held one by more than this factor (in
#: amplitude) restarts the histogram on a new range.
_RERANGE = 2.0
#: Trace values histogrammed per pass, bounding the temporaries of a large chunk (a pass of 512
#: to 2048 traces of 64 columns measured alike on the project's 2-core test machine, 256 slower).
_PASS_VALUES = 1 << 16
_UNITS = {"envelope": "amplitude", "frequency": "Hz", "differential": "power"}


def _db(value: float) -> float | None:
    """10 log10 of a positive figure; None where it has no finite value."""
    return 10.0 * math.log10(value) if value > 0 and math.isfinite(value) else None


class Eye(Block):
    """Eye diagram over two symbol periods, with its own spectral-line timing, its opening and Q."""

    kind = "eye"
    inputs = (Port("in", "complex64", "matched-filter output (2-FSK: the stream before timing)"),)
    params = (
        Param("symbol_rate", float, REQUIRED, unit="Hz", low=0, low_open=True,
              doc="nominal symbol rate"),
        Param("quantity", str, "envelope", choices=QUANTITIES,
              doc="envelope |y| (ook), frequency (2fsk) or differential Re(y conj y(t-T)) "
                  "(dbpsk, dqpsk)"),
        Param("deviation_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="2-FSK peak deviation (required for quantity frequency)"),
        Param("time_bins", int, 64, low=8, high=1024, doc="columns over two symbol periods"),
        Param("level_bins", int, 48, low=8, high=1024, doc="rows of the level axis"),
        Param("window_symbols", int, 256, unit="symbols", low=16, high=1 << 16,
              doc="timing estimation window; the histogram ages once per window"),
        Param("traces_per_window", int, 16, low=0, high=1 << 16,
              doc="traces drawn per window, evenly spread (0: every trace; the default draws "
                  "1 in 8 two-symbol traces, hundreds in the ageing histogram; each trace "
                  "costs time)"),
        Param("decay", float, 0.95, low=0, high=1, low_open=True,
              doc="weight kept by the histogram per window (1: never forget)"),
        Param("full_scale", float, None, low=0, low_open=True,
              doc="top of the level axis in the quantity's unit (default: automatic)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Lay out the grid and the timing estimator.

        The timing phase comes from the symbol-rate spectral line (Oerder & Meyr, as in the
        ``timing`` block, ``blocks._timing``) of ``|y|^2`` (peaking at the matched filter's
        optimum instant) or, for ``frequency``, of the 2-FSK tone metric (peaking at the last
        sample of each symbol, so the eye centre is half a symbol earlier). The level axis is
        ``0 .. 2.5`` times the rms amplitude (``envelope``) or ``-2 .. 2`` times the mean power
        (``differential``) of the first window, held until a window's level differs by more
        than a factor 2 (the histogram then restarts), or ``full_scale``; for ``frequency``
        it is ``-2 .. 2`` times the deviation.
        """
        rate = inputs["in"].rate
        p = self.p
        sps = rate / p.symbol_rate
        if sps < 2:
            raise ParamError("symbol_rate", f"needs at least 2 input samples per symbol "
                                            f"(input {rate:g} Hz, got {p.symbol_rate:g})")
        if p.quantity == "frequency":
            if p.deviation_hz is None:
                raise ParamError("deviation_hz", "is required with quantity 'frequency'")
            if not p.deviation_hz < rate / 2:
                raise ParamError("deviation_hz", f"must be below half the input rate "
                                 f"{rate / 2:g} Hz (got {p.deviation_hz:g})")
        self._rate, self._sps = rate, sps
        # frequency: phase advance over half a symbol, centred on the instant (module
        # blocks._eye); differential: the product with the symbol before.
        self._lag = {"envelope": 0.0, "frequency": 0.5 * sps, "differential": sps}[p.quantity]
        self._advance = 0.5 * self._lag if p.quantity == "frequency" else 0.0
        self._shift = (0.5 - 0.5 / sps) if p.quantity == "frequency" else 0.0
        self._cycles = p.symbol_rate / rate
        self._row = tone_row(-self._cycles)
        self._window = max(1, round(p.window_symbols * sps))
        self._windows_done = 0
        self._input = HeldSamples()
        self._pending = np.zeros(0)
        self._counts = np.zeros((p.level_bins, p.time_bins))
        self._range: tuple[float, float] | None = None
        self._reference = math.nan
        if p.quantity == "frequency":
            top = 2.0 * p.deviation_hz if p.full_scale is None else p.full_scale
            self._range = (-top, top)
        elif p.full_scale is not None:
            self._range = (0.0 if p.quantity == "envelope" else -p.full_scale, p.full_scale)
        self._traces = 0
        self._outside = 0
        # Columns at the optimum instants (1/2 and 3/2 symbol), within 1/32 symbol or one column.
        time = (np.arange(p.time_bins) + 0.5) * 2.0 / p.time_bins
        near = np.minimum(np.abs(time - 0.5), np.abs(time - 1.5))
        self._columns = np.flatnonzero(near <= max(1.0 / 32.0, 1.0 / p.time_bins) + 1e-12)
        return {}

    # -- stream ------------------------------------------------------------------------------
    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        if chunk.start != self._input.end:
            self._restart(chunk.start)
        self._input.append(chunk.samples)
        end = self._input.end
        self._close_windows(max(0, end // self._window - self._windows_done))
        self._trim()

    def finish(self) -> None:
        """Place the traces of the incomplete last window with its own timing estimate."""
        a = self._windows_done * self._window
        length = self._input.end - a
        if length > 0:
            theta, _ = self._timing(a, 1, length)
            starts, _ = trace_starts(theta, a, length, self._sps, self.p.traces_per_window)
            self._pending = np.concatenate((self._pending, starts))
            self._close_windows(0)
        self._pending = np.zeros(0)

    def _restart(self, start: int) -> None:
        """Go on at absolute sample ``start`` after a hole (chunks a tap dropped).

        The samples on either side are never joined: the traces of the window the hole cuts
        are placed as at the end of a stream, those that would span it are dropped, and the
        windows go on at the first whole one after ``start`` (windows and timing phase stay
        on the absolute index, so the eye's time axis holds across the hole). The histogram
        is kept.
        """
        self.finish()
        self._input.restart(start)
        self._windows_done = -(-start // self._window)

    def _timing(self, a: int, count: int, length: int) -> tuple[np.ndarray, np.ndarray | None]:
        """Timing phase of ``count`` windows of ``length`` samples from absolute sample ``a``.

        One symbol-rate spectral line per window, all windows in one call, over the held
        samples (the oscillator phase from the absolute index, the tone metric with the
        correlator's samples before ``a``), so the figures do not depend on the chunking (to
        rounding). Also returns each window's mean of ``|y|^2`` (None for ``frequency``).
        """
        off = a - self._input.start
        if self.p.quantity == "frequency":
            span = max(1, round(self._sps))
            lo = max(self._input.start, a - (span - 1))
            x = self._input.samples[lo - self._input.start:off + count * length]
            z = tone_metric(x, self.p.deviation_hz / self._rate, span)[0][a - lo:]
            power = None
        else:
            pairs = self._input.samples[off:off + count * length].view(np.float32)
            squares = work_array("eye.squares", pairs.shape[0], np.float64)
            np.multiply(pairs, pairs, out=squares)
            z = power = work_array("eye.power", count * length, np.float64)
            np.add(squares[0::2], squares[1::2], out=power)     # |y|^2
        start = LineState(WindowState(), (-self._cycles * a) % 1.0)
        sums, _ = spectral_line(z, self._cycles, length, start, self._row)
        theta = timing_phase(sums) - self._shift
        means = None if power is None else power.reshape(count, length).mean(axis=1)
        return theta, means

    def _rerange(self, mean_power: float) -> bool:
        """Take a new level range if a window's mean power is off the held one (True)."""
        ref = math.sqrt(mean_power) if self.p.quantity == "envelope" else mean_power
        ratio = ref / self._reference if self._range is not None else math.inf
        if self.p.quantity == "differential":
            ratio = math.sqrt(ratio)
        if 1.0 / _RERANGE <= ratio <= _RERANGE:
            return False
        low, high = _AUTO_RANGE[self.p.quantity]
        self._range, self._reference = (low * ref, high * ref), ref
        return True

    def _close_windows(self, count: int) -> None:
        """Close the next ``count`` whole windows and histogram every queued trace now ready.

        The same as closing them one at a time (age the histogram by ``decay``, restart it
        on a new level range if the window's level moved, queue the window's traces, and
        histogram each queued trace once its samples have all arrived, which is before the
        next window closes): a trace queued with window ``s`` of the ``count`` (``s = -1``:
        queued earlier) is added with weight ``decay ** (count - 1 - s)`` and the held
        histogram is aged by ``decay ** count``, unless a restart at window ``r`` drops the
        histogram and the traces of the windows before ``r``.
        """
        p = self.p
        starts = self._pending
        slots = np.full(starts.shape[0], -1, dtype=np.int64)
        ranges = [self._range]                          # ranges[s + 1]: in force for window s
        restart: int | None = None
        if count:
            a = self._windows_done * self._window
            theta, means = self._timing(a, count, self._window)
            auto = means is not None and p.full_scale is None
            for s, mean in enumerate(means.tolist() if auto else [0.0] * count):
                if mean > 0 and self._rerange(mean):
                    restart = s
                ranges.append(self._range)
            self._windows_done += count
            new, windows = trace_starts(theta, a, self._window, self._sps,
                                        p.traces_per_window)
            starts = np.concatenate((starts, new))
            slots = np.concatenate((slots, windows))
        ranged = [s for s in range(-1, count) if ranges[s + 1] is not None]
        if not ranged:                                  # no level range yet: keep them all
            self._pending = starts
            return
        # traces queued before the first range go with the window that set it
        np.maximum(slots, ranged[0], out=slots)
        end = self._input.end
        ready = starts + 2.0 * self._sps + self._advance <= end - 3
        self._pending = starts[~ready]
        starts, slots = starts[ready], slots[ready]
        # stream start: no history before the first sample
        keep = starts + self._advance - self._lag >= self._input.start + 1
        starts, slots = starts[keep], slots[keep]
        if restart is not None:
            self._counts[:] = 0.0
            self._traces = 0
        elif count and p.decay != 1.0:
            self._counts *= p.decay ** count
        live = slots >= (restart if restart is not None else -1)
        weights = None if p.decay == 1.0 else p.decay ** (count - 1 - slots)
        step = max(1, _PASS_VALUES // p.time_bins)
        for at in range(0, starts.shape[0], step):
            part = slice(at, at + step)
            values = trace_quantity(self._input.samples,
                                    starts[part] + self._advance - self._input.start,
                                    self._sps, p.time_bins, p.quantity, self._lag, self._rate)
            if not live[part].all():
                self._drop(values, slots[part], live[part], ranges)
                values = values[live[part]]
            w = None if weights is None else weights[part][live[part]]
            # the traces kept all go with the range in force after the last restart
            self._outside += histogram_add(self._counts, values, *ranges[-1], w)
        self._traces += int(np.count_nonzero(live))

    def _drop(self, values: np.ndarray, slots: np.ndarray, live: np.ndarray,
              ranges: list[tuple[float, float] | None]) -> None:
        """Count what falls outside the range of traces a later restart drops."""
        for s in np.unique(slots[~live]).tolist():
            scratch = np.zeros_like(self._counts)
            self._outside += histogram_add(scratch, values[slots == s], *ranges[s + 1])

    def _trim(self) -> None:
        upcoming = self._windows_done * self._window - 0.5 * self._sps
        oldest = min(float(self._pending.min()), upcoming) if self._pending.shape[0] \
            else upcoming
        self._input.drop_before(math.floor(min(oldest + self._advance - self._lag,
                                              self._windows_done * self._window - self._sps))
                               - 3)

    # -- figures -----------------------------------------------------------------------------
    def _axes(self) -> tuple[np.ndarray, np.ndarray]:
        p = self.p
        time = (np.arange(p.time_bins) + 0.5) * 2.0 / p.time_bins
        low, high = self._range if self._range is not None else (0.0, 1.0)
        levels = low + (np.arange(p.level_bins) + 0.5) * (high - low) / p.level_bins
        return time, levels

    def opening(self) -> tuple[float, float, float, float, float]:
        """Eye opening and the two level clusters (``blocks._eye.eye_opening``)."""
        return eye_opening(self._counts, self._axes()[1], self._columns)

    def readings(self) -> dict[str, Any]:
        opening, *clusters = self.opening()
        q = q_factor(*clusters)
        return {"eye_opening": None if math.isnan(opening) else opening,
                "eye_q": None if math.isnan(q) else q,
                "eye_traces": self._traces, "eye_outside": self._outside}

    def views(self) -> dict[str, Any]:
        """``counts[i][j]``: weight of level row ``i`` (ascending) in time column ``j``."""
        time, levels = self._axes()
        opening, mu0, s0, mu1, s1 = self.opening()

        def num(v: float) -> float | None:
            return None if math.isnan(v) else v

        return {
            "quantity": self.p.quantity,
            "unit": _UNITS[self.p.quantity],
            "time_symbols": [round(float(t), 6) for t in time],
            "levels": [float(v) for v in levels],
            "counts": np.round(self._counts, 3).tolist(),
            "traces": self._traces,
            "opening": num(opening),
            "q": num(q_factor(mu0, s0, mu1, s1)),
            "clusters": {"low_mean": num(mu0), "low_std": num(s0),
                         "high_mean": num(mu1), "high_std": num(s1)},
        }


class Spectrum(Block):
    """Averaged power spectral density (Welch), frequency axis around the tuned frequency."""

    kind = "spectrum"
    inputs = (Port("in", ("complex64", "float32"), "any sample stream"),)
    params = (
        Param("nfft", int, 1024, unit="bins", low=16, high=1 << 16,
              doc="segment length and number of frequency bins"),
        Param("overlap", float, 0.5, low=0, high=1, high_open=True,
              doc="fraction of a segment shared with the next"),
        Param("window", str, "hann", choices=("hann", "hamming", "blackmanharris", "boxcar"),
              doc="segment window"),
        Param("average", int, 64, unit="segments", low=0, high=1 << 20,
              doc="time constant of the exponential average (0: average every segment "
                  "equally, Welch's method)"),
        Param("center_hz", float, 0.0, unit="Hz",
              doc="frequency the stream is tuned to (the axis is centred on it)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Design the window (``blocks._spectrum.design_window``)."""
        rate = inputs["in"].rate
        nfft = self.p.nfft
        self._win, self._scale, self._enbw = design_window(nfft, rate, self.p.window)
        self._hop = max(1, nfft - round(self.p.overlap * nfft))
        self._state: SpectrumState | None = None
        self._next = 0
        self._avg: np.ndarray | None = None
        self._count = 0
        self._freqs = self.p.center_hz + np.fft.fftshift(np.fft.fftfreq(nfft, 1.0 / rate))
        return {}

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        if chunk.start != self._next:           # a hole (chunks a tap dropped): no segment
            self._state = None                  # spans it
        self._next = chunk.stop
        power, self._state = periodograms(chunk.samples, self._win, self._hop, self._state)
        self._avg, self._count = update_average(self._avg, self._count, power, self.p.average)

    def density(self) -> np.ndarray | None:
        """The averaged density (power per Hz), ordered as ``freqs``; None before a segment."""
        if self._avg is None:
            return None
        return np.fft.fftshift(self._avg * self._scale)

    @property
    def freqs(self) -> np.ndarray:
        """Bin frequencies in Hz, ascending, centred on ``center_hz``."""
        return self._freqs

    def readings(self) -> dict[str, Any]:
        psd = self.density()
        if psd is None:
            return {"segments": 0}
        peak = int(np.argmax(psd))
        return {"segments": self._count, "peak_hz": float(self._freqs[peak]),
                "peak_db": _db(float(psd[peak])), "floor_db": _db(float(np.median(psd)))}

    def views(self) -> dict[str, Any]:
        """``freqs_hz`` and ``psd_db`` (10 log10 of power per Hz), ``nfft`` points each."""
        psd = self.density()
        if psd is None:
            return {}
        db = 10.0 * np.log10(np.maximum(psd, 1e-30))
        return {"freqs_hz": self._freqs.tolist(), "psd_db": np.round(db, 2).tolist(),
                "center_hz": self.p.center_hz,
                "bin_hz": float(self._freqs[1] - self._freqs[0]),
                "enbw_hz": self._enbw, "segments": self._count}


class SnrEstimate(Block):
    """Estimate Eb/N0 and Es/N0 from the symbol samples, without carrier phase."""

    kind = "snr"
    inputs = (Port("in", "complex64", "symbol samples from the timing block"),)
    params = (
        Param("modulation", str, REQUIRED, choices=("ook", "2fsk", "dbpsk", "dqpsk"),
              doc="keying of the observed stream"),
        Param("samples_per_symbol", int, 1, unit="samples", low=1, high=1024,
              doc="input samples per symbol (the timing block's samples_per_symbol_out; "
                  "1 except for 2fsk)"),
        Param("deviation_hz", float, None, unit="Hz", low=0, low_open=True,
              doc="2-FSK peak deviation (required for 2fsk)"),
        Param("window_symbols", int, 2048, unit="symbols", low=64, high=1 << 20,
              doc="symbols per estimation window"),
        Param("average_windows", int, 8, unit="windows", low=1, high=4096,
              doc="the reading pools the last this many windows"),
        Param("on_fraction", float, 0.5, low=0, high=1, high_open=True,
              doc="ook: fraction of 'on' symbols (0.5 for equiprobable bits; 0: fit it)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        """Check the mode against the input.

        DBPSK, DQPSK and OOK are estimated at one sample per symbol (the matched filter's
        optimum instant, which the ``timing`` block gives with ``samples_per_symbol_out =
        1``); 2-FSK from the ``S`` samples of each symbol through the two tone correlators.
        """
        p = self.p
        rate = inputs["in"].rate
        fsk = p.modulation == "2fsk"
        if fsk:
            if p.deviation_hz is None:
                raise ParamError("deviation_hz", "is required for modulation '2fsk'")
            if p.samples_per_symbol < 2:
                raise ParamError("samples_per_symbol", f"must be >= 2 for 2fsk (got "
                                 f"{p.samples_per_symbol})")
            try:
                self._tones = tone_matrix(p.samples_per_symbol, p.deviation_hz, rate)
            except ValueError as err:
                raise ParamError("deviation_hz", f"{err} (input rate {rate:g} Hz)") from None
        elif p.samples_per_symbol != 1:
            raise ParamError("samples_per_symbol", f"must be 1 for {p.modulation} (one sample "
                             f"per symbol at the optimum instant; got {p.samples_per_symbol})")
        elif p.deviation_hz is not None:
            raise ParamError("deviation_hz", f"applies to 2fsk only (got modulation "
                             f"{p.modulation!r})")
        self._bits_per_symbol = 2 if p.modulation == "dqpsk" else 1
        self._span = p.window_symbols * p.samples_per_symbol
        self._held = np.zeros(0, np.complex64)
        self._ring: deque[tuple[float, float, float]] = deque(maxlen=p.average_windows)
        self._fit: OokFit | None = None
        self._symbols = 0
        self._windows = 0
        return {}

    def process(self, chunk: Chunk) -> None:
        require_finite(self, chunk)
        x = np.concatenate((self._held, chunk.samples)) if self._held.shape[0] \
            else chunk.samples
        whole = x.shape[0] // self._span
        for w in range(whole):
            self._window(x[w * self._span:(w + 1) * self._span])
        self._held = x[whole * self._span:].copy()

    def finish(self) -> None:
        """Estimate over the last, incomplete window if it holds at least 64 symbols."""
        s = self.p.samples_per_symbol
        symbols = self._held.shape[0] // s
        if symbols >= 64:
            self._window(self._held[:symbols * s])
        self._held = np.zeros(0, np.complex64)

    def _window(self, x: np.ndarray) -> None:
        self._windows += 1
        self._symbols += x.shape[0] // self.p.samples_per_symbol
        if self.p.modulation == "2fsk":
            z = tone_pair_energies(x, self._tones)
        else:
            z = x.real.astype(np.float64) ** 2 + x.imag.astype(np.float64) ** 2
        if self.p.modulation == "ook":
            fixed = self.p.on_fraction or None
            self._fit = ook_level_fit(z, self._fit, fixed)
            self._ring.append((self._fit.signal, self._fit.noise, self._fit.on_fraction))
        else:
            self._ring.append((float(z.shape[0]), float(z.sum()), float(np.dot(z, z))))

    def powers(self) -> tuple[float, float, float] | None:
        """Pooled (signal energy, noise power, symbol-energy factor) per symbol, or None.

        The factor turns the signal energy into the mean symbol energy: the on fraction for
        OOK, 1 otherwise.
        """
        if not self._ring:
            return None
        ring = np.array(self._ring)
        if self.p.modulation == "ook":
            signal, noise, fraction = ring.mean(axis=0)
            return float(signal), float(noise), self.p.on_fraction or float(fraction)
        n, s1, s2 = ring.sum(axis=0)
        dims = 2 if self.p.modulation == "2fsk" else 1
        signal, noise = m2m4_powers(s1 / n, s2 / n, dims)
        return signal, noise, 1.0

    def readings(self) -> dict[str, Any]:
        """``esn0_db``: mean symbol energy over N0; ``ebn0_db``: per bit (None: no estimate).

        At one sample per symbol after a unit-energy matched filter, the noise variance of a
        sample is N0 and the signal energy of a sample is Es (common practice); the tone
        correlators of 2-FSK have the same property. OOK's mean symbol energy is the on
        fraction times the on energy (half of it for equiprobable bits), which is the mean
        Eb/N0 the simulator sets.
        """
        out: dict[str, Any] = {"symbols": self._symbols, "windows": self._windows}
        got = self.powers()
        if got is None:
            return out
        signal, noise, factor = got
        esn0 = factor * signal / noise if noise > 0 else math.inf
        out.update(esn0_db=_db(esn0), ebn0_db=_db(esn0 / self._bits_per_symbol),
                   signal_power=float(signal), noise_power=float(noise))
        if self.p.modulation == "ook":
            out["on_fraction"] = factor
        return out
