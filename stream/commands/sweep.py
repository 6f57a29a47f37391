"""``phasefree sweep``: measured bit error rate against Eb/N0, beside the theory curve.

The pipeline runs once per Eb/N0 point with ``src.ebn0_db`` set to the point and the source
made endless; each point ends when the ``ber`` block has counted ``--bits`` bits or
``--min-errors`` errors. The table gives each point's BER with its Clopper-Pearson interval and
the theory for the source's modulation; the implementation loss is the extra Eb/N0 the
receiver needs at ``--target-ber``, read off the measured curve (log10 BER interpolated
linearly in Eb/N0 between the two points around the target).
"""

from __future__ import annotations

import argparse
import csv
import itertools
import json
import math
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from blocks._modulate import BITS_PER_SYMBOL
from blocks._theory import SCHEMES, ber_theory, ebn0_for_ber
from stream.commands.common import (
    EXIT_BLOCK_FAILED,
    EXIT_CONFIG,
    add_pipeline_arguments,
    pipeline_path,
)
from stream.errors import PipelineError
from stream.graph import Pipeline
from stream.loader import load_pipeline
from stream.pictures import PlotUnavailable, load_pyplot
from stream.runner import Runner

__all__ = ["COLUMNS", "HELP", "add_arguments", "ebn0_points", "implementation_loss_db",
           "main"]

HELP = "measure BER against Eb/N0 on a simulated source and compare it with theory"

#: Block ids the sweep drives and reads.
SOURCE_ID = "src"
METER_ID = "ber"
#: Columns of the table, the CSV file and the JSON points.
COLUMNS = ("ebn0_db", "bits", "errors", "ber", "ber_low", "ber_high", "theory_ber")
#: Most points one sweep may have.
MAX_POINTS = 500
#: A point also ends when the source has sent this many times ``--bits`` without the meter
#: counting them (a receiver that never locks at a very low Eb/N0 must not hang the sweep).
_SENT_FACTOR = 8
_SENT_SLACK = 200_000
#: Exit status after Ctrl-C (128 + SIGINT, common practice).
_EXIT_INTERRUPTED = 130


class _BadOption(ValueError):
    """An option value that cannot be used; the message names the option."""


