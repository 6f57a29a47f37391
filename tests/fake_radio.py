"""A scripted stand-in for a SoapySDR device, for tests only (the product never ships one).

``FakeAir`` is the signal on the air and the clock it runs on: sample ``k`` exists from time
``k / rate``. ``FakeDevice`` reads it the way a driver does: a read returns at once when the
samples are already there (queued), and otherwise moves the clock on until they are, so the
wall clock the source sees and the samples it gets agree exactly. A script of steps, one per
``readStream`` call, injects what goes wrong with cheap radios: overflows that drop the queue,
silent drops, stalls, stale buffers handed over twice, driver errors and a device that dies.

The device's methods are the subset of ``SoapySDR.Device`` the ``radio`` source calls, with the
same argument order (SoapySDR Python bindings, API 0.8).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from blocks._continuity import HAS_TIME, OVERFLOW, STREAM_ERROR, TIMEOUT


@dataclass
class FakeClock:
    """Wall clock under the test's control (seconds)."""

    t: float = 100.0

    def __call__(self) -> float:
        return self.t


@dataclass
class FakeAir:
    """The received signal and its clock; sample k exists from ``t0 + k / rate``."""

    samples: np.ndarray
    rate: float
    clock: FakeClock = field(default_factory=FakeClock)
    t0: float | None = None

    def produced(self) -> int:
        """Samples the hardware has produced so far."""
        if self.t0 is None:
            self.t0 = self.clock.t
        return math.floor((self.clock.t - self.t0) * self.rate + 1e-9)

    def run_until(self, index: int) -> None:
        """Move the clock on until sample ``index - 1`` exists."""
        self.produced()
        self.clock.t = max(self.clock.t, self.t0 + index / self.rate)


@dataclass
class Result:
    """What SoapySDR's readStream returns (``StreamResult``)."""

    ret: int
    flags: int = 0
    timeNs: int = 0


