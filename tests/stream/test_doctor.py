"""Tests for ``phasefree doctor`` and ``phasefree radios`` (stream/commands/doctor.py, radios.py).

The readers run against made-up ``/sys`` and ``/proc`` trees in a temporary folder, laid out as
the Linux kernel documents them (Documentation/ABI/testing/sysfs-bus-usb: idVendor, idProduct,
busnum, devnum; /proc/modules one module per line, name first). The slowdown word's bits are
the Raspberry Pi documentation's ("vcgencmd get_throttled"). SoapySDR is replaced by a small
stand-in module where a test needs it absent or empty; the last test runs the real command.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import types
from pathlib import Path

import pytest

from stream.commands import doctor, radios
from stream.host import HostProbe

ROOT = Path(__file__).resolve().parents[2]


def soapy_standin(devices: list[dict], modules: list[str]) -> types.SimpleNamespace:
    """The parts of the SoapySDR module the commands call."""
    class Device:
        enumerate = staticmethod(lambda args: list(devices))

        def __init__(self, found):
            self.found = found

        def close(self):
            pass

    return types.SimpleNamespace(
        Device=Device, listModules=lambda: list(modules), getLibVersion=lambda: "0.8.1",
        getAPIVersion=lambda: "0.8.0", listSearchPaths=lambda: ["/usr/lib/SoapySDR/modules0.8"],
        registerLogHandler=lambda handler: None)


def run_doctor(capsys, *args: str) -> tuple[int, str]:
    parser = argparse.ArgumentParser()
    doctor.add_arguments(parser)
    code = doctor.main(parser.parse_args(list(args)))
    return code, capsys.readouterr().out


def lines_of(out: str, check: str) -> list[str]:
    return [line for line in out.splitlines() if line.split()[1:2] == [check]]


# -- SoapySDR and devices ---------------------------------------------------------------------
def test_doctor_without_the_module_fails_with_the_fix(monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "SoapySDR", None)
    code, out = run_doctor(capsys)
    assert code == 1
    (line,) = lines_of(out, "soapysdr")
    assert line.startswith("fail") and "not importable" in line
    fix = out.splitlines()[out.splitlines().index(line) + 1]
    assert "fix:" in fix and ("python3-soapysdr" in fix or "--system-site-packages" in fix)


def test_doctor_with_the_module_but_no_device_warns_with_the_fix(monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "SoapySDR", soapy_standin([], ["libairspySupport.so"]))
    code, out = run_doctor(capsys)
    (line,) = lines_of(out, "devices")
    assert line.startswith("warn") and "no radio found" in line
    assert "plug the receiver in" in out
    assert "airspy" in lines_of(out, "modules")[0]
    # a missing radio is not fatal: the status reflects only the machine's own failures
    failed = [line for line in out.splitlines() if line.startswith("fail")]
    assert code == (1 if failed else 0)
    assert not any("soapysdr" in line or "devices" in line for line in failed)


def test_doctor_opens_each_device(monkeypatch, capsys):
    found = {"driver": "rtlsdr", "serial": "00000001", "label": "Generic RTL2832U"}
    monkeypatch.setitem(sys.modules, "SoapySDR", soapy_standin([found], []))
    _, out = run_doctor(capsys, "--driver", "driver=rtlsdr")
    assert lines_of(out, "devices") == ["ok    devices       Generic RTL2832U opens"]
    (modules,) = lines_of(out, "modules")
    assert modules.startswith("warn") and "no SoapySDR hardware modules" in modules


def test_radios_lists_devices_or_says_what_is_missing(monkeypatch, capsys):
    parser = argparse.ArgumentParser()
    radios.add_arguments(parser)
    monkeypatch.setitem(sys.modules, "SoapySDR", None)
    assert radios.main(parser.parse_args([])) == 1
    assert "SoapySDR Python module is not importable" in capsys.readouterr().err
    monkeypatch.setitem(sys.modules, "SoapySDR", soapy_standin([], []))
    assert radios.main(parser.parse_args(["--driver", "driver=rtlsdr"])) == 1
    err = capsys.readouterr().err
    assert "no radio found matching 'driver=rtlsdr'" in err and "phasefree doctor" in err
    found = {"driver": "rtlsdr", "serial": "00000001", "label": "Generic RTL2832U"}
    monkeypatch.setitem(sys.modules, "SoapySDR", soapy_standin([found], []))
    assert radios.main(parser.parse_args([])) == 0
    out = capsys.readouterr().out
    assert "0: Generic RTL2832U" in out and 'driver = "driver=rtlsdr,serial=00000001"' in out


# -- USB, kernel, board ---------------------------------------------------------------------------
def usb_tree(tmp_path: Path, ids: str = "0bda:2838", bound: str | None = None) -> Path:
    devices = tmp_path / "sys" / "bus" / "usb" / "devices"
    dongle = devices / "1-1"
    dongle.mkdir(parents=True)
    vendor, product = ids.split(":")
    for name, value in (("idVendor", vendor), ("idProduct", product), ("busnum", "1"),
                        ("devnum", "4")):
        (dongle / name).write_text(value + "\n")
    interface = devices / "1-1:1.0"
    interface.mkdir()
    if bound:
        target = tmp_path / "sys" / "bus" / "usb" / "drivers" / bound
        target.mkdir(parents=True)
        os.symlink(target, interface / "driver")
    return devices


def test_usb_access_names_the_udev_fix(tmp_path):
    devices = usb_tree(tmp_path)
    (finding,) = doctor.check_usb_access(devices, tmp_path / "dev", access=lambda p, m: False)
    assert finding.status == "fail" and "RTL2832U dongle (0bda:2838)" in finding.detail
    assert str(tmp_path / "dev" / "001" / "004") in finding.detail
    assert 'ATTRS{idVendor}=="0bda"' in finding.fix and 'ATTRS{idProduct}=="2838"' in finding.fix
    assert "udevadm" in finding.fix and "plugdev" in finding.fix
    (finding,) = doctor.check_usb_access(devices, tmp_path / "dev", access=lambda p, m: True)
    assert finding.status == "ok"
    (finding,) = doctor.check_usb_access(usb_tree(tmp_path / "other", "046d:c52b"),
                                         tmp_path / "dev")
    assert finding.status == "note" and "no known receiver" in finding.detail


def test_tv_tuner_driver(tmp_path):
    modules = tmp_path / "modules"
    modules.write_text("dvb_usb_rtl28xxu 45056 0 - Live 0x0000000000000000\n"
                       "snd 98304 0 - Live 0x0000000000000000\n")
    devices = usb_tree(tmp_path, bound="dvb_usb_rtl28xxu")
    (finding,) = doctor.check_kernel_driver(modules, devices)
    assert finding.status == "fail" and "holds RTL2832U dongle at 1-1" in finding.detail
    assert "blacklist dvb_usb_rtl28xxu" in finding.fix and "modprobe -r" in finding.fix
    (finding,) = doctor.check_kernel_driver(modules, usb_tree(tmp_path / "free"))
    assert finding.status == "warn" and "dvb_usb_rtl28xxu" in finding.detail
    modules.write_text("snd 98304 0 - Live 0x0000000000000000\n")
    assert doctor.check_kernel_driver(modules, usb_tree(tmp_path / "unbound"))[0].status == "ok"


@pytest.mark.parametrize(("value", "status"), [("16", "ok"), ("0", "ok"), ("8", "warn"),
                                               (None, "note")])
def test_usb_buffer_memory(tmp_path, value, status):
    path = tmp_path / "usbfs_memory_mb"
    if value is not None:
        path.write_text(value + "\n")
    (finding,) = doctor.check_usbfs(path)
    assert finding.status == status
    if status == "warn":
        assert "usbfs_memory_mb" in finding.fix


def test_slowdown_word_bits():
    # Raspberry Pi documentation, vcgencmd get_throttled: 0x50005 = under-voltage and
    # slowdown now (bits 0, 2) and since boot (bits 16, 18)
    assert doctor.slowdown_flags(0x50005) == ["under-voltage now", "slowed now",
                                              "under-voltage since boot",
                                              "slowed since boot"]
    assert doctor.slowdown_flags(0) == []


def board(tmp_path: Path, word: str | None, millideg: int | None) -> dict:
    """A prepared /sys tree (the kernel's paths) read by the host probe the doctor uses."""
    tmp_path.mkdir(parents=True, exist_ok=True)
    firmware = tmp_path / "sys/devices/platform/soc/soc:firmware/get_throttled"
    if word is not None:
        firmware.parent.mkdir(parents=True)
        firmware.write_text(word + "\n")
    if millideg is not None:
        zone = tmp_path / "sys/class/thermal/thermal_zone0"
        zone.mkdir(parents=True)
        (zone / "temp").write_text(f"{millideg}\n")
    return {"probe": HostProbe(tmp_path, vcgencmd=False)}


def test_slowdown_and_temperature(tmp_path):
    found = doctor.check_slowdown(hwmon=tmp_path / "hwmon", **board(tmp_path, "50005", 85_000))
    assert [(f.check, f.status) for f in found] == [("slowdown", "fail"), ("temperature", "warn")]
    assert "under-voltage now" in found[0].detail and "supply" in found[0].fix
    found = doctor.check_slowdown(hwmon=tmp_path / "h", **board(tmp_path / "b", "50000", 51_000))
    assert [(f.check, f.status) for f in found] == [("slowdown", "warn"), ("temperature", "ok")]
    found = doctor.check_slowdown(hwmon=tmp_path / "h", **board(tmp_path / "c", None, None))
    assert [(f.check, f.status) for f in found] == [("slowdown", "note")]
    found = doctor.check_slowdown(hwmon=tmp_path / "h", **board(tmp_path / "d", "0", 47_500))
    assert [(f.check, f.status, f.detail) for f in found] == [
        ("slowdown", "ok", "no slowdown or under-voltage since boot"),
        ("temperature", "ok", "CPU 47.5 degC")]


def test_under_voltage_alarm_from_hwmon(tmp_path):
    sensor = tmp_path / "hwmon" / "hwmon0"
    sensor.mkdir(parents=True)
    (sensor / "name").write_text("rpi_volt\n")
    (sensor / "in0_lcrit_alarm").write_text("1\n")
    found = doctor.check_slowdown(hwmon=tmp_path / "hwmon", **board(tmp_path, None, None))
    assert [(f.check, f.status) for f in found] == [("under-voltage", "fail")]


# -- the real command ---------------------------------------------------------------------------
def test_doctor_runs_here_and_reports_the_device_check():
    proc = subprocess.run([sys.executable, "-m", "stream.cli", "doctor"], cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode in (0, 1), proc.stderr
    out = proc.stdout
    (soapy,) = lines_of(out, "soapysdr")
    if soapy.startswith("ok"):
        # the module is here (CI installs it): the device check ran and, on a machine with
        # no radio, names the missing device and its fix
        device_lines = lines_of(out, "devices")
        assert device_lines
        if "no radio found" in device_lines[0]:
            assert device_lines[0].startswith("warn") and "plug the receiver in" in out
    else:
        assert proc.returncode == 1 and "fix:" in out
    assert lines_of(out, "usb-memory") and lines_of(out, "tv-driver")
