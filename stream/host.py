"""Figures of the machine a pipeline runs on: CPU load, temperature, slowdown.

A receiver left on a small board in a shed fails in ways the DSP cannot see: the board gets hot
and slows its clock, the supply sags, another program eats the CPU. These figures sit beside the
block table in the status records, the monitor's ``/status`` and ``/metrics``. A figure the
machine does not report is left out, never guessed.

Sources of each figure (Linux):

- load averages: ``os.getloadavg`` (the kernel's 1, 5 and 15 minute run-queue averages);
- CPU busy fraction: the first ``cpu`` line of ``/proc/stat`` sampled twice; the columns are
  user, nice, system, idle, iowait, irq, softirq, steal, guest, guest_nice in clock ticks, guest
  time already counted in user (proc(5), Linux man-pages); idle time is idle + iowait;
- temperatures: ``/sys/class/thermal/thermal_zone*/temp`` in millidegrees Celsius, named by the
  zone's ``type`` file (Linux kernel documentation, ``Documentation/driver-api/thermal``);
- slowdown (Raspberry Pi boards): the firmware's ``get_throttled`` word, read from
  ``/sys/devices/platform/soc/soc:firmware/get_throttled`` (hexadecimal; from memory of the
  kernel's Raspberry Pi firmware driver) or ``vcgencmd get_throttled``; its bit meanings are in
  :data:`SLOWDOWN_BITS` (Raspberry Pi documentation, "get_throttled" under ``vcgencmd``).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

__all__ = ["SLOWDOWN_BITS", "HostProbe", "cpu_busy_fraction", "decode_slowdown",
           "read_cpu_ticks"]

#: Bit of the firmware's slowdown word -> name (Raspberry Pi documentation, ``vcgencmd
#: get_throttled``: bits 0-3 are the state now, bits 16-19 the same conditions since boot).
SLOWDOWN_BITS = {
    0: "under_voltage",
    1: "frequency_capped",
    2: "slowed",
    3: "soft_temperature_limit",
    16: "under_voltage_since_boot",
    17: "frequency_capped_since_boot",
    18: "slowed_since_boot",
    19: "soft_temperature_limit_since_boot",
}

_FIRMWARE_SLOWDOWN = "sys/devices/platform/soc/soc:firmware/get_throttled"
_CPU_MIN_INTERVAL_S = 0.5   # shorter windows give a jumpy busy fraction; reuse the last one
_VCGENCMD_EVERY_S = 5.0     # the command costs a process start; its answer changes slowly


def read_cpu_ticks(proc_stat: str) -> tuple[int, int] | None:
    """Total and idle clock ticks from the text of ``/proc/stat`` (None if it has no cpu line).

    Parameters
    ----------
    proc_stat : str
        The file's text.

    Returns
    -------
    (total, idle) : tuple of int, or None
        ``total`` sums user .. steal (guest and guest_nice are already inside user and nice);
        ``idle`` is idle + iowait.

    References
    ----------
    .. [1] proc(5), Linux man-pages: ``/proc/stat``.
    """
    for line in proc_stat.splitlines():
        fields = line.split()
        if fields and fields[0] == "cpu":
            ticks = [int(v) for v in fields[1:9]]
            ticks += [0] * (8 - len(ticks))
            return sum(ticks), ticks[3] + ticks[4]
    return None


def cpu_busy_fraction(before: tuple[int, int], after: tuple[int, int]) -> float | None:
    """Fraction of CPU time not idle between two ``(total, idle)`` samples (None if no ticks)."""
    total = after[0] - before[0]
    if total <= 0:
        return None
    return min(1.0, max(0.0, 1.0 - (after[1] - before[1]) / total))


def decode_slowdown(word: int) -> dict[str, bool]:
    """The firmware's slowdown word as named flags (see :data:`SLOWDOWN_BITS`)."""
    return {name: bool(word >> bit & 1) for bit, name in SLOWDOWN_BITS.items()}


def _parse_slowdown_text(text: str) -> int | None:
    """``NAME=0x50005`` (vcgencmd; the name is ignored) or ``50005`` (sysfs, hex) -> the word."""
    value = text.strip().rpartition("=")[2].strip()
    try:
        return int(value, 16)
    except ValueError:
        return None


