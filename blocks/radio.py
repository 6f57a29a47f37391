"""The ``radio`` source: complex baseband from an SDR through SoapySDR, or a fallback.

SoapySDR is optional (Debian: ``python3-soapysdr``; importing phasefree never needs it). When
the module is missing or no device matches ``driver``, the source says so in one log line with
the reason and runs as its fallback (``sim`` or ``recording``, built from ``fallback_params``),
or, with ``fallback = "none"``, the pipeline is refused before it runs.

Reading: the driver writes each read into one preallocated buffer (complex64 for ``CF32``,
integer components for ``CS16``/``CS8``/``CU8``, which become floats by the rule of
``blocks/_sampleformat.py``); each chunk is copied out of it once. Every read's return code,
flags and time stamp go through ``blocks/_continuity.py``: overflows, timeouts, repeated
buffers and lost samples are counted, and each gap skips the stream position by the samples
lost (the next chunk's ``start`` jumps) and carries a ``"gap"`` annotation at its first sample,
so the detectors, the framer and the BER meter restart there. ``settle_s`` of samples after
start and after a reopen are discarded.

A device that returns nothing for max(1 s, 4 buffer periods), or a driver error, is "lost":
it is closed and reopened (same serial) by a helper thread with doubling waits, while
``produce`` keeps returning within about 0.15 s so a stop is never held up. The outage is
counted and annotated as a gap when samples flow again.

The source only receives. Hardware that can transmit needs the licence, or the licence-exempt
band rules, of the place where it runs; local regulations come first.
"""

from __future__ import annotations

import importlib
import logging
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from blocks._continuity import (
    CORRUPTION,
    HAS_TIME,
    OVERFLOW,
    TIMEOUT,
    ContinuityState,
    account_read,
    buffer_fingerprint,
    outage_samples,
    read_code_name,
    reopen_delay_s,
    stall_limit_s,
)
from blocks._sampleformat import decode_samples, parse_datatype
from blocks.recording import RecordingSource
from blocks.simulator import SimSource
from stream.block import Port, Source, StreamSpec
from stream.chunk import Annotation
from stream.errors import ParamError
from stream.params import REQUIRED, Param

__all__ = ["DEBIAN_DIST_PACKAGES", "RadioSource", "RadioUnavailable", "device_label",
           "find_devices", "open_device", "soapysdr_module"]

log = logging.getLogger(__name__)

#: Where Debian, Ubuntu and Raspberry Pi OS install python3-soapysdr.
DEBIAN_DIST_PACKAGES = Path("/usr/lib/python3/dist-packages")
#: SOAPY_SDR_RX in SoapySDR's Constants.h.
_RX = 1
#: SoapySDR stream formats and the SigMF datatype of the samples they deliver.
_FORMATS = {"CF32": None, "CS16": "ci16_le", "CS8": "ci8", "CU8": "cu8"}
#: Longest wait of one read, and the time one ``produce`` call may spend reading.
READ_TIMEOUT_S = 0.1
PRODUCE_BUDGET_S = 0.15
#: Wall-clock lag tolerated without time stamps when the driver's queue size is unknown.
DEFAULT_LAG_TOLERANCE_S = 1.0
#: The fallbacks a radio can run as.
FALLBACKS: dict[str, type[Source]] = {"sim": SimSource, "recording": RecordingSource}
#: Parameters a fallback takes from the radio's own table.
_SHARED = ("sample_rate", "chunk_size", "realtime")

#: Wall clock of the continuity account (tests replace it to script time).
wall_clock: Callable[[], float] = time.monotonic


class RadioUnavailable(RuntimeError):
    """No radio to read: the SoapySDR module is missing, or no device matches or opens."""


# -- SoapySDR access (every call into the module goes through these) ---------------------------
def _route_log(level: int, message: str) -> None:
    # SoapySDR log levels (Logger.h): 1 fatal, 2 critical, 3 error, 4 warning, 5+ notice..trace
    soapy_log = logging.getLogger("phasefree.soapysdr")
    soapy_log.log(logging.ERROR if level <= 2 else logging.INFO if level <= 4 else
                  logging.DEBUG, "%s", message.strip())


