"""``phasefree doctor``: check what usually keeps a cheap radio from working, and say the fix.

Checks, in order: the SoapySDR Python module (and, when Debian's copy is installed but unseen,
how to reach it), SoapySDR hardware modules, devices that enumerate and open, USB receivers on
the bus and the permission to use them (udev rules), a kernel TV-tuner driver holding an
RTL2832U dongle, the USB buffer memory limit, and CPU temperature, slowdown and under-voltage
on boards that report them. Each finding is ``ok``, ``note``, ``warn`` or ``fail``; the command
exits 1 only for a ``fail`` (no radio attached is a ``warn``: the fallback source covers it).

Readers take their paths as arguments, so tests can point them at a made-up ``/sys``.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import sys
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass
from pathlib import Path

from blocks.radio import (
    DEBIAN_DIST_PACKAGES,
    RadioUnavailable,
    device_label,
    find_devices,
    soapysdr_module,
)
from stream.host import HostProbe, decode_slowdown

__all__ = ["HELP", "Finding", "add_arguments", "check_kernel_driver",
           "check_slowdown", "check_usb_access", "check_usbfs", "main", "run_checks",
           "slowdown_flags"]

HELP = "check the radio setup (SoapySDR, drivers, permissions, USB, power) and print the fixes"

#: USB ids of common receivers (vendor:product, from memory of the vendors' udev rules).
SDR_USB_IDS = {
    "0bda:2838": "RTL2832U dongle", "0bda:2832": "RTL2832U dongle",
    "1d50:6089": "HackRF One", "1d50:60a1": "Airspy", "1d50:6108": "LimeSDR-USB",
    "0403:601f": "LimeSDR Mini", "2cf0:5246": "bladeRF", "2cf0:5250": "bladeRF 2.0",
    "2500:0020": "USRP B200/B210",
}
#: Kernel DVB-T drivers that claim RTL2832U dongles before librtlsdr can.
TV_TUNER_MODULES = ("dvb_usb_rtl28xxu", "rtl2832_sdr", "rtl2832", "rtl2830")
_NOW_BITS = 0xF  # bits 0-3 of the slowdown word: the conditions now (stream.host)
#: CPU temperature from which boards slowdown (Raspberry Pi: 80 degC soft limit, from memory).
HOT_C = 80.0

_UDEV_FIX = ("allow your user the device: a udev rule such as /etc/udev/rules.d/"
             "52-phasefree-sdr.rules with SUBSYSTEM==\"usb\", ATTRS{{idVendor}}==\"{v}\", "
             "ATTRS{{idProduct}}==\"{p}\", MODE=\"0660\", GROUP=\"plugdev\"; then "
             "'sudo udevadm control --reload-rules && sudo udevadm trigger', add yourself to "
             "plugdev (sudo usermod -aG plugdev $USER), log in again and replug the receiver")


@dataclass(frozen=True)
class Finding:
    """One check's outcome: ``status`` is ok, note, warn or fail; ``fix`` says what to do."""

    check: str
    status: str
    detail: str
    fix: str = ""


# -- SoapySDR --------------------------------------------------------------------------------
def _reach_debian_module() -> str:
    so = sorted(DEBIAN_DIST_PACKAGES.glob("_SoapySDR.cpython-*.so"))
    built = re.search(r"cpython-(\d)(\d+)", so[0].name) if so else None
    mine = f"{sys.version_info.major}.{sys.version_info.minor}"
    if built and f"{built[1]}.{built[2]}" != mine:
        return (f"the Debian module in {DEBIAN_DIST_PACKAGES} is built for Python "
                f"{built[1]}.{built[2]} and this is Python {mine}: run phasefree under the "
                f"system python3 (python3 -m venv --system-site-packages)")
    return (f"the Debian module is in {DEBIAN_DIST_PACKAGES}, which this Python does not search: "
            f"with the system python3 make the environment with 'python3 -m venv "
            f"--system-site-packages'; with another Python {mine} link it in: "
            f"ln -s {DEBIAN_DIST_PACKAGES}/SoapySDR.py "
            f"{DEBIAN_DIST_PACKAGES}/_SoapySDR.cpython-*.so "
            f"\"$(python -c 'import sysconfig; print(sysconfig.get_paths()[\"purelib\"])')\"/")


