"""The ``phasefree`` command line: one sub-command per module in ``stream.commands``."""

from __future__ import annotations

import argparse
import contextlib
import importlib
import logging
import os
import sys
import threading
from collections.abc import Sequence

from stream.signals import stop_requests

__all__ = ["main"]

#: Sub-command name -> module in ``stream.commands`` (HELP, add_arguments, main).
COMMANDS = {
    "run": "run",
    "check": "check",
    "blocks": "kinds",
    "sweep": "sweep",
    "budget": "budget",
    "plot": "plot",
    "keygen": "keygen",
    "radios": "radios",
    "doctor": "doctor",
}


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every sub-command."""
    parser = argparse.ArgumentParser(
        prog="phasefree",
        description="Prototype and watch noncoherent radio receivers (OOK, FSK, DPSK).")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (repeat for debug)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, module_name in COMMANDS.items():
        module = importlib.import_module(f"stream.commands.{module_name}")
        cmd = sub.add_parser(name, help=module.HELP, description=module.HELP)
        module.add_arguments(cmd)
        cmd.set_defaults(handler=module.main)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``phasefree`` console script; returns the exit status."""
    if threading.current_thread() is threading.main_thread():
        stop_requests.install()
    parser = build_parser()
    args = parser.parse_args(argv)
    level = logging.WARNING - 10 * min(args.verbose, 2)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s",
                        stream=sys.stderr)
    try:
        return int(args.handler(args))
    except BrokenPipeError:  # output piped into e.g. head, which has closed
        sys.stderr.close()
        return 0


def console() -> None:
    """The console script: run ``main``, then leave without the interpreter's slow teardown.

    When ``main`` returns every block has finished and every file is closed; what is left is
    unloading numpy, scipy and pyzmq, which takes a second or more on a small board. Leaving
    at once lets a stopped receiver (Ctrl-C, SIGTERM from systemd) exit promptly.
    """
    code = main()
    logging.shutdown()
    for out in (sys.stdout, sys.stderr):
        with contextlib.suppress(BrokenPipeError, ValueError):  # reader gone, or closed
            out.flush()
    os._exit(code)


if __name__ == "__main__":  # pragma: no cover
    console()
