"""``phasefree run [FILE]``: run a pipeline until its streams end, a time limit, or Ctrl-C."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from stream.commands.common import (
    EXIT_BLOCK_FAILED,
    EXIT_CONFIG,
    add_pipeline_arguments,
    open_pipeline,
)
from stream.report import LiveView, format_summary, json_line
from stream.runner import Runner
from stream.signals import stop_requests

HELP = "run a pipeline (default: the built-in simulated loopback receiver)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``run``."""
    add_pipeline_arguments(parser, optional_file=True)
    parser.add_argument("--seconds", type=float, metavar="S",
                        help="stop after S seconds of running")
    parser.add_argument("--json", action="store_true",
                        help="JSON lines on stdout (also the default when stdout is not a "
                             "terminal)")
    parser.add_argument("--status-interval", type=float, default=1.0, metavar="S",
                        help="seconds between status records (default 1)")


def main(args: argparse.Namespace) -> int:
    """Run the pipeline and report; exit 0, 2 (pipeline file) or 3 (a block failed)."""
    if args.seconds is not None and not args.seconds > 0:
        print(f"phasefree: --seconds must be > 0 (got {args.seconds})", file=sys.stderr)
        return EXIT_CONFIG
    pipe = open_pipeline(args.file, args.overrides)
    if pipe is None:
        return EXIT_CONFIG
    runner = Runner(pipe)
    as_json = args.json or not sys.stdout.isatty()
    view = None if as_json else LiveView(sys.stdout)

    def on_status(status: dict[str, Any]) -> None:
        if view is None:
            print(json_line(status), flush=True)
        else:
            view.draw(status)

    stop_requests.attach(lambda: runner.stop("stopped"), runner.abort)
    try:
        summary = runner.run(seconds=args.seconds, on_status=on_status,
                             status_interval=args.status_interval)
    finally:
        stop_requests.detach()
    if view is None:
        print(json_line(summary), flush=True)
    else:
        view.clear()
        print(format_summary(summary), flush=True)
    if runner.failure is not None:
        print(f"phasefree: {runner.failure}", file=sys.stderr)
        return EXIT_BLOCK_FAILED
    return 0
