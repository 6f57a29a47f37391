"""Work arrays kept per thread and reused from call to call.

A kernel that builds large temporaries on every chunk pays for fresh memory each time: the
allocator hands freed blocks back to the operating system, and the next chunk faults every
page in again (measured at about a microsecond per 4 KiB page on the project's 2-core test
machine, which made page faults the largest cost of some blocks inside a pipeline). Kernels
therefore take their temporaries from here. Each thread (every block runs in its own) has its
own arrays, one per name and dtype, grown on demand and never shrunk, up to :data:`KEEP_LIMIT`
bytes each.

The contents are undefined on every call, so results never depend on them; a kernel never
returns a view of a work array.
"""

from __future__ import annotations

import math
import threading
from typing import Any

import numpy as np

__all__ = ["KEEP_LIMIT", "HeldSamples", "work_array"]

#: Largest work array (bytes) that is kept for reuse; bigger requests get a fresh array.
KEEP_LIMIT = 1 << 23

_local = threading.local()


def work_array(name: str, shape: int | tuple[int, ...], dtype: np.dtype | type) -> np.ndarray:
    """A C-contiguous array of ``shape`` and ``dtype`` with undefined contents.

    Parameters
    ----------
    name : str
        The use, unique per kernel and temporary (``"fir.cols"``); arrays of different names
        never overlap, and the array of a name is overwritten by the next request for it in
        the same thread.
    shape : int or tuple of int
        Shape of the array.
    dtype : numpy.dtype or type
        Its dtype.

    Returns
    -------
    numpy.ndarray
        A view of the thread's array for ``name`` and ``dtype`` (a fresh array above
        :data:`KEEP_LIMIT`).
    """
    try:
        pool: dict[tuple[str, Any], np.ndarray] = _local.pool
    except AttributeError:
        pool = _local.pool = {}
    count = shape if isinstance(shape, int) else math.prod(shape)
    buf = pool.get((name, dtype))
    if buf is None or buf.shape[0] < count:
        if count * np.dtype(dtype).itemsize > KEEP_LIMIT:
            return np.empty(shape, dtype)
        grown = 2 * buf.shape[0] if buf is not None else 0
        limit = KEEP_LIMIT // np.dtype(dtype).itemsize
        buf = pool[(name, dtype)] = np.empty(min(max(count, grown), limit), dtype)
    out = buf[:count]
    return out if isinstance(shape, int) else out.reshape(shape)


class HeldSamples:
    """Samples a block holds across chunks, in one array reused from chunk to chunk.

    ``samples`` are the held samples (a view of the array), the first of them at absolute
    stream index ``start``. ``append`` adds a chunk after them, ``drop_before`` lets go of
    what is no longer needed; the array is compacted (and grown, doubling) only when a chunk
    does not fit after the held samples, so a stream does not fault fresh memory in per chunk.
    """

    def __init__(self, dtype: np.dtype | type = np.complex64) -> None:
        self._store = np.zeros(0, dtype)
        self._at = 0
        self.samples = self._store
        self.start = 0

    @property
    def end(self) -> int:
        """Absolute index one past the last held sample."""
        return self.start + self.samples.shape[0]

    def append(self, x: np.ndarray) -> None:
        """Hold ``x`` after the held samples."""
        held, n = self.samples.shape[0], x.shape[0]
        if self._at + held + n > self._store.shape[0]:
            store = self._store if held + n <= self._store.shape[0] \
                else np.empty(2 * (held + n), self._store.dtype)
            store[:held] = self.samples                 # numpy copies overlapping ranges safely
            self._store, self._at = store, 0
        self._store[self._at + held:self._at + held + n] = x
        self.samples = self._store[self._at:self._at + held + n]

    def restart(self, index: int) -> None:
        """Let go of every held sample; the next one appended is at absolute ``index``."""
        self._at += self.samples.shape[0]
        self.samples = self._store[self._at:self._at]
        self.start = int(index)

    def drop_before(self, index: int) -> None:
        """Let go of the held samples before absolute ``index``."""
        k = min(index - self.start, self.samples.shape[0])
        if k > 0:
            self.samples = self.samples[k:]
            self._at += k
            self.start += k
