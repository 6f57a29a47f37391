"""The registry of block kinds: kind name -> block class.

A block class registers itself by defining ``kind``. The built-in kinds live in the ``blocks``
package, imported on first use so that the runtime layer has no import-time dependency on DSP.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from stream.block import Block

__all__ = ["kinds", "lookup", "register"]

_KINDS: dict[str, type[Block]] = {}
_loaded = False


def register(cls: type[Block]) -> None:
    """Record ``cls`` under ``cls.kind``; a second class with the same kind is an error."""
    other = _KINDS.get(cls.kind)
    if other is not None and other is not cls and other.__qualname__ != cls.__qualname__:
        raise TypeError(f"block kind {cls.kind!r} defined twice: {other} and {cls}")
    _KINDS[cls.kind] = cls


def _load_builtin() -> None:
    global _loaded
    if not _loaded:
        _loaded = True
        importlib.import_module("blocks")


def kinds() -> dict[str, type[Block]]:
    """Every known kind, sorted by name."""
    _load_builtin()
    return dict(sorted(_KINDS.items()))


def lookup(kind: str) -> type[Block] | None:
    """The class registered for ``kind``, or None."""
    _load_builtin()
    return _KINDS.get(kind)
