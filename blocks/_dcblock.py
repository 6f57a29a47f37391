"""DC removal: a first-order high-pass IIR with its state carried between chunks."""

from __future__ import annotations

import numpy as np
from scipy import signal

__all__ = ["dc_block", "dc_block_design"]


def dc_block_design(corner_hz: float, sample_rate: float) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients of the first-order DC-removal (high-pass) filter.

    Parameters
    ----------
    corner_hz : float
        -3 dB corner frequency, ``0 < corner_hz < sample_rate / 2``.
    sample_rate : float
        Sample rate in Hz.

    Returns
    -------
    b, a : numpy.ndarray
        float64 numerator and denominator of
        ``H(z) = g (1 - z**-1) / (1 - p z**-1)``, ``p = (1 - K) / (1 + K)``, ``g = (1 + p) / 2``,
        ``K = tan(pi corner_hz / sample_rate)``.

    Notes
    -----
    The first-order Butterworth high-pass by the bilinear transform with frequency
    pre-warping [1]_ (chapter 7, the bilinear transformation; from memory), obtained from
    ``scipy.signal.butter(1, corner_hz, "highpass", fs=sample_rate)`` [2]_: a zero at DC,
    unit gain at half the sample rate and exactly -3 dB at ``corner_hz``.

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing, 3rd ed.,
       Pearson, 2010.
    .. [2] SciPy reference guide, ``scipy.signal.butter``.
    """
    if not 0.0 < corner_hz < sample_rate / 2.0:
        raise ValueError(f"corner_hz must be > 0 and below half the sample rate "
                         f"{sample_rate / 2:g} Hz (got {corner_hz!r})")
    b, a = signal.butter(1, corner_hz, btype="highpass", fs=sample_rate)
    return np.asarray(b, dtype=np.float64), np.asarray(a, dtype=np.float64)


def dc_block(x: np.ndarray, b: np.ndarray, a: np.ndarray,
             state: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """Remove the DC component of a stream, one chunk at a time.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 or float32 input chunk.
    b, a : numpy.ndarray
        Coefficients from :func:`dc_block_design`.
    state : numpy.ndarray, optional
        Filter state (``zf``) returned by the previous call. None at the start of a stream:
        the filter then starts in the steady state of a constant input equal to ``x[0]``, so a
        DC offset present from the first sample leaves no start-up transient.

    Returns
    -------
    y : numpy.ndarray
        Filtered chunk, the dtype of ``x``.
    state : numpy.ndarray or None
        State for the next call (None while nothing has been seen).

    Notes
    -----
    ``scipy.signal.lfilter`` with ``zi`` carried ([1]_). The recursion runs in float64 (or
    complex128): with the pole close to 1, float32 rounding would be amplified by
    ``1 / (1 - p)``. The steady-state start uses ``scipy.signal.lfilter_zi``.

    References
    ----------
    .. [1] SciPy reference guide, ``scipy.signal.lfilter`` and ``scipy.signal.lfilter_zi``.
    """
    if x.shape[0] == 0:
        return x.copy(), state
    wide = np.complex128 if np.iscomplexobj(x) else np.float64
    if state is None:
        state = signal.lfilter_zi(b, a).astype(wide) * x[0]
    y, zf = signal.lfilter(b, a, x.astype(wide), zi=state)
    return y.astype(x.dtype), zf
