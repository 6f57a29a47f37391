"""``phasefree run [FILE]``: run a pipeline until its streams end, a time limit, or Ctrl-C."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stream.commands.common import (
    EXIT_BLOCK_FAILED,
    EXIT_CONFIG,
    add_pipeline_arguments,
    open_pipeline,
)
from stream.cpus import CpuSettingError
from stream.errors import PipelineError
from stream.host import HostProbe
from stream.monitor import monitor_argument, open_monitor, with_views
from stream.parts import choose_parts
from stream.pictures import snapshot_problem, write_snapshot
from stream.profile import format_profile
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
    parser.add_argument("--part", metavar="NAME[,NAME]",
                        help="run only these parts of a divided pipeline; links to the other "
                             "parts go over their crossings (default: the parts the file "
                             "declares)")
    parser.add_argument("--cpus", metavar="auto|all|LIST",
                        help="cores for the block threads: auto (default: one core per process; "
                             "divide the pipeline into parts to use more), all, or e.g. 2 or "
                             "0,2-3 (overrides [pipeline] cpus)")
    parser.add_argument("--monitor", type=monitor_argument, metavar="HOST:PORT",
                        help="serve the live page, /status and /metrics on HOST:PORT (port 0: "
                             "any free port; use 127.0.0.1 unless others must reach it: the "
                             "monitor has no authentication)")
    parser.add_argument("--profile", action="store_true",
                        help="at the end print each block's share of the busy time (on "
                             "stderr)")
    parser.add_argument("--snapshot", type=Path, metavar="DIR",
                        help="at the end write DIR/status.json and the eye, spectrum and BER "
                             "pictures (pictures need matplotlib)")


def main(args: argparse.Namespace) -> int:
    """Run the pipeline and report; exit 0, 2 (pipeline file) or 3 (a block failed)."""
    if args.seconds is not None and not args.seconds > 0:
        print(f"phasefree: --seconds must be > 0 (got {args.seconds})", file=sys.stderr)
        return EXIT_CONFIG
    pipe = open_pipeline(args.file, args.overrides)
    if pipe is None:
        return EXIT_CONFIG
    if args.snapshot is not None and (problem := snapshot_problem(args.snapshot)):
        print(f"phasefree: --snapshot {problem}", file=sys.stderr)
        return EXIT_CONFIG
    try:
        plan = choose_parts(pipe, args.part)
    except PipelineError as err:
        print(f"phasefree: {err.in_file(args.file) if args.file else err}", file=sys.stderr)
        return EXIT_CONFIG
    try:
        runner = Runner(pipe, part=plan, cpus=args.cpus)
    except CpuSettingError as err:
        print(f"phasefree: --cpus: {err}", file=sys.stderr)
        return EXIT_CONFIG
    probe = HostProbe()
    monitor = None
    if args.monitor is not None:
        monitor = open_monitor(runner, args.monitor, probe)
        if monitor is None:
            return EXIT_CONFIG
    as_json = args.json or not sys.stdout.isatty()
    view = None if as_json else LiveView(sys.stdout)

    def on_status(status: dict[str, Any]) -> None:
        status["host"] = probe.read()
        if view is None:
            print(json_line(status), flush=True)
        else:
            view.draw(status)

    stop_requests.attach(lambda: runner.stop("stopped"), runner.abort)
    try:
        summary = runner.run(seconds=args.seconds, on_status=on_status,
                             status_interval=args.status_interval)
    except OSError as err:  # a crossing's address cannot be bound or connected
        print(f"phasefree: {err}", file=sys.stderr)
        return EXIT_CONFIG
    finally:
        stop_requests.detach()
        if monitor is not None:
            monitor.stop()
    summary["host"] = probe.read()
    if view is None:
        print(json_line(summary), flush=True)
    else:
        view.clear()
        print(format_summary(summary), flush=True)
    if args.profile:
        print(format_profile(summary), file=sys.stderr, flush=True)
    if args.snapshot is not None:
        for note in write_snapshot(args.snapshot, with_views(runner, dict(summary))):
            print(f"snapshot: {note}", file=sys.stderr)
    if runner.failure is not None:
        print(f"phasefree: {runner.failure}", file=sys.stderr)
        return EXIT_BLOCK_FAILED
    return 0