def check_soapysdr() -> tuple[list[Finding], object | None]:
    """The module from this interpreter, and its hardware modules."""
    try:
        soapy = soapysdr_module()
    except RadioUnavailable as err:
        if (DEBIAN_DIST_PACKAGES / "SoapySDR.py").is_file():
            fix = _reach_debian_module()
        else:
            fix = ("install it: sudo apt install python3-soapysdr (Debian, Ubuntu, Raspberry Pi "
                   "OS), or build SoapySDR with its Python bindings for this interpreter")
        return [Finding("soapysdr", "fail", str(err).split("; ")[0], fix)], None
    found = [Finding("soapysdr", "ok", f"SoapySDR {soapy.getLibVersion()} (API "
                     f"{soapy.getAPIVersion()}) from {getattr(soapy, '__file__', '?')}")]
    modules = list(soapy.listModules())
    util = shutil.which("SoapySDRUtil")
    more = " ('SoapySDRUtil --info' lists them too)" if util else ""
    if not modules:
        paths = ", ".join(soapy.listSearchPaths())
        found.append(Finding("modules", "warn", f"no SoapySDR hardware modules in {paths}",
                             "install the module for your receiver, e.g. sudo apt install "
                             "soapysdr0.8-module-rtlsdr (or soapysdr0.8-module-all)"))
        return found, soapy
    names = sorted({Path(m).name.removeprefix("lib").removesuffix(".so")
                    .removesuffix("Support") for m in modules})
    found.append(Finding("modules", "ok", f"{len(modules)} hardware modules: "
                         f"{', '.join(names)}{more}"))
    loader = getattr(soapy, "getLoaderResult", None)
    if loader is not None:
        soapy.loadModules()
        for path in modules:
            problems = {str(k): str(v) for k, v in dict(loader(path)).items() if str(v)}
            if problems:
                found.append(Finding("modules", "warn", f"{Path(path).name} did not load: "
                                     f"{'; '.join(problems.values())}",
                                     "reinstall the module built for this SoapySDR version"))
    return found, soapy


def check_devices(soapy: object | None, driver: str) -> list[Finding]:
    """Devices that enumerate for ``driver``, each opened and closed once."""
    if soapy is None:
        return []
    wanted = f" matching {driver!r}" if driver else ""
    devices = find_devices(driver)
    if not devices:
        return [Finding("devices", "warn", f"no radio found{wanted}",
                        "plug the receiver in (lsusb should list it), install its SoapySDR "
                        "hardware module, and see the USB checks below; until then pipelines "
                        "run on their fallback source")]
    out = []
    for found in devices:
        label = device_label(found)
        try:
            device = soapy.Device(found)
        except Exception as err:  # drivers raise their own exception types
            out.append(Finding("devices", "fail", f"{label} enumerates but does not open: {err}",
                               "another program may hold it (close it), the kernel TV driver "
                               "may (see below), or the permissions do (see usb-access)"))
            continue
        device.close()
        out.append(Finding("devices", "ok", f"{label} opens"))
    return out


# -- USB and kernel ----------------------------------------------------------------------------
def _read(path: Path) -> str | None:
    try:
        return path.read_text(encoding="ascii", errors="replace").strip()
    except OSError:
        return None


def usb_receivers(sys_usb: Path) -> list[tuple[Path, str, str]]:
    """(sysfs folder, vendor:product, name) of each known receiver on the USB bus."""
    out = []
    for folder in sorted(sys_usb.glob("*")):
        vendor, product = _read(folder / "idVendor"), _read(folder / "idProduct")
        if vendor and product and f"{vendor}:{product}" in SDR_USB_IDS:
            out.append((folder, f"{vendor}:{product}", SDR_USB_IDS[f"{vendor}:{product}"]))
    return out


