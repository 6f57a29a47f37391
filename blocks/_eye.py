"""Eye diagrams: traces of two symbol periods resampled on a fixed grid, its opening and Q.

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

from blocks._scratch import work_array
from blocks._timing import cubic_interpolate

__all__ = [
    "QUANTITIES",
    "eye_opening",
    "histogram_add",
    "q_factor",
    "trace_instants",
    "trace_quantity",
    "trace_starts",
]

#: Quantities an eye can show.
QUANTITIES = ("envelope", "frequency", "differential")


def trace_starts(theta: np.ndarray, first: int, window: int, samples_per_symbol: float,
                 most: int) -> tuple[np.ndarray, np.ndarray]:
    """Start instants of the traces of consecutive windows, each with its own timing phase.

    Parameters
    ----------
    theta : numpy.ndarray
        float64 timing phase (symbols) of each window: the strobes of window ``w`` are the
        instants ``(k + theta[w]) sps`` in absolute samples ``first + w W .. first + (w + 1) W
        - 1``.
    first : int
        Absolute index of the first window's first sample.
    window : int
        Window length ``W`` in samples.
    samples_per_symbol : float
        ``sps = fs / Rs``.
    most : int
        Traces kept per window, evenly spread over its even-numbered strobes (0: all).

    Returns
    -------
    starts : numpy.ndarray
        float64 start of each trace, half a symbol before an even-numbered strobe ``k``:
        ``(k + theta) sps - sps / 2``, window after window.
    windows : numpy.ndarray
        int64 index (0-based, in ``theta``) of the window each trace belongs to.

    Notes
    -----
    The symbols of a window are ``k = ceil(a / sps - theta) .. ceil(b / sps - theta) - 1``
    for its ends ``a, b`` (as ``blocks._timing.segment_strobes``), so consecutive windows
    share no strobe. Where a window has more even-numbered strobes ``n`` than ``most``, the
    ones kept are those at ``round(linspace(0, n - 1, most))``, computed here for all windows
    at once with ``numpy.linspace``'s arithmetic (``i (n - 1) / (most - 1)``, the last one
    exactly ``n - 1``).
    """
    theta = np.asarray(theta, dtype=np.float64)
    sps = float(samples_per_symbol)
    a = first + window * np.arange(theta.shape[0], dtype=np.int64)
    k0 = np.ceil(a / sps - theta).astype(np.int64)
    stop = np.ceil((a + window) / sps - theta).astype(np.int64)
    k0 += k0 % 2
    n = np.maximum(stop - k0 + 1, 0) // 2                # even strobes of each window
    keep = np.minimum(n, most) if most else n
    windows = np.repeat(np.arange(theta.shape[0]), keep)
    j = np.arange(windows.shape[0]) - np.repeat(np.cumsum(keep) - keep, keep)
    if most:
        total = n[windows]
        thin = total > most
        if most > 1:
            spread = j * ((total - 1) / (most - 1))
            spread[j == most - 1] = total[j == most - 1] - 1
            j = np.where(thin, np.rint(spread).astype(np.int64), j)
        else:
            j = np.where(thin, 0, j)
    k = (k0[windows] + 2 * j).astype(np.float64)
    return (k + theta[windows]) * sps - 0.5 * sps, windows


def trace_instants(starts: np.ndarray, samples_per_symbol: float, time_bins: int,
                   before: int = 0, out: np.ndarray | None = None) -> np.ndarray:
    """Sample instants of the grid columns of each trace.

    Parameters
    ----------
    starts : numpy.ndarray
        float64 start instant of each trace (absolute input-sample units).
    samples_per_symbol : float
        ``fs / Rs``.
    time_bins : int
        Columns over the two symbol periods.
    before : int
        Further columns on the same grid before the first one.
    out : numpy.ndarray, optional
        float64 array of the result's shape to write into.

    Returns
    -------
    numpy.ndarray
        float64 ``(traces, before + time_bins)``: ``start + (j + 1/2) * 2 T / time_bins``
        for ``j = -before .. time_bins - 1``.
    """
    step = 2.0 * samples_per_symbol / time_bins
    return np.add(starts[:, None], (np.arange(-before, time_bins) + 0.5)[None, :] * step,
                  out=out)


def trace_quantity(x: np.ndarray, starts: np.ndarray, samples_per_symbol: float,
                   time_bins: int, quantity: str, lag: float, sample_rate: float,
                   ) -> np.ndarray:
    """The eye's quantity of a sampled signal on the grid of each trace.

    Parameters
    ----------
    x : numpy.ndarray
        complex64 samples at positions ``0 .. len(x) - 1``.
    starts : numpy.ndarray
        float64 start of each trace, in positions of ``x``; its instants
        (:func:`trace_instants`) and those instants ``- lag`` must lie in ``1 .. len(x) - 3``.
    samples_per_symbol : float
        ``fs / Rs``.
    time_bins : int
        Columns over the two symbol periods.
    quantity : {"envelope", "frequency", "differential"}
        What to compute (module notes).
    lag : float
        Distance of the second instant ``t - lag``, in samples (> 0 except for ``envelope``,
        which ignores it); the frequency is the phase advance over it.
    sample_rate : float
        ``fs``, for the frequency in Hz.

    Returns
    -------
    numpy.ndarray
        ``(traces, time_bins)`` values: amplitude (input units), Hz, or power (input units
        squared), float32 (computed from the complex64 interpolated samples).

    Notes
    -----
    Where ``lag`` is a whole number ``E`` of grid columns (``differential``: one symbol,
    ``time_bins / 2`` columns; ``frequency``: half a symbol, ``time_bins / 4``), the second
    instants of a trace are its own columns ``E`` earlier, so the signal is interpolated
    once, on ``E + time_bins`` columns, and each product pairs column ``j`` with ``j - E``;
    otherwise the second instants are interpolated on their own.
    """
    if quantity not in QUANTITIES:
        raise ValueError(f"quantity must be one of {', '.join(QUANTITIES)} (got {quantity!r})")
    if quantity == "envelope":
        return np.abs(_grid_samples(x, starts, samples_per_symbol, time_bins, 0))
    shift = lag * time_bins / (2.0 * samples_per_symbol)
    extra = round(shift)
    if extra >= 1 and abs(shift - extra) <= 1e-9 * shift:
        y = _grid_samples(x, starts, samples_per_symbol, time_bins, extra)
        now, then = y[:, extra:], y[:, :time_bins]
    else:
        now = _grid_samples(x, starts, samples_per_symbol, time_bins, 0)
        then = _grid_samples(x, starts - lag, samples_per_symbol, time_bins, 0)
    prod = work_array("eye.products", now.shape, np.complex64)
    if quantity == "differential":
        # Re(a conj b) = a.re b.re + a.im b.im, on the samples as float pairs
        pairs = prod.view(np.float32)
        np.multiply(now.view(np.float32), then.view(np.float32), out=pairs)
        return pairs[:, 0::2] + pairs[:, 1::2]
    np.conjugate(then, out=prod)
    prod *= now
    v = np.arctan2(prod.imag, prod.real)
    v *= np.float32(sample_rate / (2.0 * math.pi * lag))
    return v


def _grid_samples(x: np.ndarray, starts: np.ndarray, samples_per_symbol: float,
                  time_bins: int, before: int) -> np.ndarray:
    """``x`` interpolated at ``trace_instants(starts, ..., before)``, from each trace's own span.

    The few samples under each trace are gathered first, side by side, so the interpolator
    (``blocks._timing.cubic_interpolate``) works on those alone rather than on all of ``x``
    between the first trace and the last.
    """
    step = 2.0 * samples_per_symbol / time_bins
    reach = (time_bins + before - 1) * step             # first instant to last
    origin = np.floor(starts + (0.5 - before) * step).astype(np.intp) - 1
    span = math.floor(reach) + 5                        # the stencils of all the instants
    traces = starts.shape[0]
    index = work_array("eye.index", (traces, span), np.intp)
    np.add(origin[:, None], np.arange(span), out=index)
    local = work_array("eye.local", traces * span, x.dtype)
    np.take(x, index.reshape(-1), out=local, mode="clip")
    at = starts - origin + span * np.arange(traces)
    instants = work_array("eye.instants", (traces, before + time_bins), np.float64)
    trace_instants(at, samples_per_symbol, time_bins, before, out=instants)
    return cubic_interpolate(local, instants)


def histogram_add(counts: np.ndarray, values: np.ndarray, low: float, high: float,
                  weights: np.ndarray | None = None) -> int:
    """Add traces to an eye histogram in place.

    Parameters
    ----------
    counts : numpy.ndarray
        float64 ``(level_bins, time_bins)`` histogram; row ``i`` holds levels
        ``low + i (high - low) / level_bins`` and up.
    values : numpy.ndarray
        ``(traces, time_bins)`` quantity values; column ``j`` goes to column ``j``.
    low, high : float
        Level range; values outside it (and NaN) are not counted.
    weights : numpy.ndarray, optional
        float64 weight of each trace (default 1 each).

    Returns
    -------
    int
        Number of values that fell outside the range.

    Notes
    -----
    Every value is given a row ``-1 .. level_bins`` (the two ends collecting what lies
    outside the range), so one ``numpy.bincount`` over (row, column) pairs fills the
    histogram without selecting the values inside first. Rows are found in float32, which
    places a value within float32 rounding of a row edge on either side of it.
    """
    rows, cols = counts.shape
    level = work_array("eye.level", values.shape, np.float32)
    np.subtract(values, np.float32(low), out=level)
    level *= np.float32(rows / (high - low))
    np.floor(level, out=level)
    np.fmax(level, np.float32(-1.0), out=level)         # fmax: NaN goes to row -1 as well
    np.fmin(level, np.float32(rows), out=level)
    outside = np.count_nonzero(level == -1.0) + np.count_nonzero(level == rows)
    level *= np.float32(cols)
    level += np.arange(cols, 2 * cols, dtype=np.float32)[None, :]   # (row + 1) cols + column
    flat = work_array("eye.flat", values.shape, np.intp)
    np.copyto(flat, level, casting="unsafe")           # whole numbers already
    w = None
    if weights is not None:
        w = work_array("eye.weights", values.shape, np.float64)
        np.copyto(w, np.asarray(weights, np.float64)[:, None])
        w = w.reshape(-1)
    full = np.bincount(flat.reshape(-1), weights=w, minlength=(rows + 2) * cols)
    counts += full.reshape(rows + 2, cols)[1:-1]
    return int(outside)


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


def q_factor(mu0: float, s0: float, mu1: float, s1: float) -> float:
    """Q factor of two decision levels: their distance over the sum of their spreads.

    Parameters
    ----------
    mu0, s0, mu1, s1 : float
        Mean and standard deviation of the lower and the upper level (as ``eye_opening``
        returns them).

    Returns
    -------
    float
        ``Q = (mu1 - mu0) / (s0 + s1)``; infinite for two spread-free distinct levels, NaN
        without data or with ``mu1 <= mu0``.

    Notes
    -----
    With Gaussian levels and the threshold ``(s1 mu0 + s0 mu1) / (s0 + s1)``, each level lies
    ``Q`` of its own deviations from the threshold, so the error rate is
    ``Q(Q) = erfc(Q / sqrt 2) / 2`` [1]_. Where the 3-sigma ``eye_opening`` is already shut
    (``Q < 3``) it still ranks eyes: ``Q = 3`` is about 1.3e-3 and ``Q = 2`` about 2.3e-2.
    The quantities of an eye here are not Gaussian at the instant (a Rician envelope, a
    product of two noisy samples), so ``Q`` is a figure of merit, not a BER estimate.

    References
    ----------
    .. [1] S. D. Personick, "Receiver design for digital fiber optic communication systems",
       Bell Syst. Tech. J. 52(6), 843-874, 1973 (the Q of a two-level receiver; from memory).
    """
    if not mu1 > mu0:
        return math.nan
    spread = s0 + s1
    return (mu1 - mu0) / spread if spread > 0 else math.inf
