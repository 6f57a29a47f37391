"""``phasefree blocks [KIND]``: the block kinds, or one kind's ports and parameters."""

from __future__ import annotations

import argparse
import sys

from stream import registry
from stream.params import REQUIRED

HELP = "list block kinds, or show one kind's ports and parameters"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``blocks``."""
    parser.add_argument("kind", nargs="?", help="a block kind to describe")


def _default_text(default: object) -> str:
    if default is REQUIRED:
        return "required"
    if default is None:
        return "auto"
    return repr(default) if isinstance(default, str) else str(default).lower() \
        if isinstance(default, bool) else str(default)


def describe(kind: str) -> str:
    """The listing of one kind, generated from its declarations."""
    cls = registry.lookup(kind)
    assert cls is not None
    lines = [f"{kind}: {cls.summary()}"]
    for side, ports in (("inputs", cls.inputs), ("outputs", cls.outputs)):
        lines.append(f"{side}:")
        lines.extend(f"  {p.name:<10} {p.dtype_text():<22} {p.doc}"
                     + ("  (optional)" if p.optional else "") for p in ports)
        if not ports:
            lines.append("  none")
    lines.append("parameters:")
    for p in cls.params:
        unit = f" [{p.unit}]" if p.unit else ""
        lines.append(f"  {p.name}{unit}: {p.type.__name__}, default {_default_text(p.default)}"
                     f", range {p.range_text()}")
        if p.doc:
            lines.append(f"      {p.doc}")
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    """Print the listing; exit 2 for an unknown kind."""
    if args.kind is None:
        for name, cls in registry.kinds().items():
            print(f"{name:<16} {cls.summary()}")
        return 0
    if registry.lookup(args.kind) is None:
        known = ", ".join(registry.kinds())
        print(f"phasefree: unknown kind {args.kind!r} (kinds: {known})", file=sys.stderr)
        return 2
    print(describe(args.kind))
    return 0
