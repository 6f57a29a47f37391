"""``phasefree radios``: the radios SoapySDR finds, with the ``driver`` string for each."""

from __future__ import annotations

import argparse
import sys

from blocks.radio import RadioUnavailable, device_label, find_devices, reopen_args

HELP = "list the radios SoapySDR finds (exit 1 when there are none)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``radios``."""
    parser.add_argument("--driver", default="", metavar="ARGS",
                        help="device arguments to match, e.g. driver=rtlsdr (default: all)")


def main(args: argparse.Namespace) -> int:
    """Print each device found; exit 1 when the module is missing or nothing is found."""
    try:
        devices = find_devices(args.driver)
    except RadioUnavailable as err:
        print(f"phasefree: {err}", file=sys.stderr)
        return 1
    if not devices:
        wanted = f" matching {args.driver!r}" if args.driver else ""
        print(f"phasefree: no radio found{wanted}: plug it in, install the SoapySDR hardware "
              f"module for it (Debian: soapysdr0.8-module-rtlsdr, or -all), and run "
              f"'phasefree doctor' to see what else is in the way", file=sys.stderr)
        return 1
    for number, found in enumerate(devices):
        print(f"{number}: {device_label(found)}")
        text = reopen_args(found, args.driver) or f"driver={found.get('driver', '')}"
        print(f"   driver = \"{text}\"   (for a radio block)")
        for key in sorted(found):
            print(f"   {key:<14} {found[key]}")
    return 0
