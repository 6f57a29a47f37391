"""Sums over consecutive fixed-length windows of a stream, aligned to the absolute index.

Feedforward estimators (frequency, timing) reduce a per-sample quantity to one sum per window.
Window ``w`` holds the absolute samples ``w * W .. (w + 1) * W - 1``, so the sums, and hence the
estimates, do not depend on how the stream is cut into chunks.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["WindowState", "sum_windows"]


@dataclass(frozen=True)
class WindowState:
    """The window being filled.

    Attributes
    ----------
    filled : int
        Samples of the current window summed so far (``0 .. W - 1``).
    partial : complex
        Their sum.
    """

    filled: int = 0
    partial: complex = 0j


def sum_windows(count: int, window: int, segment: Callable[[int, int], complex],
                whole: Callable[[int, int], np.ndarray], state: WindowState | None = None,
                ) -> tuple[np.ndarray, WindowState]:
    """Window by window sums of a chunk of per-sample values, each kernel summing its own way.

    Parameters
    ----------
    count : int
        Number of values in this chunk.
    window : int
        Window length ``W`` in samples (>= 1).
    segment : callable
        ``segment(a, b)``: the sum of the chunk's values ``a .. b - 1`` (``0 <= b - a <= W``).
    whole : callable
        ``whole(a, k)``: the sums of the ``k >= 1`` consecutive whole windows that start at
        chunk offset ``a``, as an array of ``k``.
    state : WindowState, optional
        State from the previous call; None at the start of a stream.

    Returns
    -------
    sums : numpy.ndarray
        complex128 sum of every window completed in this chunk, in order.
    state : WindowState
        The incomplete window.

    Notes
    -----
    The chunk's first values close the open window, whole windows follow, and the rest opens
    the next one; a kernel gives the sums of its per-sample quantity without forming it (a
    dot product, a matrix product of the windows as rows).
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 (got {window})")
    if state is None:
        state = WindowState()
    first = window - state.filled
    if count < first:
        partial = state.partial + (segment(0, count) if count else 0j)
        return np.zeros(0, dtype=np.complex128), WindowState(state.filled + count, partial)
    full = (count - first) // window
    done = first + full * window
    sums = np.empty(full + 1, dtype=np.complex128)
    sums[0] = state.partial + segment(0, first)
    if full:
        sums[1:] = whole(first, full)
    return sums, WindowState(count - done, segment(done, count) if count > done else 0j)