def check_usb_access(sys_usb: Path = Path("/sys/bus/usb/devices"),
                     dev_usb: Path = Path("/dev/bus/usb"),
                     access: Callable[[str, int], bool] = os.access) -> list[Finding]:
    """Each known receiver on the bus, and whether this user may open its device node."""
    if not sys_usb.is_dir():
        return [Finding("usb-access", "note", f"no USB bus visible at {sys_usb} (a container "
                        "without USB passthrough?)", "")]
    receivers = usb_receivers(sys_usb)
    if not receivers:
        return [Finding("usb-access", "note", "no known receiver on the USB bus",
                        "if yours is plugged in, check 'lsusb' and the cable or hub")]
    out = []
    for folder, ids, name in receivers:
        bus, dev = _read(folder / "busnum"), _read(folder / "devnum")
        if not (bus and dev and bus.isdigit() and dev.isdigit()):
            continue
        node = dev_usb / f"{int(bus):03d}" / f"{int(dev):03d}"
        vendor, product = ids.split(":")
        if access(str(node), os.R_OK | os.W_OK):
            out.append(Finding("usb-access", "ok", f"{name} ({ids}) at {node}: readable and "
                               "writable"))
        else:
            out.append(Finding("usb-access", "fail", f"{name} ({ids}) at {node}: this user "
                               "may not open it", _UDEV_FIX.format(v=vendor, p=product)))
    return out


def check_kernel_driver(proc_modules: Path = Path("/proc/modules"),
                        sys_usb: Path = Path("/sys/bus/usb/devices")) -> list[Finding]:
    """A DVB-T driver loaded, and whether it is bound to an RTL2832U dongle."""
    text = _read(proc_modules) or ""
    loaded = [line.split()[0] for line in text.splitlines()
              if line.split() and line.split()[0] in TV_TUNER_MODULES]
    fix = ("sudo modprobe -r dvb_usb_rtl28xxu, and keep it away for good: echo 'blacklist "
           "dvb_usb_rtl28xxu' | sudo tee /etc/modprobe.d/blacklist-rtl28xxu.conf")
    holding = []
    for folder, _, name in usb_receivers(sys_usb) if sys_usb.is_dir() else []:
        for interface in folder.parent.glob(f"{folder.name}:*"):
            driver = interface / "driver"
            if driver.is_symlink() and Path(os.readlink(driver)).name in TV_TUNER_MODULES:
                holding.append(f"{name} at {folder.name}")
    if holding:
        return [Finding("tv-driver", "fail", f"the kernel TV-tuner driver holds "
                        f"{', '.join(holding)}", fix)]
    if loaded:
        return [Finding("tv-driver", "warn", f"kernel TV-tuner driver loaded: "
                        f"{', '.join(loaded)} (it claims RTL2832U dongles when they are "
                        "plugged in)", fix)]
    return [Finding("tv-driver", "ok", "no kernel TV-tuner driver loaded")]


def check_usbfs(path: Path = Path("/sys/module/usbcore/parameters/usbfs_memory_mb")
                ) -> list[Finding]:
    """The kernel's limit on USB transfer buffers (usbcore.usbfs_memory_mb)."""
    text = _read(path)
    if text is None or not text.isdigit():
        return [Finding("usb-memory", "note", f"not reported ({path} unreadable)")]
    mb = int(text)
    fix = ("for radios above a few MS/s raise it: echo 1000 | sudo tee " f"{path}"
           " (for good: usbcore.usbfs_memory_mb=1000 on the kernel command line)")
    if mb == 0:
        return [Finding("usb-memory", "ok", "USB buffer memory is not limited")]
    if mb < 16:
        return [Finding("usb-memory", "warn", f"USB buffer memory limited to {mb} MB, below "
                        "the kernel default of 16 MB", fix)]
    return [Finding("usb-memory", "ok", f"USB buffer memory limit {mb} MB (enough for dongles "
                    "at a few MS/s)", "")]


