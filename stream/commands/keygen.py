"""``phasefree keygen DIR``: write CURVE key pairs for links between hosts."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from stream.commands.common import EXIT_CONFIG
from stream.curve import write_key_pairs

HELP = "write CURVE key pairs (NAME.key public, NAME.key_secret secret) for tcp crossings"

#: Pairs written when no names are given: the host that listens and the board that connects,
#: as the shipped split pipelines name them.
DEFAULT_NAMES = ("host", "board")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``keygen``."""
    parser.add_argument("folder", type=Path, metavar="DIR", help="folder for the key files")
    parser.add_argument("names", nargs="*", metavar="NAME",
                        help=f"one key pair per name (default: {' '.join(DEFAULT_NAMES)})")
    parser.add_argument("--force", action="store_true", help="replace existing key files")


def main(args: argparse.Namespace) -> int:
    """Write the pairs; exit 2 if a file exists (without --force) or a name is unusable."""
    names = args.names or list(DEFAULT_NAMES)
    bad = [n for n in names if not n or Path(n).name != n or n.startswith(".")]
    if bad:
        print(f"phasefree: keygen: key names are plain file names (got {bad[0]!r})",
              file=sys.stderr)
        return EXIT_CONFIG
    try:
        written = write_key_pairs(args.folder, names, force=args.force)
    except OSError as err:  # FileExistsError included
        print(f"phasefree: keygen: {err}", file=sys.stderr)
        return EXIT_CONFIG
    for path in written:
        print(path)
    print("copy only the .key files to other machines; keep each .key_secret where it was "
          "made", file=sys.stderr)
    return 0