class FakeDevice:
    """A SoapySDR-like device over ``air``, following ``script`` one read at a time.

    Steps: ``("stall", s)`` a read that times out after ``s`` seconds (the hardware keeps
    producing, the samples queue); ``("overflow",)`` the driver drops its whole queue and
    reports an overflow; ``("drop", n)`` the driver loses ``n`` samples without a word;
    ``("repeat",)`` the previous buffer (and time stamp) handed over again; ``("error",)``
    a stream error; ``("dead",)`` every read from now on times out (after the full timeout of
    real time with ``real_timeouts``); ``None`` a normal read.
    """

    def __init__(self, air: FakeAir, *, timestamps: bool = True, mtu: int = 1000,
                 queue: int | None = None, script: list | tuple = (),
                 real_timeouts: bool = False) -> None:
        self.air = air
        self.real_timeouts = real_timeouts
        self.timestamps = timestamps
        self.mtu = mtu
        self.queue = queue
        self.script = list(script)
        self.pos: int | None = None
        self.dead = False
        self.closed = False
        self.settings: dict[str, Any] = {}
        self.stream_args: dict[str, str] = {}
        self.format = ""
        self._last: tuple[np.ndarray, Result] | None = None
        self.reads = 0

    # -- configuration (SoapySDR.Device subset) ----------------------------------------------
    def setSampleRate(self, direction: int, channel: int, rate: float) -> None:
        self.settings["sample_rate"] = rate

    def getSampleRate(self, direction: int, channel: int) -> float:
        return self.settings.get("sample_rate", self.air.rate)

    def setFrequency(self, direction: int, channel: int, hz: float) -> None:
        self.settings["frequency_hz"] = hz

    def setGainMode(self, direction: int, channel: int, automatic: bool) -> None:
        self.settings["agc"] = automatic

    def setGain(self, direction: int, channel: int, db: float) -> None:
        self.settings["gain_db"] = db

    def setFrequencyCorrection(self, direction: int, channel: int, ppm: float) -> None:
        self.settings["ppm"] = ppm

    def setAntenna(self, direction: int, channel: int, name: str) -> None:
        self.settings["antenna"] = name

    def setupStream(self, direction: int, fmt: str, channels: list[int],
                    args: dict[str, str]) -> str:
        self.format = fmt
        self.stream_args = dict(args)
        return "rx-stream"

    def getStreamMTU(self, stream: Any) -> int:
        return self.mtu

    def activateStream(self, stream: Any) -> int:
        self.pos = self.air.produced()
        return 0

    def deactivateStream(self, stream: Any) -> int:
        return 0

    def closeStream(self, stream: Any) -> None:
        pass

    def close(self) -> None:
        self.closed = True

    # -- reading -----------------------------------------------------------------------------
    def readStream(self, stream: Any, buffs: list[np.ndarray], count: int,
                   flags: int = 0, timeoutUs: int = 100_000) -> Result:
        self.reads += 1
        assert self.pos is not None, "read before activateStream"
        step = self.script.pop(0) if self.script else None
        if step is not None and step[0] == "dead":
            self.dead = True
        if self.dead:
            self.air.clock.t += timeoutUs / 1e6
            if self.real_timeouts:   # a dead device really keeps the reader waiting
                time.sleep(timeoutUs / 1e6)
            return Result(TIMEOUT)
        if step is not None:
            kind = step[0]
            if kind == "stall":
                self.air.clock.t += step[1]
                return Result(TIMEOUT)
            if kind == "overflow":
                self.pos = self.air.produced()
                return Result(OVERFLOW)
            if kind == "error":
                return Result(STREAM_ERROR)
            if kind == "drop":
                self.pos += step[1]
            if kind == "repeat" and self._last is not None:
                data, result = self._last
                self._write(buffs[0], data)
                self.air.run_until(self.pos + data.shape[0])
                self.pos += data.shape[0]   # the real samples of that time are lost
                return result
        if self.queue is not None and self.air.produced() - self.pos > self.queue:
            self.pos = self.air.produced()
            return Result(OVERFLOW)
        count = min(count, self.air.samples.shape[0] - self.pos)
        if count <= 0:
            self.air.clock.t += timeoutUs / 1e6
            return Result(TIMEOUT)
        self.air.run_until(self.pos + count)
        data = self.air.samples[self.pos:self.pos + count]
        self._write(buffs[0], data)
        result = Result(count, HAS_TIME if self.timestamps else 0,
                        round(self.pos * 1e9 / self.air.rate) if self.timestamps else 0)
        self._last = (data, result)
        self.pos += count
        return result

    def _write(self, buff: np.ndarray, data: np.ndarray) -> None:
        if buff.dtype == np.complex64:
            buff[:data.shape[0]] = data
        else:   # interleaved integer components (CS16, CS8, CU8)
            comps = data.view(np.float32)
            if buff.dtype == np.uint8:
                buff[:comps.shape[0]] = np.clip(np.rint(comps * 127.5 + 127.5), 0, 255)
            else:
                half = 2 ** (8 * buff.dtype.itemsize - 1)
                buff[:comps.shape[0]] = np.clip(np.rint(comps * half), -half, half - 1)


class FakeFactory:
    """Stands in for ``blocks.radio.open_device``: hands out devices over one ``air``.

    ``fail`` opening attempts fail first (device unplugged); every opened device is kept in
    ``opened``; ``scripts`` gives each successive device its script; ``open_s`` is how long
    (fake seconds) an opening takes.
    """

    def __init__(self, air: FakeAir, *, fail: int = 0, open_s: float = 0.0,
                 scripts: tuple = ((),), **device_options: Any) -> None:
        self.air = air
        self.fail = fail
        self.open_s = open_s
        self.scripts = list(scripts)
        self.options = device_options
        self.opened: list[FakeDevice] = []
        self.attempts: list[str] = []

    def __call__(self, args: str) -> tuple[FakeDevice, dict[str, str]]:
        from blocks.radio import RadioUnavailable

        self.attempts.append(args)
        self.air.clock.t += self.open_s
        if self.opened and self.fail > 0:
            self.fail -= 1
            raise RadioUnavailable(f"no SoapySDR device matches {args!r}")
        script = self.scripts.pop(0) if self.scripts else ()
        device = FakeDevice(self.air, script=script, **self.options)
        self.opened.append(device)
        return device, {"driver": "fake", "serial": "F00D", "label": "fake receiver F00D"}
