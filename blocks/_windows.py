"""Sums over consecutive fixed-length windows of a stream, aligned to the absolute index.

Feedforward estimators (frequency, timing) reduce a per-sample quantity to one sum per window.
Window ``w`` holds the absolute samples ``w * W .. (w + 1) * W - 1``, so the sums, and hence the
estimates, do not depend on how the stream is cut into chunks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["WindowState", "window_sums"]


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


def window_sums(values: np.ndarray, window: int, state: WindowState | None = None,
                ) -> tuple[np.ndarray, WindowState]:
    """Sum a chunk of per-sample values window by window.

    Parameters
    ----------
    values : numpy.ndarray
        Per-sample values of this chunk (real or complex).
    window : int
        Window length ``W`` in samples (>= 1).
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
    Sums are accumulated in float64, one ``numpy.add.reduceat`` per chunk.
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 (got {window})")
    if state is None:
        state = WindowState()
    v = np.asarray(values).astype(np.complex128, copy=False)
    edges = np.arange(window - state.filled, v.shape[0] + 1, window)
    if not edges.shape[0]:
        return (np.zeros(0, dtype=np.complex128),
                WindowState(state.filled + v.shape[0], state.partial + complex(v.sum())))
    sums = np.add.reduceat(v[: edges[-1]], np.concatenate(([0], edges[:-1])))
    sums[0] += state.partial
    rest = v[edges[-1]:]
    return sums, WindowState(rest.shape[0], complex(rest.sum()))