# -- the board ---------------------------------------------------------------------------------
def slowdown_flags(word: int) -> list[str]:
    """The Raspberry Pi slowdown word in words (bits as :data:`stream.host.SLOWDOWN_BITS`)."""
    out = []
    for name, on in decode_slowdown(word).items():
        if on:
            condition = name.removesuffix("_since_boot").replace("under_voltage", "under-voltage")
            when = "since boot" if name.endswith("_since_boot") else "now"
            out.append(f"{condition.replace('_', ' ')} {when}")
    return out


def _under_voltage_alarm(hwmon: Path) -> bool | None:
    for sensor in sorted(hwmon.glob("hwmon*")):
        if _read(sensor / "name") == "rpi_volt":
            return _read(sensor / "in0_lcrit_alarm") == "1"
    return None


def check_slowdown(probe: HostProbe | None = None,
                   hwmon: Path = Path("/sys/class/hwmon")) -> list[Finding]:
    """Temperature, slowdown and under-voltage, where the board reports them."""
    out = []
    power_fix = ("use a supply that holds its voltage under load (Raspberry Pi: the official "
                 "one), a short thick cable, and a powered hub for the receiver")
    probe = probe or HostProbe()
    word = probe.slowdown_word()
    if word is not None:
        flags = slowdown_flags(word)
        if word & _NOW_BITS:
            out.append(Finding("slowdown", "fail", f"slowdown word {word:#x}: "
                               f"{', '.join(flags)}", power_fix + "; cool the board"))
        elif flags:
            out.append(Finding("slowdown", "warn", f"slowdown word {word:#x}: "
                               f"{', '.join(flags)}", power_fix))
        else:
            out.append(Finding("slowdown", "ok", "no slowdown or under-voltage since boot"))
    alarm = _under_voltage_alarm(hwmon)
    if alarm:
        out.append(Finding("under-voltage", "fail", "the board reports under-voltage now",
                           power_fix))
    temps = probe.temperatures()
    if temps:
        hottest = max(temps.values())
        status = "warn" if hottest >= HOT_C else "ok"
        out.append(Finding("temperature", status, f"CPU {hottest:.1f} degC",
                           "add a heatsink or airflow; a slowed CPU drops samples"
                           if status == "warn" else ""))
    if not out:
        out.append(Finding("slowdown", "note", "this machine reports no slowdown, "
                           "under-voltage or temperature"))
    return out


# -- the command -------------------------------------------------------------------------------
def run_checks(driver: str = "") -> list[Finding]:
    """Every check, in the order printed."""
    findings = [Finding("python", "ok", f"Python {sys.version.split()[0]} at {sys.executable}"
                        + (" (virtual environment)" if sys.prefix != sys.base_prefix else ""))]
    soapy_findings, soapy = check_soapysdr()
    findings += soapy_findings
    findings += check_devices(soapy, driver)
    findings += check_usb_access()
    findings += check_kernel_driver()
    findings += check_usbfs()
    findings += check_slowdown()
    return findings


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``doctor``."""
    parser.add_argument("--driver", default="", metavar="ARGS",
                        help="device arguments of the radio to look for, e.g. driver=rtlsdr")
    parser.add_argument("--json", action="store_true", help="one JSON line per finding")


def _print(findings: Iterable[Finding], as_json: bool) -> None:
    for f in findings:
        if as_json:
            print(json.dumps({"event": "finding", **asdict(f)}))
            continue
        print(f"{f.status:<5} {f.check:<13} {f.detail}")
        if f.fix:
            print(f"{'':<19} fix: {f.fix}")


def main(args: argparse.Namespace) -> int:
    """Print every finding; exit 1 if any check failed, else 0."""
    findings = run_checks(args.driver)
    _print(findings, args.json)
    failed = [f for f in findings if f.status == "fail"]
    if not args.json:
        print(f"{len(failed)} problem(s) to fix" if failed else
              "nothing stops a radio here" if not any(f.status == "warn" for f in findings)
              else "no blocking problem; see the warnings")
    return 1 if failed else 0