class HostProbe:
    """Reads the host's figures; keeps what it needs between reads (the last CPU sample).

    Parameters
    ----------
    root : Path
        The file system root the ``/proc`` and ``/sys`` files are read under (tests point it
        at a prepared tree).
    vcgencmd : bool
        Ask ``vcgencmd`` for the slowdown word when the firmware file is missing.

    Notes
    -----
    Safe to call from several threads (the monitor's request threads and the run's status
    hook): the CPU sample is guarded by a lock.
    """

    def __init__(self, root: Path | str = "/", vcgencmd: bool = True) -> None:
        self.root = Path(root)
        self._vcgencmd = shutil.which("vcgencmd") if vcgencmd else None
        self._lock = threading.Lock()
        self._cpu_sample: tuple[float, tuple[int, int]] | None = None
        self._cpu_busy: float | None = None
        self._slowdown_cache: tuple[float, int | None] | None = None

    def read(self) -> dict[str, Any]:
        """The figures this host reports now; absent ones are left out.

        Returns
        -------
        dict
            Any of ``cpus``, ``load_1m``, ``load_5m``, ``load_15m``, ``cpu_busy`` (0..1 since
            the previous read, at least 0.5 s apart; left out on the very first read),
            ``temperatures_c`` ({zone name: degrees C}), ``slowdown`` (``{"word": int, flag:
            bool, ...}``).
        """
        out: dict[str, Any] = {}
        cpus = os.cpu_count()
        if cpus:
            out["cpus"] = cpus
        with contextlib.suppress(OSError):  # no load averages on this system
            out["load_1m"], out["load_5m"], out["load_15m"] = os.getloadavg()
        busy = self._busy()
        if busy is not None:
            out["cpu_busy"] = round(busy, 4)
        temps = self.temperatures()
        if temps:
            out["temperatures_c"] = temps
        word = self.slowdown_word()
        if word is not None:
            out["slowdown"] = {"word": word, **decode_slowdown(word)}
        return out

    def _busy(self) -> float | None:
        try:
            ticks = read_cpu_ticks((self.root / "proc/stat").read_text())
        except OSError:
            return None
        if ticks is None:
            return None
        now = time.monotonic()
        with self._lock:
            if self._cpu_sample is None:
                self._cpu_sample = (now, ticks)
            elif now - self._cpu_sample[0] >= _CPU_MIN_INTERVAL_S:
                fresh = cpu_busy_fraction(self._cpu_sample[1], ticks)
                if fresh is not None:
                    self._cpu_busy = fresh
                self._cpu_sample = (now, ticks)
            return self._cpu_busy

    def temperatures(self) -> dict[str, float]:
        """Degrees Celsius per thermal zone, named by its type (``cpu-thermal``)."""
        out: dict[str, float] = {}
        zones = sorted((self.root / "sys/class/thermal").glob("thermal_zone*"),
                       key=lambda p: (len(p.name), p.name))
        for zone in zones:
            try:
                milli = int((zone / "temp").read_text().strip())
            except (OSError, ValueError):
                continue  # a zone that cannot be read now (sensor asleep) is left out
            try:
                name = (zone / "type").read_text().strip() or zone.name
            except OSError:
                name = zone.name
            if name in out:
                name = f"{name}-{zone.name.removeprefix('thermal_zone')}"
            out[name] = milli / 1000.0
        return out

    def slowdown_word(self) -> int | None:
        """The firmware's slowdown word, or None where the board does not report one."""
        try:
            return _parse_slowdown_text((self.root / _FIRMWARE_SLOWDOWN).read_text())
        except OSError:
            pass
        if self._vcgencmd is None:
            return None
        now = time.monotonic()
        with self._lock:
            if self._slowdown_cache is not None and now - self._slowdown_cache[0] < \
                    _VCGENCMD_EVERY_S:
                return self._slowdown_cache[1]
        try:
            done = subprocess.run([self._vcgencmd, "get_throttled"], capture_output=True,
                                  text=True, timeout=2.0, check=False)
            word = _parse_slowdown_text(done.stdout) if done.returncode == 0 else None
        except (OSError, subprocess.TimeoutExpired):
            word = None
        with self._lock:
            self._slowdown_cache = (now, word)
        return word