def _debian_hint() -> str:
    """How to reach the Debian module from this interpreter, if it is installed but unseen."""
    if not (DEBIAN_DIST_PACKAGES / "SoapySDR.py").is_file():
        return ("install it: apt install python3-soapysdr (Debian, Ubuntu, Raspberry Pi OS), "
                "or build SoapySDR with its Python bindings")
    return (f"the Debian module is installed in {DEBIAN_DIST_PACKAGES}, which this Python does "
            "not search: use a virtual environment made with 'python3 -m venv "
            "--system-site-packages' from the system python3, or link the module into yours "
            "(README, section Radios)")


def soapysdr_module() -> Any:
    """Import SoapySDR, routing its log messages to the ``phasefree.soapysdr`` logger.

    Raises
    ------
    RadioUnavailable
        The module cannot be imported; the message says why and how to fix it.
    """
    try:
        soapy = importlib.import_module("SoapySDR")
    except ImportError as err:
        raise RadioUnavailable(f"the SoapySDR Python module is not importable from this Python "
                               f"({err}); {_debian_hint()}") from None
    if not getattr(soapy, "_phasefree_log_routed", False):
        register = getattr(soapy, "registerLogHandler", None)
        if register is not None:
            register(_route_log)
        soapy._phasefree_log_routed = True
    return soapy


def _kwargs(found: Any) -> dict[str, str]:
    return {str(k): str(found[k]) for k in found.keys()}  # noqa: SIM118 (SoapySDR Kwargs)


def find_devices(args: str = "") -> list[dict[str, str]]:
    """The devices SoapySDR enumerates for ``args`` (each a dict of device arguments)."""
    soapy = soapysdr_module()
    return [_kwargs(found) for found in soapy.Device.enumerate(args)]


def device_label(found: dict[str, str]) -> str:
    """A device in words: its label, else driver and serial."""
    if found.get("label"):
        return found["label"]
    return ", ".join(f"{k}={found[k]}" for k in ("driver", "serial") if k in found) or "device"


def reopen_args(found: dict[str, str], given: str) -> str:
    """Device arguments that find the same device again: driver and serial where known."""
    if "serial" in found:
        return ",".join(f"{k}={found[k]}" for k in ("driver", "serial") if k in found)
    return given


def open_device(args: str) -> tuple[Any, dict[str, str]]:
    """Open the first device matching ``args``; return it and its enumeration arguments.

    Tests replace this function to put a scripted device behind the source.

    Raises
    ------
    RadioUnavailable
        Module missing, no device matches, or the device matched but would not open.
    """
    soapy = soapysdr_module()
    shown = f"matches {args!r}" if args else "is attached"
    found = find_devices(args)
    if not found:
        if not soapy.listModules():
            raise RadioUnavailable(f"no SoapySDR device {shown}: no SoapySDR hardware modules "
                                   f"are installed (Debian: apt install "
                                   f"soapysdr0.8-module-rtlsdr, or -all)")
        raise RadioUnavailable(f"no SoapySDR device {shown} (is it plugged in? 'phasefree "
                               f"radios' lists what is attached, 'phasefree doctor' checks the "
                               f"setup)")
    try:
        device = soapy.Device(found[0])
    except Exception as err:  # the driver's own exception type varies
        raise RadioUnavailable(f"{device_label(found[0])} is attached but does not open "
                               f"({err}); 'phasefree doctor' checks permissions and kernel "
                               f"drivers") from None
    return device, found[0]


def _close_quietly(device: Any, stream: Any) -> None:
    """Release a stream and a device, whatever state the driver is in."""
    for step in (lambda: device.deactivateStream(stream), lambda: device.closeStream(stream),
                 device.close):
        if stream is None and step is not device.close:
            continue
        try:
            step()
        except Exception:  # a dead device may refuse anything; it is being let go
            log.debug("closing the radio", exc_info=True)


