"""Keep freed memory in the process instead of handing it back to the system at every chunk.

A receiver allocates and frees the same large arrays chunk after chunk. With glibc's default
settings an array of more than 128 KiB is mapped fresh and unmapped again when freed, and free
space at the top of a heap is given back once it passes a threshold, so the next chunk touches
new pages and takes a page fault for every 4 KiB (about a microsecond each). On the machine the
benchmark runs on this made page faults a larger cost than the arithmetic of some blocks, and
the OOK reference chain ran about 1.3x faster with the settings below (``tools/bench.py``).

``keep_freed_memory`` raises glibc's mapping threshold to its largest value, keeps free heap
memory for reuse and gives every thread the same heap (``mallopt(3)``: ``M_MMAP_THRESHOLD``,
``M_TRIM_THRESHOLD``, ``M_TOP_PAD``, ``M_ARENA_MAX``).
Memory stays bounded: what is kept is what the run has already used at its peak, and it is
reused by the next chunks. Elsewhere than glibc it does nothing.
"""

from __future__ import annotations

import ctypes
import logging
import os

__all__ = ["keep_freed_memory"]

log = logging.getLogger("phasefree.memory")

# mallopt(3) parameter numbers (glibc <malloc.h>)
_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_THRESHOLD = -3
_M_ARENA_MAX = -8

#: Arrays up to this size come from the heap (glibc's largest mapping threshold on 64-bit).
MMAP_THRESHOLD = 32 << 20
#: Free memory at the top of a heap that is kept rather than returned.
TRIM_THRESHOLD = 256 << 20
#: Extra room asked for whenever a heap grows, so it grows seldom.
TOP_PAD = 16 << 20
#: One heap for every thread: the block threads take turns at the interpreter lock anyway, and
#: with one heap a chunk freed by the thread that consumed it is memory the producing thread
#: reuses for its next chunk, instead of each thread's heap growing and shrinking on its own.
ARENA_MAX = 1

_done = False


def keep_freed_memory() -> bool:
    """Tune glibc's allocator for a streaming process (once per process).

    Returns
    -------
    bool
        True if the settings are in force (glibc found and every ``mallopt`` call accepted).
    """
    global _done
    if _done:
        return True
    try:
        if not os.confstr("CS_GNU_LIBC_VERSION").startswith("glibc"):
            return False
        mallopt = ctypes.CDLL(None).mallopt  # the interpreter's own C library
    except (AttributeError, ValueError, OSError, TypeError):
        return False  # not glibc (or no confstr on this system)
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    ok = all(mallopt(param, value) == 1 for param, value in (
        (_M_MMAP_THRESHOLD, MMAP_THRESHOLD), (_M_TRIM_THRESHOLD, TRIM_THRESHOLD),
        (_M_TOP_PAD, TOP_PAD), (_M_ARENA_MAX, ARENA_MAX)))
    if not ok:
        log.debug("mallopt refused a setting; the allocator keeps its defaults")
    _done = ok
    return ok
