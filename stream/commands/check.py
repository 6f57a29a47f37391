"""``phasefree check FILE``: validate a pipeline file and print its graph."""

from __future__ import annotations

import argparse

from stream.commands.common import EXIT_CONFIG, add_pipeline_arguments, open_pipeline

HELP = "validate a pipeline file and print each link with its dtype and sample rate"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``check``."""
    add_pipeline_arguments(parser, optional_file=False)


def main(args: argparse.Namespace) -> int:
    """Print blocks and links of a valid pipeline; exit 2 with the error otherwise."""
    pipe = open_pipeline(args.file, args.overrides)
    if pipe is None:
        return EXIT_CONFIG
    print(f"pipeline {pipe.name!r}: {len(pipe.blocks)} blocks, {len(pipe.edges)} links")
    for bid in pipe.order():
        print(f"  block {bid:<12} kind {pipe.blocks[bid].kind}")
    for edge in pipe.edges:
        spec = edge.spec
        assert spec is not None
        kind = "tap " if edge.tap else "link"
        print(f"  {kind} {edge.label():<40} {spec.dtype:<10} {spec.rate:>14,.3f} samples/s")
    return 0