class RadioSource(Source):
    """An SDR through SoapySDR, with gap accounting, reopen on loss, and a fallback source."""

    kind = "radio"
    outputs = (Port("out", ("complex64", "float32"),
                    "received complex baseband (or the fallback's samples)"),)
    params: ClassVar[tuple[Param, ...]] = (
        *Source.common_params,
        Param("driver", str, "", doc="SoapySDR device arguments, e.g. 'driver=rtlsdr,"
              "serial=00000001' ('' takes the first device found)"),
        Param("frequency_hz", float, REQUIRED, unit="Hz", low=0, low_open=True,
              doc="centre frequency to tune"),
        Param("gain_db", float, None, unit="dB", low=-50, high=200,
              doc="receive gain (default: the driver's automatic gain control)"),
        Param("ppm", float, 0.0, unit="ppm", low=-1000, high=1000,
              doc="frequency correction of the device's crystal"),
        Param("antenna", str, None, doc="antenna port name (default: the driver's)"),
        Param("channel", int, 0, low=0, high=255, doc="receive channel of the device"),
        Param("sample_format", str, "CF32", choices=tuple(_FORMATS),
              doc="format asked of the driver; integers become floats as in recordings"),
        Param("buffer_samples", int, None, unit="samples", low=1, high=1 << 22,
              doc="samples per driver read (default: the stream's MTU)"),
        Param("buffers", int, None, low=1, high=4096,
              doc="driver buffers (passed as the stream argument 'buffers')"),
        Param("stream_args", dict, None,
              doc="further driver stream arguments, passed as strings, e.g. {bufflen = 65536}"),
        Param("settle_s", float, 0.1, unit="s", low=0, high=10,
              doc="samples discarded after start and after a reopen"),
        Param("lag_tolerance_s", float, None, unit="s", low=0, low_open=True, high=60,
              doc="wall-clock lag allowed before samples count as lost when the driver gives "
                  "no time stamps (default: buffers x buffer_samples, or 1 s)"),
        Param("fallback", str, "none", choices=("sim", "recording", "none"),
              doc="source to run as when no radio is there (none: refuse to run)"),
        Param("fallback_params", dict, None,
              doc="the fallback's parameters as a table (sample_rate, chunk_size and realtime "
                  "come from this block; unused with fallback = none)"),
    )

    def __init__(self, block_id: str = "", **values: Any) -> None:
        super().__init__(block_id, **values)
        self._fallback = self._make_fallback()
        self._fallback_reason: str | None = None
        self._running_fallback = False

    def _make_fallback(self) -> Source | None:
        """Build (and so validate) the fallback now, so its mistakes surface on any machine."""
        extra = dict(self.p.fallback_params or {})
        if self.p.fallback == "none":   # fallback_params stay unused, so --set can switch
            return None
        for name in _SHARED:
            if name in extra:
                raise ParamError(f"fallback_params.{name}", f"is taken from the radio's own "
                                 f"{name}; set it on the block, not in fallback_params")
        shared = {name: getattr(self.p, name) for name in _SHARED}
        try:
            return FALLBACKS[self.p.fallback](self.id, **extra, **shared)
        except ParamError as err:
            raise ParamError(f"fallback_params.{err.name}", err.message) from None

    @property
    def fallback_source(self) -> Source | None:
        """The fallback block built from ``fallback_params`` (None with ``fallback = none``)."""
        return self._fallback

    # -- prepare once ------------------------------------------------------------------------
    @property
    def rate(self) -> float:
        """The radio's sample rate, or the fallback's when running as it."""
        if self._running_fallback:
            return self._fallback.rate
        return super().rate

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        rate = self.rate
        if getattr(self, "_device", None) is not None:   # configured again: start afresh
            _close_quietly(self._device, self._stream)
        self._reset_counters()
        try:
            device, found = open_device(self.p.driver)
        except RadioUnavailable as err:
            if self._fallback is None:
                raise ParamError("driver", f"{err} (fallback = none)") from None
            self._fallback_reason = str(err)
            log.warning("%s: no radio, running as the fallback %r: %s", self.id,
                        self.p.fallback, err)
            self._running_fallback = True
            return dict(self._fallback.configure({}))
        try:
            self._stream, self._read_size = self._configure(device, rate)
        except Exception:
            _close_quietly(device, None)
            raise
        self._device = device
        self._found = found
        self._label = device_label(found)
        self._reopen_args = reopen_args(found, self.p.driver)
        self.p.realtime = False   # the device's own clock paces a radio
        fmt = _FORMATS[self.p.sample_format]
        self._format = None if fmt is None else parse_datatype(fmt)
        per = 1 if self._format is None else 2
        dtype = np.complex64 if self._format is None else self._format.component
        self._raw = np.zeros(per * self.p.chunk_size, dtype)
        self._per = per
        queue = (self.p.buffers or 0) * self._read_size
        tolerance_s = self.p.lag_tolerance_s or (queue / rate if queue else
                                                 DEFAULT_LAG_TOLERANCE_S)
        self._tolerance = tolerance_s * rate
        self._stall_s = stall_limit_s(self._read_size, rate)
        log.info("%s: reading %s at %g Hz, %g S/s", self.id, self._label, self.p.frequency_hz,
                 rate)
        return {"out": StreamSpec("complex64", rate)}

    def _configure(self, device: Any, rate: float) -> tuple[Any, int]:
        """Tune and set up a freshly opened device; return its stream and read size."""
        p, ch = self.p, self.p.channel
        steps: list[tuple[str, Callable[[], Any]]] = [
            ("sample_rate", lambda: device.setSampleRate(_RX, ch, rate))]
        if p.antenna is not None:
            steps.append(("antenna", lambda: device.setAntenna(_RX, ch, p.antenna)))
        if p.gain_db is None:
            steps.append(("gain_db", lambda: device.setGainMode(_RX, ch, True)))
        else:
            steps.append(("gain_db", lambda: device.setGainMode(_RX, ch, False)))
            steps.append(("gain_db", lambda: device.setGain(_RX, ch, p.gain_db)))
        if p.ppm:
            steps.append(("ppm", lambda: device.setFrequencyCorrection(_RX, ch, p.ppm)))
        steps.append(("frequency_hz", lambda: device.setFrequency(_RX, ch, p.frequency_hz)))
        for name, step in steps:
            try:
                step()
            except Exception as err:  # drivers raise RuntimeError, ValueError, ...
                raise ParamError(name, f"the device refused it: {err}") from None
        actual = float(device.getSampleRate(_RX, ch))
        if abs(actual - rate) > 1e-6 * rate:
            raise ParamError("sample_rate", f"the device runs at {actual:g} S/s when asked for "
                             f"{rate:g}; choose a rate it supports")
        args = {str(k): str(v) for k, v in (p.stream_args or {}).items()}
        if p.buffers is not None:
            args["buffers"] = str(p.buffers)
        try:
            stream = device.setupStream(_RX, p.sample_format, [ch], args)
        except Exception as err:
            raise ParamError("sample_format" if not args else "stream_args",
                             f"the device refused the stream: {err}") from None
        size = p.buffer_samples or int(device.getStreamMTU(stream)) or 1
        return stream, min(size, p.chunk_size)

    def _reset_counters(self) -> None:
        self._state: ContinuityState | None = None
        self._active = False
        self._settle_left = 0
        self._reported: str | None = None
        self._notes: list[Annotation] = []
        self._last_data_s = 0.0
        self._lost_at: float | None = None
        self._outage_from: float | None = None
        self._worker: threading.Thread | None = None
        self._reopened: tuple[Any, Any, int] | None = None
        self._reopen_done = threading.Event()
        self._closing = threading.Event()
        self._device: Any = None
        self._stream: Any = None
        self.counts = dict.fromkeys(
            ("samples_read", "overflows", "timeouts", "driver_errors", "gaps",
             "samples_missing", "repeated_buffers", "samples_repeated", "device_losses",
             "reopens", "settle_discarded"), 0)
        self.outage_s = 0.0

    # -- apply many ---------------------------------------------------------------------------
    def produce(self) -> bool:
        if self._running_fallback:
            more = self._fallback.produce()
            for port, chunk in self._fallback.take_output():
                self.emit(chunk.samples, port, chunk.annotations)
            return more
        if self._worker is not None:
            self._await_reopen()
            return True
        if not self._active:
            self._start_stream()
        filled = 0
        chunk = self.p.chunk_size
        deadline = time.monotonic() + PRODUCE_BUDGET_S
        while filled < chunk and time.monotonic() < deadline:
            n = min(self._read_size, chunk - filled)
            try:
                result = self._device.readStream(self._stream, [self._view(filled, filled + n)],
                                                 n, timeoutUs=int(READ_TIMEOUT_S * 1e6))
                ret, flags, time_ns = int(result.ret), int(result.flags), int(result.timeNs)
            except Exception as err:  # the driver raised: treat as a lost device
                self.counts["driver_errors"] += 1
                self._lose(f"driver error: {err}")
                break
            now = wall_clock()
            if ret > 0:
                filled = self._take(filled, ret, flags, time_ns, now)
            elif ret in (OVERFLOW, CORRUPTION):
                self.counts["overflows" if ret == OVERFLOW else "driver_errors"] += 1
                self._reported = "overflow" if ret == OVERFLOW else "corruption"
            elif ret in (TIMEOUT, 0):
                self.counts["timeouts"] += int(ret == TIMEOUT)
                self._reported = self._reported or "timeout"
                silent = now - self._last_data_s
                if silent >= self._stall_s:
                    self._lose(f"no samples for {silent:.1f} s")
                break
            else:
                self.counts["driver_errors"] += 1
                self._lose(f"driver error: {read_code_name(ret)}")
                break
        self._send(filled)
        return True

    def _view(self, a: int, b: int) -> np.ndarray:
        """The driver's buffer for samples ``a .. b - 1`` of the chunk being filled."""
        return self._raw[a * self._per:b * self._per]

    def _move(self, src: int, count: int, dst: int) -> None:
        """Move ``count`` samples within the buffer (numpy copes with the overlap)."""
        if count and src != dst:
            self._view(dst, dst + count)[...] = self._view(src, src + count)

    def _start_stream(self) -> None:
        self._device.activateStream(self._stream)
        self._active = True
        self._settle_left = round(self.p.settle_s * self.rate)
        self._state = None
        self._last_data_s = wall_clock()

    def _take(self, filled: int, ret: int, flags: int, time_ns: int, now: float) -> int:
        """Account for a read of ``ret`` samples at ``filled``; return the new fill."""
        self.counts["samples_read"] += ret
        self._last_data_s = now
        rate = self.rate
        stamped = bool(flags & HAS_TIME)
        if self._settle_left:
            d = min(ret, self._settle_left)
            self._settle_left -= d
            self.counts["settle_discarded"] += d
            if d == ret:
                return filled
            self._move(filled + d, ret - d, filled)
            ret -= d
            time_ns += round(d * 1e9 / rate)
        if self._outage_from is not None:
            missing = outage_samples(self._outage_from, now, ret, rate)
            self.outage_s += now - self._outage_from
            filled = self._gap(filled, filled, ret, missing, {
                "cause": "device-lost", "measured_by": "wallclock",
                "outage_s": round(now - self._outage_from, 3)})
            self._outage_from = None
            self._state = account_read(ret, now, rate, None,
                                       time_ns=time_ns if stamped else None)[1]
            return filled + ret
        fingerprint = None if stamped else buffer_fingerprint(self._view(filled, filled + ret))
        verdict, self._state = account_read(
            ret, now, rate, self._state, time_ns=time_ns if stamped else None,
            reported=self._reported, fingerprint=fingerprint, tolerance=self._tolerance)
        self._reported = None
        if verdict.cause == "repeat":
            self.counts["samples_repeated"] += verdict.drop
            self.counts["repeated_buffers"] += verdict.drop == ret
        keep = ret - verdict.drop
        if verdict.missing or (verdict.cause and verdict.cause != "repeat") or (
                verdict.cause == "repeat" and verdict.measured_by == "content"):
            return self._gap(filled, filled + verdict.drop, keep, verdict.missing,
                             {"cause": verdict.cause, "measured_by": verdict.measured_by}) + keep
        self._move(filled + verdict.drop, keep, filled)
        return filled + keep

    def _gap(self, filled: int, kept_at: int, keep: int, missing: int,
             data: dict[str, Any]) -> int:
        """Close the chunk before a gap, skip the lost samples, mark the gap; return the fill.

        The ``keep`` samples read after the gap (at ``kept_at``) move to the buffer's start.
        """
        self._send(filled)
        self.skip(missing)
        self.counts["gaps"] += 1
        self.counts["samples_missing"] += missing
        log.info("%s: gap of %d samples at %d (%s)", self.id, missing, self.position(),
                 data.get("cause"))
        index = self.position()
        if self._notes and self._notes[-1].label == "gap" and self._notes[-1].index \
                + self._notes[-1].data["samples_missing"] == index:
            # two gaps with no sample between them: one annotation carries both
            prev = self._notes.pop()
            data = {**prev.data, "samples_missing": prev.data["samples_missing"] + missing}
        else:
            data = {"samples_missing": missing, **data}
        self._notes.append(Annotation(index, "gap", data))
        self._move(kept_at, keep, 0)
        return 0

    def _send(self, filled: int) -> None:
        """Emit the first ``filled`` samples of the buffer (one copy) with pending notes."""
        if not filled:
            return
        raw = self._view(0, filled)
        samples = raw.copy() if self._format is None else decode_samples(raw, self._format)
        notes, self._notes = self._notes, []
        self.emit(samples, annotations=notes)

    # -- device lost ---------------------------------------------------------------------------
    def _lose(self, reason: str) -> None:
        """Let the device go off the sample path and start reopening it."""
        self.counts["device_losses"] += 1
        log.warning("%s: device lost (%s): closing %s and reopening %r", self.id, reason,
                    self._label, self._reopen_args)
        self._lost_at = self._last_data_s
        self._active = False
        self._reopen_done.clear()
        device, stream = self._device, self._stream
        self._device = self._stream = None
        self._worker = threading.Thread(target=self._reopen, args=(device, stream),
                                        name=f"radio-reopen-{self.id}", daemon=True)
        self._worker.start()

    def _reopen(self, device: Any, stream: Any) -> None:
        """Helper thread: close the lost device, then open it again with doubling waits."""
        _close_quietly(device, stream)
        attempt = 0
        while not self._closing.is_set():
            try:
                fresh, _ = open_device(self._reopen_args)
            except RadioUnavailable as err:
                log.info("%s: reopen attempt %d failed: %s", self.id, attempt + 1, err)
            else:
                try:
                    stream, size = self._configure(fresh, self.rate)
                except ParamError as err:
                    log.info("%s: reopened device refused its settings: %s", self.id, err)
                    _close_quietly(fresh, None)
                else:
                    self._reopened = (fresh, stream, size)
                    break
            self._closing.wait(reopen_delay_s(attempt))
            attempt += 1
        self._reopen_done.set()

    def _await_reopen(self) -> None:
        """Wait a little for the helper thread; take the device back when it is open."""
        if not self._reopen_done.wait(PRODUCE_BUDGET_S) or self._reopened is None:
            return
        self._device, self._stream, self._read_size = self._reopened
        self._reopened = None
        self._worker = None
        self.counts["reopens"] += 1
        log.warning("%s: device back after %.1f s", self.id, wall_clock() - self._lost_at)
        self._outage_from = self._lost_at
        self._start_stream()

    def finish(self) -> None:
        if self._running_fallback:
            self._fallback.finish()
            for port, chunk in self._fallback.take_output():
                self.emit(chunk.samples, port, chunk.annotations)
            return
        self._closing.set()
        if self._notes:
            self.emit(np.zeros(0, np.complex64), annotations=self._notes)
            self._notes = []
        device, stream = self._device, self._stream
        self._device = self._stream = None
        if device is not None:
            # off the stopping thread: a wedged driver must not hold up the end of the run
            closer = threading.Thread(target=_close_quietly, args=(device, stream),
                                      name=f"radio-close-{self.id}", daemon=True)
            closer.start()
            closer.join(0.5)

    def readings(self) -> dict[str, Any]:
        """Device, tuning and continuity counters; the fallback's readings when running as it.

        ``gaps`` and ``samples_missing`` count every hole in the stream (overflows, stalls,
        repeated buffers, outages); ``outage_s`` is the time spent without a device.
        """
        if self._running_fallback:
            out = dict(self._fallback.readings())
            out.update(radio="fallback", fallback=self.p.fallback,
                       fallback_reason=self._fallback_reason or "")
            return out
        if not hasattr(self, "counts"):
            return {}
        state = "lost" if self._worker is not None else "settling" if self._settle_left \
            else "running"
        out = {"radio": state, "device": getattr(self, "_label", ""),
               "frequency_hz": self.p.frequency_hz, "sample_rate": self.rate}
        out.update(self.counts)
        out["outage_s"] = round(self.outage_s, 3)
        return out
