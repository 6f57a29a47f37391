"""Feedforward gain control: normalise a stream by its RMS over a causal sliding window."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["PowerWindowState", "rms_normalise"]


@dataclass(frozen=True)
class PowerWindowState:
    """Sliding-window state of :func:`rms_normalise`.

    Attributes
    ----------
    powers : numpy.ndarray
        float64 ``|x|**2`` of the last ``min(window - 1, seen)`` input samples.
    seen : int
        Samples consumed since the start of the stream.
    """

    powers: np.ndarray
    seen: int


def rms_normalise(x: np.ndarray, window: int, level: float = 1.0,
                  state: PowerWindowState | None = None,
                  ) -> tuple[np.ndarray, np.ndarray, PowerWindowState]:
    """Scale each sample by ``level`` over the RMS of the window that ends on it.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 or float32 input chunk.
    window : int
        Window length ``W`` in samples (>= 1).
    level : float
        Output RMS for a stationary input (> 0).
    state : PowerWindowState, optional
        State from the previous call; None at the start of a stream.

    Returns
    -------
    y : numpy.ndarray
        ``level * x[n] / sqrt(P[n])`` in the dtype of ``x``, where ``P[n]`` is the mean of
        ``|x[m]|**2`` over ``m = n - W + 1 .. n`` (over ``0 .. n`` while fewer than ``W``
        samples have been seen). A window of all zeros gives zeros.
    gain : numpy.ndarray
        float64 ``level / sqrt(P[n])`` per sample (0 where ``P[n] = 0``).
    state : PowerWindowState
        State for the next call.

    Notes
    -----
    A feedforward (open-loop) automatic gain control: the gain depends only on past and
    present input, so there is no loop to settle or to oscillate (common practice). The
    window sums are differences of a float64 running sum restarted every chunk, so their
    rounding does not accumulate over a long stream.
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 (got {window})")
    if not level > 0:
        raise ValueError(f"level must be > 0 (got {level})")
    if state is None:
        state = PowerWindowState(np.zeros(0), 0)
    p = np.abs(x).astype(np.float64) ** 2
    q = np.concatenate((state.powers, p))
    sums = np.concatenate(([0.0], np.cumsum(q)))
    held = state.powers.shape[0]
    ends = np.arange(held + 1, q.shape[0] + 1)
    sums = sums[ends] - sums[np.maximum(ends - window, 0)]
    counts = np.minimum(window, state.seen + np.arange(1, x.shape[0] + 1))
    mean = np.maximum(sums, 0.0) / counts
    gain = np.zeros(x.shape[0])
    np.divide(level, np.sqrt(mean), out=gain, where=mean > 0)
    y = (x * gain.astype(np.float32)).astype(x.dtype, copy=False)
    keep = min(window - 1, q.shape[0])
    powers = q[q.shape[0] - keep:].copy() if keep else np.zeros(0)
    return y, gain, PowerWindowState(powers, state.seen + x.shape[0])
