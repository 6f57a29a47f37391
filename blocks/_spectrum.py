"""Averaged power spectral density (Welch) of a stream, segment by segment.

Segments of ``nfft`` samples start every ``hop`` samples from the start of the stream; each is
windowed, transformed and squared (a modified periodogram), and the periodograms are averaged,
either all of them with equal weight, which is Welch's method [1]_ and gives what
``scipy.signal.welch`` gives for the same segments, or with an exponential weight that forgets
old segments (a live display). The samples after the last whole segment are carried to the
next chunk, so any chunking gives the same segments.

References
----------
.. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra: a
   method based on time averaging over short, modified periodograms", IEEE Trans. Audio
   Electroacoustics 15(2), 70-73, 1967.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import as_strided
from scipy import fft
from scipy.signal import get_window

__all__ = ["SpectrumState", "design_window", "periodograms", "update_average"]


def design_window(nfft: int, sample_rate: float, name: str = "hann",
                  ) -> tuple[np.ndarray, float, float]:
    """Segment window and the density scale of its periodograms.

    Parameters
    ----------
    nfft : int
        Segment length (>= 2).
    sample_rate : float
        ``fs`` in Hz (> 0).
    name : str
        A window name ``scipy.signal.get_window`` knows (periodic form, as Welch's method
        uses).

    Returns
    -------
    window : numpy.ndarray
        float64 window, read-only.
    scale : float
        ``1 / (fs * sum(w^2))``: ``|FFT(w x)|^2 * scale`` is a density in power per Hz, whose
        integral over frequency is the mean power of ``x`` (the ``scaling="density"`` of
        ``scipy.signal.welch``).
    enbw_hz : float
        Equivalent noise bandwidth of one bin, ``fs sum(w^2) / sum(w)^2``.
    """
    if nfft < 2:
        raise ValueError(f"nfft must be >= 2 (got {nfft})")
    if not sample_rate > 0:
        raise ValueError(f"sample_rate must be > 0 (got {sample_rate!r})")
    w = np.asarray(get_window(name, nfft), dtype=np.float64)
    w.setflags(write=False)
    power = float(np.sum(w * w))
    return w, 1.0 / (sample_rate * power), sample_rate * power / float(np.sum(w)) ** 2


@dataclass(frozen=True)
class SpectrumState:
    """State of :func:`periodograms`: samples not yet used by a whole segment."""

    rest: np.ndarray


def periodograms(x: np.ndarray, window: np.ndarray, hop: int,
                 state: SpectrumState | None = None) -> tuple[np.ndarray, SpectrumState]:
    """Unscaled modified periodograms ``|FFT(w x_k)|^2`` of every segment completed.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 or float32 chunk.
    window : numpy.ndarray
        Segment window from :func:`design_window` (its length is ``nfft``).
    hop : int
        Samples between segment starts, ``1 .. nfft``.
    state : SpectrumState or None
        State from the previous call; None at the start of the stream.

    Returns
    -------
    numpy.ndarray
        float64 ``(segments, nfft)``, FFT order (frequency 0 first).
    SpectrumState
        State for the next call.

    Notes
    -----
    All the segments of a call go through one FFT call in the precision of the samples
    (``scipy.fft`` transforms complex64 and float32 as such; the relative error of an FFT
    grows as ``eps log2(nfft)``, common practice); a real stream uses the real FFT and the
    two-sided periodogram is its mirror image (Hermitian symmetry of the transform of a real
    signal).
    """
    nfft = window.shape[0]
    if not 1 <= hop <= nfft:
        raise ValueError(f"hop must be in 1 .. {nfft} (got {hop})")
    rest = state.rest if state is not None else np.zeros(0, x.dtype)
    buf = np.concatenate((rest, x)) if rest.shape[0] else np.asarray(x)
    if buf.shape[0] < nfft:
        return np.zeros((0, nfft)), SpectrumState(buf.copy())
    step = buf.strides[0]
    segs = as_strided(buf, ((buf.shape[0] - nfft) // hop + 1, nfft), (hop * step, step),
                      writeable=False)
    real = not np.iscomplexobj(buf)
    tapered = segs * window.astype(buf.real.dtype)
    spec = (fft.rfft if real else fft.fft)(tapered, axis=1, overwrite_x=True)
    parts = np.square(spec.view(spec.real.dtype))          # re^2, im^2 interleaved
    power = (parts[:, 0::2] + parts[:, 1::2]).astype(np.float64)
    if real:
        power = np.concatenate((power, power[:, (nfft - 1) // 2:0:-1]), axis=1)
    return power, SpectrumState(buf[segs.shape[0] * hop:].copy())


def update_average(average: np.ndarray | None, count: int, power: np.ndarray,
                   memory: int) -> tuple[np.ndarray | None, int]:
    """Fold new periodograms into the running average.

    Parameters
    ----------
    average : numpy.ndarray or None
        Current average (None before the first segment).
    count : int
        Segments averaged so far.
    power : numpy.ndarray
        ``(segments, nfft)`` new periodograms, in order.
    memory : int
        0: equal weight for every segment (Welch); ``k >= 1``: equal weight until ``k``
        segments have been seen, then exponential forgetting with weight ``1/k`` per new
        segment (time constant ``k`` segments).

    Returns
    -------
    average : numpy.ndarray or None
    count : int
    """
    new = power.shape[0]
    if new == 0:
        return average, count
    ramp = new if memory == 0 else min(new, max(0, memory - count))
    if ramp:
        total = power[:ramp].sum(axis=0) + (average * count if average is not None else 0.0)
        count += ramp
        average = total / count
    tail = power[ramp:]
    if tail.shape[0]:
        a = 1.0 / memory
        weights = a * (1.0 - a) ** np.arange(tail.shape[0] - 1, -1, -1)
        average = (1.0 - a) ** tail.shape[0] * average + weights @ tail
        count += tail.shape[0]
    return average, count
