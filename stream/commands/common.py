"""Pieces shared by the sub-commands: loading a pipeline file with a clear error."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from stream.errors import PipelineError
from stream.graph import Pipeline
from stream.loader import load_pipeline
from stream.shipped import shipped_pipeline

__all__ = ["EXIT_BLOCK_FAILED", "EXIT_CONFIG", "add_pipeline_arguments", "open_pipeline"]

#: Exit status for a problem found before running (pipeline file, arguments).
EXIT_CONFIG = 2
#: Exit status when a block failed while running.
EXIT_BLOCK_FAILED = 3


def add_pipeline_arguments(parser: argparse.ArgumentParser, optional_file: bool) -> None:
    """Add ``FILE`` and ``--set`` to a sub-command."""
    if optional_file:
        parser.add_argument("file", nargs="?", metavar="FILE",
                            help="pipeline file (default: the built-in simulated loopback)")
    else:
        parser.add_argument("file", metavar="FILE", help="pipeline file")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="ID.PARAM=VALUE", help="override a block parameter (repeatable)")


def pipeline_path(file: str | None) -> Path:
    """The named file, a shipped pipeline by name, or the built-in default."""
    if file is None:
        return shipped_pipeline()
    path = Path(file)
    if not path.exists() and not path.parent.parts:
        shipped = shipped_pipeline(file)
        if shipped.exists():
            return shipped
    return path


def open_pipeline(file: str | None, overrides: list[str]) -> Pipeline | None:
    """Load and validate a pipeline; print the error and return None if it is wrong."""
    try:
        return load_pipeline(pipeline_path(file), overrides)
    except PipelineError as err:
        print(f"phasefree: {err}", file=sys.stderr)
        return None