def ebn0_points(text: str) -> list[float]:
    """Parse ``START:STOP:STEP`` (stop included) into Eb/N0 values in dB.

    Raises
    ------
    argparse.ArgumentTypeError
        With a message naming the problem.
    """
    parts = text.split(":")
    if len(parts) != 3:
        raise argparse.ArgumentTypeError(f"expected START:STOP:STEP in dB, e.g. 4:12:1 "
                                         f"(got {text!r})")
    try:
        start, stop, step = (float(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"START, STOP and STEP must be numbers "
                                         f"(got {text!r})") from None
    if not all(math.isfinite(v) for v in (start, stop, step)):
        raise argparse.ArgumentTypeError(f"START, STOP and STEP must be finite (got {text!r})")
    if step == 0:
        raise argparse.ArgumentTypeError(f"STEP must not be 0 (got {text!r})")
    if (stop - start) * step < 0:
        raise argparse.ArgumentTypeError(f"STEP {step:g} leads away from STOP {stop:g} "
                                         f"(got {text!r})")
    count = math.floor((stop - start) / step + 1e-9) + 1
    if count > MAX_POINTS:
        raise argparse.ArgumentTypeError(f"{count} points; at most {MAX_POINTS} "
                                         f"(got {text!r})")
    return [round(start + i * step, 10) for i in range(count)]


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1 (got {value})")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the command's options on ``parser``."""
    add_pipeline_arguments(parser, optional_file=False)
    parser.add_argument("--ebn0", required=True, type=ebn0_points, metavar="START:STOP:STEP",
                        help="Eb/N0 points in dB, stop included (e.g. 4:12:0.5)")
    parser.add_argument("--bits", required=True, type=_positive_int, metavar="N",
                        help="bits to count per point (the point ends there at the latest)")
    parser.add_argument("--min-errors", type=_positive_int, default=100, metavar="E",
                        help="end a point early once E errors are counted (default 100)")
    parser.add_argument("--target-ber", type=float, default=1e-3, metavar="P",
                        help="BER at which the implementation loss is read (default 1e-3)")
    parser.add_argument("--csv", type=Path, metavar="OUT", help="write the table as CSV")
    parser.add_argument("--plot", type=Path, metavar="OUT.png",
                        help="draw measured points over the theory curve (needs matplotlib: "
                             "the 'plot' extra)")
    parser.add_argument("--json", action="store_true",
                        help="print one JSON object instead of the table")


# -- measuring --------------------------------------------------------------------------------
def _point_overrides(pipe: Pipeline, ebn0_db: float) -> list[str]:
    """Overrides that set the point's Eb/N0 and make the source endless and unpaced."""
    declared = {p.name for p in type(pipe.blocks[SOURCE_ID]).params}
    out = [f"{SOURCE_ID}.ebn0_db={ebn0_db!r}"]
    for name, value in (("symbols", "0"), ("packets", "0"), ("realtime", "false")):
        if name in declared:
            out.append(f"{SOURCE_ID}.{name}={value}")
    return out


def _check_pipeline(pipe: Pipeline, file: str) -> str | None:
    """Raise PipelineError unless the pipeline can be swept; return its theory scheme."""
    src = pipe.blocks.get(SOURCE_ID)
    if src is None or "ebn0_db" not in {p.name for p in type(src).params}:
        raise PipelineError(f"blocks.{SOURCE_ID}", "a sweep needs a simulated source with id "
                            f"{SOURCE_ID!r} that takes ebn0_db (kind sim)", file)
    meter = pipe.blocks.get(METER_ID)
    if meter is None or meter.kind != "ber":
        raise PipelineError(f"blocks.{METER_ID}", f"a sweep needs a meter of kind 'ber' with "
                            f"id {METER_ID!r}", file)
    scheme = getattr(src.p, "modulation", None)
    return scheme if scheme in SCHEMES else None


def _done_when(bits: int, min_errors: int, bits_per_symbol: int,
               ) -> Callable[[dict[str, Any]], bool]:
    """The ``until`` test of one point: enough bits or errors counted, or a meter that
    does not count what the source sends."""
    def done(status: dict[str, Any]) -> bool:
        meter = status["blocks"][METER_ID]
        if meter.get("bits", 0) >= bits or meter.get("errors", 0) >= min_errors:
            return True
        sent = status["blocks"][SOURCE_ID].get("symbols", 0) * bits_per_symbol
        return sent > _SENT_FACTOR * bits + _SENT_SLACK
    return done


class _Progress:
    """A tqdm bar over the bits of every point (shown only on a terminal)."""

    def __init__(self, points: int, bits: int) -> None:
        from tqdm import tqdm

        self._bar = tqdm(total=points * bits, unit="bit", unit_scale=True, file=sys.stderr,
                         disable=None, leave=False, dynamic_ncols=True)
        self._bits = bits
        self._done = 0

    def point(self, index: int, ebn0_db: float) -> Callable[[dict[str, Any]], None]:
        """Status hook for point ``index``."""
        base = index * self._bits
        self._bar.set_description(f"Eb/N0 {ebn0_db:g} dB")

        def hook(status: dict[str, Any]) -> None:
            meter = status["blocks"][METER_ID]
            self._advance(base + min(self._bits, int(meter.get("bits", 0))))
            self._bar.set_postfix(errors=meter.get("errors", 0), refresh=False)
        return hook

    def _advance(self, position: int) -> None:
        if position > self._done:
            self._bar.update(position - self._done)
            self._done = position

    def end_point(self, index: int) -> None:
        self._advance((index + 1) * self._bits)

    def close(self) -> None:
        self._bar.close()


def _measure(file: Path, overrides: Sequence[str], pipe: Pipeline, ebn0_db: float,
             args: argparse.Namespace, hook: Callable[[dict[str, Any]], None],
             ) -> dict[str, Any]:
    point_pipe = load_pipeline(file, [*overrides, *_point_overrides(pipe, ebn0_db)])
    modulation = getattr(pipe.blocks[SOURCE_ID].p, "modulation", None)
    done = _done_when(args.bits, args.min_errors, BITS_PER_SYMBOL.get(modulation, 1))
    summary = Runner(point_pipe).run(on_status=hook, status_interval=0.25, until=done)
    if "error" in summary:
        err = summary["error"]
        raise _BlockFailure(f"block {err['block']!r} failed at Eb/N0 {ebn0_db:g} dB: "
                            f"{err['type']}: {err['message']}")
    return summary["blocks"][METER_ID]


class _BlockFailure(RuntimeError):
    """A block raised while a point was measured."""


# -- reading the curve ------------------------------------------------------------------------
def implementation_loss_db(points: Sequence[dict[str, Any]], scheme: str | None,
                           target_ber: float) -> float | None:
    """Eb/N0 where the measured curve crosses ``target_ber``, minus what theory needs.

    Parameters
    ----------
    points : sequence of dict
        Measured points with ``ebn0_db`` and ``ber`` (points without errors are skipped).
    scheme : str or None
        Theory scheme (``blocks._theory.SCHEMES``); None gives None.
    target_ber : float
        BER at which the loss is read.

    Returns
    -------
    float or None
        Positive when the receiver needs more Eb/N0 than theory; None when the measured
        points do not bracket the target.

    Notes
    -----
    log10(BER) is interpolated linearly in Eb/N0 (dB) between neighbouring measured points:
    BER curves of these schemes are close to straight there over a dB or two (common
    practice). The first crossing from above is used.
    """
    if scheme is None:
        return None
    usable = sorted((p["ebn0_db"], p["ber"]) for p in points if p["ber"] > 0)
    target = math.log10(target_ber)
    for (e0, b0), (e1, b1) in itertools.pairwise(usable):
        l0, l1 = math.log10(b0), math.log10(b1)
        if l0 >= target >= l1 and l0 != l1:
            crossing = e0 + (target - l0) * (e1 - e0) / (l1 - l0)
            return crossing - ebn0_for_ber(scheme, target_ber)
    return None


# -- output -----------------------------------------------------------------------------------
def _row(ebn0_db: float, meter: dict[str, Any], scheme: str | None) -> dict[str, Any]:
    theory = float(ber_theory(scheme, ebn0_db)) if scheme is not None else None
    return {"ebn0_db": ebn0_db, "bits": int(meter.get("bits", 0)),
            "errors": int(meter.get("errors", 0)), "ber": float(meter.get("ber", 0.0)),
            "ber_low": float(meter.get("ber_low", 0.0)),
            "ber_high": float(meter.get("ber_high", 1.0)), "theory_ber": theory}


def _table(result: dict[str, Any]) -> str:
    head = (f"{'ebn0_db':>8} {'bits':>11} {'errors':>8} {'ber':>10} {'ber_low':>10} "
            f"{'ber_high':>10} {'theory_ber':>11}")
    lines = [f"{result['pipeline']}: {result['modulation'] or 'unknown modulation'}, "
             f"{result['confidence']:.0%} Clopper-Pearson interval", head]
    for p in result["points"]:
        theory = "-" if p["theory_ber"] is None else f"{p['theory_ber']:.3e}"
        lines.append(f"{p['ebn0_db']:>8.2f} {p['bits']:>11d} {p['errors']:>8d} "
                     f"{p['ber']:>10.3e} {p['ber_low']:>10.3e} {p['ber_high']:>10.3e} "
                     f"{theory:>11}")
    loss = result["implementation_loss_db"]
    target = result["target_ber"]
    if loss is not None:
        lines.append(f"implementation loss at BER {target:g}: {loss:+.2f} dB "
                     f"(theory needs {result['theory_ebn0_db']:.2f} dB)")
    elif result["modulation"] is None:
        lines.append("implementation loss: no theory for this source's modulation")
    else:
        lines.append(f"implementation loss at BER {target:g}: not measured (no two points "
                     "with errors on either side of the target)")
    return "\n".join(lines)


def _write_csv(path: Path, points: Sequence[dict[str, Any]]) -> None:
    with path.open("w", newline="", encoding="utf-8") as f:
        writer = csv.DictWriter(f, fieldnames=COLUMNS)
        writer.writeheader()
        for p in points:
            writer.writerow({k: ("" if p[k] is None else p[k]) for k in COLUMNS})


def _plot(path: Path, result: dict[str, Any]) -> None:
    plt = load_pyplot()
    points = result["points"]
    ebn0 = np.array([p["ebn0_db"] for p in points])
    fig, ax = plt.subplots(figsize=(7, 5), dpi=100)
    try:
        if result["modulation"] is not None:
            grid = np.linspace(ebn0.min() - 1, ebn0.max() + 1, 200)
            ax.semilogy(grid, ber_theory(result["modulation"], grid), "-", color="0.3",
                        label=f"theory ({result['modulation']})")
        measured = [p for p in points if p["errors"] > 0]
        if measured:
            x = np.array([p["ebn0_db"] for p in measured])
            y = np.array([p["ber"] for p in measured])
            below = y - np.array([p["ber_low"] for p in measured])
            above = np.array([p["ber_high"] for p in measured]) - y
            ax.errorbar(x, y, yerr=np.vstack([below, above]), fmt="o", capsize=3,
                        label=f"measured ({result['confidence']:.0%} interval)")
        clean = [p for p in points if p["errors"] == 0 and p["bits"] > 0]
        if clean:
            ax.semilogy([p["ebn0_db"] for p in clean], [p["ber_high"] for p in clean], "v",
                        label="no errors: upper bound")
        ax.axhline(result["target_ber"], linestyle=":", color="0.5")
        ax.set_yscale("log")
        ax.set_xlabel("Eb/N0 (dB)")
        ax.set_ylabel("bit error rate")
        title = result["pipeline"]
        if result["implementation_loss_db"] is not None:
            title += (f": implementation loss {result['implementation_loss_db']:+.2f} dB "
                      f"at {result['target_ber']:g}")
        ax.set_title(title)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend()
        fig.tight_layout()
        fig.savefig(path, format="png")
    finally:
        plt.close(fig)


# -- the command ------------------------------------------------------------------------------
def _check_options(args: argparse.Namespace) -> None:
    if not (math.isfinite(args.target_ber) and 0 < args.target_ber < 0.5):
        raise _BadOption(f"--target-ber must be in (0, 0.5) (got {args.target_ber!r})")
    for option, path in (("--csv", args.csv), ("--plot", args.plot)):
        if path is not None and not path.parent.is_dir():
            raise _BadOption(f"{option}: folder does not exist (got {str(path)!r})")
    if args.plot is not None:
        try:
            load_pyplot()
        except PlotUnavailable as err:
            raise _BadOption(f"--plot: {err}") from None


def main(args: argparse.Namespace) -> int:
    """Run the sweep; 0 on success, 2 for bad options or pipeline files, 3 if a block fails."""
    try:
        _check_options(args)
    except _BadOption as err:
        print(f"phasefree sweep: {err}", file=sys.stderr)
        return EXIT_CONFIG
    file = pipeline_path(args.file)
    try:
        pipe = load_pipeline(file, args.overrides)
        scheme = _check_pipeline(pipe, str(file))
        # every point's overrides must be valid too (e.g. an Eb/N0 below the source's range)
        for ebn0_db in (args.ebn0[0], args.ebn0[-1]):
            load_pipeline(file, [*args.overrides, *_point_overrides(pipe, ebn0_db)])
    except PipelineError as err:
        print(f"phasefree: {err}", file=sys.stderr)
        return EXIT_CONFIG
    confidence = float(getattr(pipe.blocks[METER_ID].p, "confidence", 0.95))
    points: list[dict[str, Any]] = []
    progress = _Progress(len(args.ebn0), args.bits)
    status = 0
    try:
        for i, ebn0_db in enumerate(args.ebn0):
            meter = _measure(file, args.overrides, pipe, ebn0_db, args,
                             progress.point(i, ebn0_db))
            progress.end_point(i)
            points.append(_row(ebn0_db, meter, scheme))
            if meter.get("bits", 0) < args.bits and meter.get("errors", 0) < args.min_errors:
                print(f"phasefree sweep: at Eb/N0 {ebn0_db:g} dB the meter counted only "
                      f"{meter.get('bits', 0)} bits (never locked, or lost sync)",
                      file=sys.stderr)
    except _BlockFailure as err:
        progress.close()
        print(f"phasefree sweep: {err}", file=sys.stderr)
        return EXIT_BLOCK_FAILED
    except KeyboardInterrupt:
        print("phasefree sweep: interrupted; points measured so far follow", file=sys.stderr)
        status = _EXIT_INTERRUPTED
    progress.close()
    loss = implementation_loss_db(points, scheme, args.target_ber)
    result = {
        "pipeline": pipe.name,
        "modulation": scheme,
        "target_ber": args.target_ber,
        "confidence": confidence,
        "theory_ebn0_db": ebn0_for_ber(scheme, args.target_ber) if scheme else None,
        "points": points,
        "implementation_loss_db": loss,
    }
    if args.csv is not None:
        _write_csv(args.csv, points)
    if args.plot is not None and points:
        _plot(args.plot, result)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print(_table(result))
    return status
