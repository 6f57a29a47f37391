"""Tests for the host figures (stream/host.py), on prepared /proc and /sys trees.

References for the expected values:
- ``/proc/stat``'s first ``cpu`` line: user nice system idle iowait irq softirq steal guest
  guest_nice, in clock ticks; idle time is idle + iowait; guest time is already inside user
  (proc(5), Linux man-pages);
- ``thermal_zone*/temp`` in millidegrees Celsius, ``type`` the zone's name (Linux kernel
  documentation, thermal sysfs interface);
- the slowdown word's bits 0-3 (under-voltage, frequency capped, slowed, soft temperature
  limit now) and 16-19 (the same since boot) (Raspberry Pi documentation, ``vcgencmd
  get_throttled``); its example value 0x50005 is "under-voltage and slowed now, both also
  since boot".
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from stream.host import HostProbe, cpu_busy_fraction, decode_slowdown, read_cpu_ticks

STAT_BEFORE = ("cpu  100 20 30 800 50 5 5 0 7 0\n"
               "cpu0 50 10 15 400 25 2 3 0 7 0\n"
               "intr 12345\n")
STAT_AFTER = ("cpu  160 20 50 900 70 5 15 0 9 0\n"
              "cpu0 80 10 25 450 35 2 8 0 9 0\n")


def _tree(root: Path, zones: dict[str, tuple[str | None, str]] | None = None,
          stat: str = STAT_BEFORE, slowdown: str | None = None) -> Path:
    (root / "proc").mkdir(parents=True, exist_ok=True)
    (root / "proc/stat").write_text(stat)
    for name, (kind, temp) in (zones or {}).items():
        zone = root / "sys/class/thermal" / name
        zone.mkdir(parents=True)
        (zone / "temp").write_text(temp)
        if kind is not None:
            (zone / "type").write_text(kind + "\n")
    if slowdown is not None:
        path = root / "sys/devices/platform/soc/soc:firmware/get_throttled"
        path.parent.mkdir(parents=True)
        path.write_text(slowdown)
    return root


def test_cpu_ticks_follow_proc5_columns():
    # total = user+nice+system+idle+iowait+irq+softirq+steal (guest is inside user, proc(5))
    assert read_cpu_ticks(STAT_BEFORE) == (100 + 20 + 30 + 800 + 50 + 5 + 5 + 0, 800 + 50)
    assert read_cpu_ticks("cpu 1 2 3 4\n") == (10, 4)      # old kernels: four columns
    assert read_cpu_ticks("intr 1\n") is None


def test_cpu_busy_fraction_between_two_samples():
    before, after = read_cpu_ticks(STAT_BEFORE), read_cpu_ticks(STAT_AFTER)
    # deltas: total 1220-1010 = 210, idle 970-850 = 120 -> busy (210-120)/210
    assert cpu_busy_fraction(before, after) == pytest.approx(90 / 210)
    assert cpu_busy_fraction(after, after) is None


def test_cpu_busy_needs_two_reads_half_a_second_apart(tmp_path, monkeypatch):
    root = _tree(tmp_path)
    clock = iter([100.0, 100.1, 100.7])
    monkeypatch.setattr("stream.host.time.monotonic", lambda: next(clock))
    probe = HostProbe(root, vcgencmd=False)
    assert "cpu_busy" not in probe.read()                   # first sample only
    (root / "proc/stat").write_text(STAT_AFTER)
    assert "cpu_busy" not in probe.read()                   # 0.1 s later: too soon
    assert probe.read()["cpu_busy"] == pytest.approx(90 / 210, abs=1e-4)


def test_temperatures_in_celsius_named_by_zone_type(tmp_path):
    root = _tree(tmp_path, {"thermal_zone0": ("cpu-thermal", "48312\n"),
                            "thermal_zone1": ("cpu-thermal", "51000"),
                            "thermal_zone2": (None, "-2500"),
                            "thermal_zone10": ("gpu", "not a number")})
    temps = HostProbe(root, vcgencmd=False).temperatures()
    assert temps == {"cpu-thermal": 48.312, "cpu-thermal-1": 51.0, "thermal_zone2": -2.5}


def test_absent_figures_are_left_out(tmp_path):
    figures = HostProbe(_tree(tmp_path), vcgencmd=False).read()
    assert "temperatures_c" not in figures and "slowdown" not in figures
    assert figures["cpus"] == os.cpu_count()
    assert set(figures) >= {"load_1m", "load_5m", "load_15m"}


def test_load_average_is_the_kernels(tmp_path):
    figures = HostProbe(_tree(tmp_path), vcgencmd=False).read()
    reference = os.getloadavg()
    assert figures["load_15m"] == pytest.approx(reference[2], abs=0.05)


def test_slowdown_word_from_the_firmware_file(tmp_path):
    probe = HostProbe(_tree(tmp_path, slowdown="50005\n"), vcgencmd=False)
    slowdown = probe.read()["slowdown"]
    assert slowdown["word"] == 0x50005
    on = {name for name, value in slowdown.items() if value is True}
    assert on == {"under_voltage", "slowed", "under_voltage_since_boot",
                  "slowed_since_boot"}


def test_decode_slowdown_bits():
    assert not any(decode_slowdown(0).values())
    assert decode_slowdown(0x8)["soft_temperature_limit"]
    assert decode_slowdown(0x80000)["soft_temperature_limit_since_boot"]
    assert decode_slowdown(0x2) == {**decode_slowdown(0), "frequency_capped": True}


def test_slowdown_word_from_vcgencmd(tmp_path, monkeypatch):
    tool = tmp_path / "bin/vcgencmd"
    tool.parent.mkdir()
    tool.write_text("#!/bin/sh\n[ \"$1\" = get_throttled ] && echo slowed=0x20002\n")
    tool.chmod(0o755)
    monkeypatch.setenv("PATH", str(tool.parent))
    probe = HostProbe(_tree(tmp_path / "root"))
    assert probe.slowdown_word() == 0x20002
    tool.write_text("#!/bin/sh\nexit 1\n")
    assert probe.slowdown_word() == 0x20002                 # cached for a few seconds
