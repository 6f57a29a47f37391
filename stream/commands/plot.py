"""``phasefree plot eye|spectrum|ber STATUS.json -o OUT.png``: a picture of a finished run."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from stream.commands.common import EXIT_CONFIG
from stream.pictures import PICTURES, PlotUnavailable, draw

HELP = "draw the eye, spectrum or BER history of a saved status (run --snapshot) as a PNG"

#: Exit status when the file holds no such figure.
EXIT_NO_FIGURE = 1


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``plot``."""
    parser.add_argument("picture", choices=tuple(PICTURES),
                        help="eye diagram, averaged spectrum, or BER over time")
    parser.add_argument("status", type=Path, metavar="STATUS.json",
                        help="a status record with views: run --snapshot's status.json, or "
                             "the monitor's /status saved to a file")
    parser.add_argument("-o", "--output", type=Path, required=True, metavar="OUT.png",
                        help="PNG file to write")


def main(args: argparse.Namespace) -> int:
    """Draw; 0 on success, 1 if the record has no such figure, 2 for a bad file or option."""
    try:
        record = json.loads(args.status.read_text())
    except OSError as err:
        print(f"phasefree plot: cannot read {args.status}: {err.strerror}", file=sys.stderr)
        return EXIT_CONFIG
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        print(f"phasefree plot: {args.status} is not JSON: {err}", file=sys.stderr)
        return EXIT_CONFIG
    if not isinstance(record, dict) or not isinstance(record.get("blocks"), dict):
        print(f"phasefree plot: {args.status} is not a status record (no 'blocks' table)",
              file=sys.stderr)
        return EXIT_CONFIG
    try:
        drawn = draw(args.picture, record, args.output)
    except PlotUnavailable as err:
        print(f"phasefree plot: {err}", file=sys.stderr)
        return EXIT_CONFIG
    except OSError as err:
        print(f"phasefree plot: cannot write {args.output}: {err.strerror}", file=sys.stderr)
        return EXIT_CONFIG
    if not drawn:
        print(f"phasefree plot: {args.status} holds no {args.picture} figure (the pipeline "
              f"needs a {args.picture} meter, and --snapshot or /status keeps its views)",
              file=sys.stderr)
        return EXIT_NO_FIGURE
    print(f"wrote {args.output}")
    return 0
