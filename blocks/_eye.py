"""Eye diagrams: traces of two symbol periods resampled on a fixed grid, and the eye opening.

The observed stream (the matched-filter output, or the frequency-corrected stream of 2-FSK)
has any number of samples per symbol. Each trace starts half a symbol before the optimum
instant of an even-numbered symbol and spans two symbol periods; the signal is interpolated at
the centres of the ``time_bins`` columns of the grid (cubic Lagrange, ``blocks._timing``), so
every trace puts exactly one value in every column whatever the sample rate, and the optimum
instants fall on the columns at 1/2 and 3/2 symbol. The value plotted is a real quantity that
does not depend on the carrier phase:

- ``envelope`` ``|y(t)|`` (OOK);
- ``frequency`` the frequency ``angle(y(t + T/4) conj y(t - T/4)) / (2 pi T/2)``, the phase
  advance over half a symbol centred on ``t`` (2-FSK): a discriminator followed by a
  half-symbol moving average, which keeps the full-band noise of a one-sample discriminator
  from closing the eye (common practice to smooth a discriminator after detection);
- ``differential`` ``Re(y(t) conj y(t - T))``, the differential detector's statistic
  (DBPSK, pi/4-DQPSK).
"""

from __future__ import annotations

import math

import numpy as np

from blocks._timing import cubic_interpolate

__all__ = [
    "QUANTITIES",
    "eye_opening",
    "histogram_add",
    "trace_instants",
    "trace_quantity",
]

#: Quantities an eye can show.
QUANTITIES = ("envelope", "frequency", "differential")


def trace_instants(starts: np.ndarray, samples_per_symbol: float, time_bins: int) -> np.ndarray:
    """Sample instants of the grid columns of each trace.

    Parameters
    ----------
    starts : numpy.ndarray
        float64 start instant of each trace (absolute input-sample units).
    samples_per_symbol : float
        ``fs / Rs``.
    time_bins : int
        Columns over the two symbol periods.

    Returns
    -------
    numpy.ndarray
        float64 ``(traces, time_bins)``: ``start + (j + 1/2) * 2 T / time_bins``.
    """
    step = 2.0 * samples_per_symbol / time_bins
    return starts[:, None] + (np.arange(time_bins) + 0.5)[None, :] * step


def trace_quantity(x: np.ndarray, positions: np.ndarray, quantity: str, lag: float,
                   sample_rate: float) -> np.ndarray:
    """The eye's quantity of a sampled signal at fractional positions.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 samples at positions ``0 .. len(x) - 1``.
    positions : numpy.ndarray
        float64 positions (any shape); ``positions - lag`` must lie in ``1 .. len(x) - 3``
        as well as ``positions``.
    quantity : {"envelope", "frequency", "differential"}
        What to compute (module notes).
    lag : float
        Distance of the second instant ``positions - lag``, in samples (> 0 except for
        ``envelope``, which ignores it); the frequency is the phase advance over it.
    sample_rate : float
        ``fs``, for the frequency in Hz.

    Returns
    -------
    numpy.ndarray
        float64 values, the shape of ``positions``: amplitude (input units), Hz, or power
        (input units squared).
    """
    flat = positions.reshape(-1)
    y = cubic_interpolate(x, flat).astype(np.complex128)
    if quantity == "envelope":
        v = np.abs(y)
    else:
        prod = y * np.conj(cubic_interpolate(x, flat - lag).astype(np.complex128))
        if quantity == "frequency":
            v = np.angle(prod) * sample_rate / (2.0 * math.pi * lag)
        elif quantity == "differential":
            v = prod.real
        else:
            raise ValueError(f"quantity must be one of {', '.join(QUANTITIES)} "
                             f"(got {quantity!r})")
    return v.reshape(positions.shape)


def histogram_add(counts: np.ndarray, values: np.ndarray, low: float, high: float) -> int:
    """Add traces to an eye histogram in place.

    Parameters
    ----------
    counts : numpy.ndarray
        float64 ``(level_bins, time_bins)`` histogram; row ``i`` holds levels
        ``low + i (high - low) / level_bins`` and up.
    values : numpy.ndarray
        ``(traces, time_bins)`` quantity values; column ``j`` goes to column ``j``.
    low, high : float
        Level range; values outside it are not counted.

    Returns
    -------
    int
        Number of values that fell outside the range.
    """
    rows, cols = counts.shape
    level = np.floor((values - low) * (rows / (high - low)))
    inside = (level >= 0) & (level < rows)
    col = np.broadcast_to(np.arange(cols), values.shape)
    flat = level[inside].astype(np.int64) * cols + col[inside]
    counts += np.bincount(flat, minlength=rows * cols).reshape(rows, cols)
    return int(values.size - np.count_nonzero(inside))


def _weighted_split(levels: np.ndarray, weights: np.ndarray) -> int:
    """Cut index of the weighted two-means split of a 1-D histogram (Otsu's criterion)."""
    w = np.cumsum(weights)[:-1]
    m = np.cumsum(weights * levels)[:-1]
    total, total_m = float(weights.sum()), float(np.dot(weights, levels))
    rest = total - w
    with np.errstate(divide="ignore", invalid="ignore"):
        between = np.where((w > 0) & (rest > 0),
                           w * rest * (m / w - (total_m - m) / rest) ** 2, -1.0)
    return int(np.argmax(between)) + 1


def eye_opening(counts: np.ndarray, levels: np.ndarray, columns: np.ndarray,
                ) -> tuple[float, float, float, float, float]:
    """Eye opening at the optimum instants, from the histogram columns there.

    Parameters
    ----------
    counts : numpy.ndarray
        ``(level_bins, time_bins)`` histogram.
    levels : numpy.ndarray
        Level of each row (bin centres).
    columns : numpy.ndarray
        Indices of the columns at (and next to) the optimum instants.

    Returns
    -------
    opening : float
        ``((mu1 - 3 s1) - (mu0 + 3 s0)) / (mu1 - mu0)`` clipped to ``0 .. 1`` (0: closed; NaN
        without data), where ``mu0 < mu1`` and ``s0, s1`` are the means and standard
        deviations of the lower and upper cluster of the values in ``columns``.
    mu0, s0, mu1, s1 : float
        The cluster statistics (NaN without data).

    Notes
    -----
    The clusters are the two-means split of the level profile (Otsu's criterion: N. Otsu,
    IEEE Trans. Systems, Man, and Cybernetics 9(1), 1979). Measuring the opening as the gap
    between the inner 3-sigma edges of the two levels over their distance is common practice
    for eye diagrams (the "eye opening factor"; from memory). With two symbol levels
    (OOK on/off, 2-FSK tones, the sign of the DBPSK and pi/4-DQPSK differential product) the
    split finds them; a Gaussian-looking spread of 1/6 of the level distance closes the eye.
    """
    profile = counts[:, columns].sum(axis=1)
    nan = (math.nan,) * 5
    if np.count_nonzero(profile) < 2:
        return nan
    cut = _weighted_split(levels, profile)

    def stats(lv: np.ndarray, w: np.ndarray) -> tuple[float, float]:
        mean = float(np.dot(w, lv) / w.sum())
        return mean, math.sqrt(max(float(np.dot(w, (lv - mean) ** 2) / w.sum()), 0.0))

    (mu0, s0), (mu1, s1) = stats(levels[:cut], profile[:cut]), stats(levels[cut:], profile[cut:])
    if not mu1 > mu0:
        return nan
    opening = ((mu1 - 3.0 * s1) - (mu0 + 3.0 * s0)) / (mu1 - mu0)
    return min(max(opening, 0.0), 1.0), mu0, s0, mu1, s1
