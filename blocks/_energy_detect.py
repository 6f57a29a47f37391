"""Energy (square-law) detection of on-off keying with feedforward threshold adaptation.

The detector sees one complex sample per symbol, taken at the matched filter's optimum instant,
forms the energy ``z = |y|^2`` and compares it with a threshold estimated over consecutive
windows of ``window`` symbols counted from the start of the stream (so the decisions do not
depend on how the stream is cut into chunks).

Signal model (common practice): an "off" symbol is complex Gaussian noise of power
``sigma^2 = E|n|^2``, so ``z`` is exponential with mean ``sigma^2`` (Rayleigh envelope); an
"on" symbol is ``A e^{j theta} + n``, so ``z`` follows the Rice law (noncentral chi-square
with two degrees of freedom) with mean ``A^2 + sigma^2``, whatever ``theta`` is.

Per window:

1. An exact two-cluster split of the energies (1-D two-means, the criterion of Otsu [3]_)
   gives first off and on levels, refined by splitting again at the minimum-error threshold
   (see ``_refine``).
2. If the on/off level ratio reaches ``min_contrast`` and each cluster has at least
   ``MIN_CLUSTER`` members, the window carries a signal: the noise floor is the off level,
   ``A^2`` is on minus off, and the threshold is the exact minimum-error point of the
   Rayleigh/Rice pair (equal priors), where the log-likelihood ratio is zero [1]_.
3. Otherwise, if an earlier window carried a signal and this window's mean energy is above
   that window's threshold, the window is taken as a run of "on" symbols and decided with the
   held levels.
4. Otherwise the window is noise only: the threshold is ``alpha * mean(z)`` with ``alpha``
   set for the false-alarm target (cell-averaging CFAR [2]_, see ``cfar_factor``).

References
----------
.. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
   sec. 2.3 (Rayleigh and Rice distributions) and sec. 4.5 (noncoherent detection).
.. [2] M. A. Richards, Fundamentals of Radar Signal Processing, McGraw-Hill, 2005,
   ch. 7 (threshold detection, cell-averaging CFAR: ``Pfa = (1 + alpha/N)^-N``).
.. [3] N. Otsu, "A threshold selection method from gray-level histograms", IEEE Trans.
   Systems, Man, and Cybernetics 9(1), 1979.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import overload

import numpy as np
from scipy.special import i0e, i1e

from blocks._bessel import log_i0

__all__ = [
    "MIN_CLUSTER",
    "REFINE_STEPS",
    "RICE_STEPS",
    "EnergyState",
    "OokLevels",
    "WindowLevels",
    "cfar_factor",
    "energy_detect",
    "estimate_levels",
    "ook_llr",
    "rice_threshold",
    "two_level_split",
]

#: Fewest symbols each cluster must hold for a window to count as carrying a signal.
MIN_CLUSTER = 3
#: Lowest noise floor relative to the on level (60 dB below): keeps a noiseless window finite.
_FLOOR = 1e-6
#: Re-estimation passes after the two-cluster split (see ``_refine``).
REFINE_STEPS = 3
#: Newton steps of ``rice_threshold``: from its start they reach double precision for every
#: ``A^2 / sigma^2`` from 1e-3 to 1e12 (below, the rounding noise of ``log I0(x) ~ x^2 / 4``).
RICE_STEPS = 3


@dataclass(frozen=True)
class OokLevels:
    """Levels estimated over one window and the statistics of its decisions.

    Attributes
    ----------
    noise_floor : float
        Estimated noise power ``sigma^2`` (input power units).
    on_level : float
        Estimated mean energy of "on" symbols ``A^2 + sigma^2``; NaN in a noise-only window.
    threshold : float
        Decision threshold on ``|y|^2``.
    signal : bool
        Whether the levels come from a signal (steps 2 and 3 of the module notes).
    ones, zeros : int
        Number of symbols decided 1 and 0 in the window.
    ones_mean, ones_var, zeros_mean, zeros_var : float
        Mean and variance of ``|y|^2`` over the symbols decided 1 and 0 (NaN when none).
    """

    noise_floor: float
    on_level: float
    threshold: float
    signal: bool
    ones: int = 0
    zeros: int = 0
    ones_mean: float = math.nan
    ones_var: float = math.nan
    zeros_mean: float = math.nan
    zeros_var: float = math.nan


#: Number of ``OokLevels`` fields, the rows of ``WindowLevels.columns``.
_COLUMNS = len(OokLevels.__dataclass_fields__)
_SIGNAL_ROW = list(OokLevels.__dataclass_fields__).index("signal")


class WindowLevels(Sequence[OokLevels]):
    """The ``OokLevels`` of consecutive windows, held as one array per field.

    A chunk decides many windows at once; the records are made only for the windows looked
    at (usually the last).

    Parameters
    ----------
    columns : numpy.ndarray
        ``(10, windows)`` float64, one row per ``OokLevels`` field in declaration order
        (``signal`` 1.0 or 0.0).
    """

    def __init__(self, columns: np.ndarray) -> None:
        self.columns = columns

    def __len__(self) -> int:
        return self.columns.shape[1]

    @overload
    def __getitem__(self, i: int) -> OokLevels: ...
    @overload
    def __getitem__(self, i: slice) -> WindowLevels: ...

    def __getitem__(self, i: int | slice) -> OokLevels | WindowLevels:
        if isinstance(i, slice):
            return WindowLevels(self.columns[:, i])
        noise, on, threshold, signal, ones, zeros, m1, v1, m0, v0 = self.columns[:, i].tolist()
        return OokLevels(noise, on, threshold, bool(signal), int(ones), int(zeros), m1, v1, m0,
                         v0)

    def __iter__(self) -> Iterator[OokLevels]:
        return (self[i] for i in range(len(self)))

    def last_signal(self) -> OokLevels | None:
        """The last window whose levels come from a signal, or None."""
        found = np.flatnonzero(self.columns[_SIGNAL_ROW])
        return self[int(found[-1])] if found.size else None

    @staticmethod
    def join(parts: Sequence[WindowLevels]) -> WindowLevels:
        """The windows of ``parts``, in order."""
        return WindowLevels(np.concatenate([p.columns for p in parts], axis=1) if parts
                            else np.zeros((_COLUMNS, 0)))


@dataclass(frozen=True)
class EnergyState:
    """What ``energy_detect`` carries from one call to the next.

    Attributes
    ----------
    pending : numpy.ndarray
        Energies (float64) of symbols not yet decided (fewer than one window).
    last_window : numpy.ndarray
        Energies of the last full window (used to estimate levels for the final part window).
    held : OokLevels or None
        Levels of the most recent window that carried a signal.
    """

    pending: np.ndarray = field(default_factory=lambda: np.zeros(0))
    last_window: np.ndarray = field(default_factory=lambda: np.zeros(0))
    held: OokLevels | None = None


def two_level_split(z: np.ndarray) -> tuple[float, float, int]:
    """Split values into a low and a high cluster minimising the within-cluster sum of squares.

    Parameters
    ----------
    z : numpy.ndarray
        At least two real values.

    Returns
    -------
    low_mean, high_mean : float
        Means of the two clusters.
    low_count : int
        Number of values in the low cluster (1 .. len(z) - 1).

    Notes
    -----
    For one dimension the optimal two-means split is a cut of the sorted values; maximising the
    between-class term ``k (n - k) (m1 - m0)^2`` over every cut ``k`` is exact (Otsu's
    criterion [1]_), computed here with cumulative sums in O(n log n).

    References
    ----------
    .. [1] N. Otsu, IEEE Trans. Systems, Man, and Cybernetics 9(1), 1979.
    """
    s = np.sort(np.asarray(z, dtype=np.float64))
    n = s.shape[0]
    if n < 2:
        raise ValueError(f"z must hold at least 2 values (got {n})")
    low, high, k, _ = _split_sorted_rows(s[None, :])
    return float(low[0]), float(high[0]), int(k[0])


def _split_sorted_rows(s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``two_level_split`` of every row of ``s`` (rows sorted ascending), and their cumsums.

    With ``C_k`` the sum of the ``k`` lowest values, ``k (n - k) (m1 - m0)^2`` equals
    ``(k C_n - n C_k)^2 / (k (n - k))``, which needs no per-cut means.
    """
    n = s.shape[1]
    csum = np.cumsum(s, axis=1)
    k = np.arange(1, n)
    gap = csum[:, :-1] * float(n)
    gap -= csum[:, -1:] * k
    gap *= gap
    gap /= k * (n - k)
    best = np.argmax(gap, axis=1)
    rows = np.arange(s.shape[0])
    below = csum[rows, best]
    return below / (best + 1), (csum[:, -1] - below) / (n - 1 - best), best + 1, csum


def rice_threshold(signal_power: float, noise_floor: float) -> float:
    """Minimum-error threshold on ``|y|^2`` between exponential noise and a Rice-law signal.

    Parameters
    ----------
    signal_power : float
        ``A^2``, the power of the noiseless "on" sample (> 0).
    noise_floor : float
        ``sigma^2``, the complex noise power (> 0).

    Returns
    -------
    float
        The threshold ``T`` where the two densities are equal (equal priors).

    Notes
    -----
    With ``p0(z) = exp(-z/s)/s`` and ``p1(z) = exp(-(z + A^2)/s) I0(2 A sqrt(z)/s)/s``
    (``s = sigma^2``, [1]_), ``p1 = p0`` gives ``log I0(x) = A^2/s`` with ``x = 2A sqrt(T)/s``.
    The equation is solved for ``x`` by Newton's method, started from the root of the small-
    or the large-argument form ``log I0(x) ~ x^2/4 - x^4/64`` or ``~ x - log(2 pi x)/2`` [2]_,
    ``2 sqrt(g) (1 + g/8)`` below ``g = A^2/s = 4`` and about ``g + log(2 pi g)/2`` above;
    ``log I0`` is convex and increasing, so from any start the iteration converges
    monotonically after the first step; ``RICE_STEPS`` steps, the same for every window, reach
    full precision. Then
    ``T = (x s)^2 / (4 A^2)``. The windows of ``energy_detect`` are solved together, one array
    per Newton step.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 2.3.
    .. [2] M. Abramowitz and I. A. Stegun, Handbook of Mathematical Functions, Dover, 1965,
       9.6.12 (series) and 9.7.1 (asymptotic expansion).
    """
    if not signal_power > 0 or not noise_floor > 0:
        raise ValueError(f"signal_power and noise_floor must be > 0 "
                         f"(got {signal_power!r}, {noise_floor!r})")
    return float(_rice_threshold_rows(np.array([signal_power], dtype=np.float64),
                                      np.array([noise_floor], dtype=np.float64))[0])


def _rice_threshold_rows(signal_power: np.ndarray, noise_floor: np.ndarray) -> np.ndarray:
    """``rice_threshold`` of every element (arrays of valid, positive values)."""
    gamma = signal_power / noise_floor
    x = np.where(gamma < 4.0, 2.0 * np.sqrt(gamma) * (1.0 + gamma / 8.0),
                 gamma + 0.5 * np.log(2.0 * np.pi * np.maximum(gamma, 4.0)))
    for _ in range(RICE_STEPS):
        scaled = i0e(x)
        x -= (np.log(scaled) + x - gamma) * scaled / i1e(x)
    return (x * noise_floor) ** 2 / (4.0 * signal_power)


def ook_llr(z: np.ndarray, signal_power: float | np.ndarray,
            noise_floor: float | np.ndarray) -> np.ndarray:
    """Log-likelihood ratio ``log p1(z)/p0(z)`` of "on" against "off" for energies ``z``.

    Parameters
    ----------
    z : numpy.ndarray
        Symbol energies ``|y|^2``.
    signal_power, noise_floor : float or numpy.ndarray
        ``A^2`` and ``sigma^2`` as in ``rice_threshold`` (arrays broadcast against ``z``).

    Returns
    -------
    numpy.ndarray
        ``log I0(2 A sqrt(z) / sigma^2) - A^2 / sigma^2`` (float64); positive means "on".

    Notes
    -----
    ``log I0`` comes from the interpolation table of ``blocks._bessel`` (within ``1e-12`` of
    ``scipy.special.i0e``).
    """
    x = np.sqrt(np.asarray(z, dtype=np.float64))
    x *= 2.0 * np.sqrt(signal_power) / noise_floor
    out = log_i0(x)
    out -= signal_power / noise_floor
    return out


def cfar_factor(false_alarm: float, n: int) -> float:
    """Threshold multiplier of the window mean for a false-alarm probability on noise alone.

    Parameters
    ----------
    false_alarm : float
        Target probability that a noise-only symbol is decided 1 (0 < false_alarm < 1).
    n : int
        Number of symbols averaged, the tested symbol included.

    Returns
    -------
    float
        ``alpha`` such that ``P(z > alpha * mean(z)) = false_alarm`` for i.i.d. exponential
        ``z``: ``alpha = n (1 - false_alarm^(1/(n - 1)))``; 1.0 for ``n = 1``.

    Notes
    -----
    For a known noise power the threshold is ``T = -sigma^2 ln(Pfa)`` (the exponential tail of
    ``|y|^2``, [1]_). With the power estimated by the mean of ``n`` values, cell-averaging CFAR
    without the tested cell gives ``Pfa = (1 + alpha/N)^-N`` [2]_. Here the tested symbol is
    part of its own window; following the same steps, ``z > alpha (z + S)/n`` with ``S`` the
    Erlang sum of the other ``n - 1`` values gives ``Pfa = (n / (n - alpha))^-(n - 1)``, which
    is inverted above. Both tend to ``-ln(Pfa)`` as ``n`` grows.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 2.3.
    .. [2] M. A. Richards, Fundamentals of Radar Signal Processing, 2005, ch. 7.
    """
    if not 0.0 < false_alarm < 1.0:
        raise ValueError(f"false_alarm must be in (0, 1) (got {false_alarm!r})")
    if n < 1:
        raise ValueError(f"n must be >= 1 (got {n})")
    if n == 1:
        return 1.0
    return n * -math.expm1(math.log(false_alarm) / (n - 1))


def estimate_levels(z: np.ndarray, false_alarm: float, min_contrast: float,
                    held: OokLevels | None = None) -> OokLevels:
    """Estimate the decision levels of one window of energies (steps 1-4 of the module notes).

    Parameters
    ----------
    z : numpy.ndarray
        Energies ``|y|^2`` of the window (at least one).
    false_alarm : float
        False-alarm target for noise-only windows.
    min_contrast : float
        Least on/off level ratio (linear) for a window to count as carrying a signal.
    held : OokLevels or None
        Levels of the most recent window that carried a signal.

    Returns
    -------
    OokLevels
        Levels and threshold; the decision statistics fields are left at their defaults.
    """
    z = np.asarray(z, dtype=np.float64)
    noise, on, threshold, signal = _estimate_rows(z[None, :], false_alarm, min_contrast, held)
    return OokLevels(float(noise[0]), float(on[0]), float(threshold[0]), bool(signal[0]))


def _estimate_rows(z: np.ndarray, false_alarm: float, min_contrast: float,
                   held: OokLevels | None,
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``estimate_levels`` of consecutive windows, the rows of ``z``, each holding for the next.

    Steps 1-2 of the module notes do not depend on earlier windows and run on all rows at once.
    Holding (step 3) copies the levels of the last row before that found a signal of its own
    (or ``held``), so it is a running maximum of row indices. Returns the noise floor, on
    level, threshold and signal flag of every row.
    """
    rows, n = z.shape
    signal = np.zeros(rows, dtype=bool)
    noise = np.zeros(rows)
    on = np.full(rows, math.nan)
    threshold = np.zeros(rows)
    if n >= 2 * MIN_CLUSTER:
        s = np.sort(z, axis=1)
        low, high, k, csum = _split_sorted_rows(s)
        low = np.maximum(low, _FLOOR * high)
        cand = np.flatnonzero((np.minimum(k, n - k) >= MIN_CLUSTER) & (high > low))
        if cand.size:
            floor, level, thr = _refine_rows(s[cand], csum[cand], low[cand], high[cand])
            good = level >= min_contrast * floor
            chosen = cand[good]
            signal[chosen] = True
            noise[chosen], on[chosen], threshold[chosen] = floor[good], level[good], thr[good]
    if signal.all():
        return noise, on, threshold, signal
    means = z.mean(axis=1)
    # the last row before each row with a signal of its own; -1: none, the held levels
    own = np.maximum.accumulate(np.where(signal, np.arange(rows), -1))
    source = np.concatenate(([-1], own[:-1]))
    last = held if held is not None else OokLevels(math.nan, math.nan, math.nan, False)
    pool = [np.append(v, extra) for v, extra in
            ((noise, last.noise_floor), (on, last.on_level), (threshold, last.threshold))]
    holds = ~signal & (means >= pool[2][source])
    noise, on, threshold = (np.where(holds, v[source], v[:rows]) for v in pool)
    signal |= holds
    rest = ~signal
    noise[rest] = means[rest]
    threshold[rest] = cfar_factor(false_alarm, n) * means[rest]
    return noise, on, threshold, signal


def _refine_rows(s: np.ndarray, csum: np.ndarray, low: np.ndarray, high: np.ndarray,
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Re-estimate the levels from the split at the minimum-error threshold (module step 2).

    The two-means cut lies near the midpoint of the levels, above the minimum-error point, so
    the lower cluster takes in the low tail of the Rice law and overstates the noise floor.
    Splitting again at the Rice threshold (``REFINE_STEPS`` times, in the manner of the
    iterative threshold selection of Ridler and Calvard [1]_ with the midpoint replaced by the
    minimum-error point) and undoing the truncation of the exponential below the threshold,
    ``E[z | z < T] = s (1 - u e^-u / (1 - e^-u))`` with ``u = T / s``, removes most of that bias.

    Every row of ``s`` is one window's energies sorted ascending, ``csum`` their cumulative
    sums, so the mean of either side of a threshold is read off ``csum``. Returns the noise
    floor, on level and threshold of every row.

    References
    ----------
    .. [1] T. W. Ridler and S. Calvard, "Picture thresholding using an iterative selection
       method", IEEE Trans. Systems, Man, and Cybernetics 8(8), 1978.
    """
    n = s.shape[1]
    noise, on = low.copy(), high.copy()
    threshold = _rice_threshold_rows(on - noise, noise)
    # the rows still refined, and their sorted energies, sums and levels
    todo, s_t, csum_t = np.arange(s.shape[0]), s, csum
    noise_t, on_t, threshold_t = noise, on, threshold
    for _ in range(REFINE_STEPS):
        count_off = (s_t <= threshold_t[:, None]).sum(axis=1)
        keep = np.minimum(count_off, n - count_off) >= MIN_CLUSTER
        if not keep.all():
            todo, s_t, csum_t, count_off = todo[keep], s_t[keep], csum_t[keep], count_off[keep]
            noise_t, on_t, threshold_t = noise_t[keep], on_t[keep], threshold_t[keep]
            if not todo.size:
                break
        u = threshold_t / noise_t
        kept = 1.0 - u / np.expm1(u)            # u e^-u / (1 - e^-u) = u / (e^u - 1)
        below = csum_t[np.arange(todo.size), count_off - 1]
        noise_t = np.maximum(below / count_off / kept, _FLOOR * on_t)
        on_t = (csum_t[:, -1] - below) / (n - count_off)
        noise[todo], on[todo] = noise_t, on_t
        keep = on_t > noise_t
        if not keep.all():
            todo, s_t, csum_t = todo[keep], s_t[keep], csum_t[keep]
            noise_t, on_t = noise_t[keep], on_t[keep]
            if not todo.size:
                break
        threshold_t = _rice_threshold_rows(on_t - noise_t, noise_t)
        threshold[todo] = threshold_t
    return noise, on, threshold


def _decide_rows(z: np.ndarray, noise: np.ndarray, on: np.ndarray, threshold: np.ndarray,
                 signal: np.ndarray) -> tuple[np.ndarray, np.ndarray, WindowLevels]:
    """Hard and soft decisions of every row of ``z`` with its window's levels, and statistics."""
    if signal.all():
        soft = ook_llr(z, (on - noise)[:, None], noise[:, None])
    else:
        soft = np.zeros(z.shape)
        rows = np.flatnonzero(signal)
        if rows.size:
            soft[rows] = ook_llr(z[rows], (on[rows] - noise[rows])[:, None], noise[rows, None])
        rows = np.flatnonzero(~signal & (noise > 0))
        if rows.size:
            soft[rows] = (z[rows] - threshold[rows, None]) / noise[rows, None]
    bits = soft > 0
    ones = bits.sum(axis=1)
    zeros = z.shape[1] - ones
    with np.errstate(invalid="ignore", divide="ignore"):
        m1 = np.where(bits, z, 0.0).sum(axis=1) / ones
        m0 = np.where(bits, 0.0, z).sum(axis=1) / zeros
        dev = z - np.where(bits, m1[:, None], m0[:, None])
        dev *= dev
        v1 = np.where(bits, dev, 0.0).sum(axis=1) / ones
        v0 = np.where(bits, 0.0, dev).sum(axis=1) / zeros
    levels = WindowLevels(np.array([noise, on, threshold, signal, ones, zeros, m1, v1, m0, v0],
                                   dtype=np.float64))
    return bits.view(np.uint8), soft.astype(np.float32), levels


def energy_detect(y: np.ndarray, window: int, false_alarm: float, min_contrast: float,
                  state: EnergyState | None = None, final: bool = False,
                  ) -> tuple[np.ndarray, np.ndarray, WindowLevels, EnergyState]:
    """Decide OOK symbols by their energy, window by window.

    Parameters
    ----------
    y : numpy.ndarray
        Complex samples, one per symbol.
    window : int
        Symbols per estimation window (>= 1).
    false_alarm : float
        False-alarm target used in noise-only windows.
    min_contrast : float
        Least on/off level ratio (linear) for a window to count as carrying a signal.
    state : EnergyState or None
        State returned by the previous call; None at the start of the stream.
    final : bool
        End of stream: also decide the symbols held back, with levels estimated over the last
        ``window`` symbols of the stream.

    Returns
    -------
    bits : numpy.ndarray
        uint8 decisions, 1 = on.
    soft : numpy.ndarray
        float32 soft values, positive = 1: the log-likelihood ratio (natural log) in a signal
        window, ``(z - T) / sigma^2`` in a noise-only window.
    levels : WindowLevels
        Levels and decision statistics of every window decided in this call (a sequence of
        ``OokLevels``).
    state : EnergyState
        State for the next call.

    Notes
    -----
    Decisions lag the input by up to one window: symbols are decided once their window is
    complete. Feeding a stream in pieces gives the same decisions as feeding it whole.
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 (got {window})")
    state = state or EnergyState()
    y = np.asarray(y)
    z = np.concatenate([state.pending, y.real.astype(np.float64) ** 2
                        + y.imag.astype(np.float64) ** 2])
    full = z.shape[0] // window
    bits_out, soft_out, levels_out = [], [], []
    held, last = state.held, state.last_window
    if full:
        rows = z[: full * window].reshape(full, window)
        bits, soft, levels = _decide_rows(
            rows, *_estimate_rows(rows, false_alarm, min_contrast, held))
        bits_out.append(bits.ravel())
        soft_out.append(soft.ravel())
        levels_out.append(levels)
        held = levels.last_signal() or held
        last = rows[-1]
    pending = z[full * window:]
    if final and pending.size:
        context = np.concatenate([last, pending])[-window:]
        estimate = _estimate_rows(context[None, :], false_alarm, min_contrast, held)
        bits, soft, levels = _decide_rows(pending[None, :], *estimate)
        bits_out.append(bits.ravel())
        soft_out.append(soft.ravel())
        levels_out.append(levels)
        pending = pending[:0]
    bits = np.concatenate(bits_out) if bits_out else np.zeros(0, np.uint8)
    soft = np.concatenate(soft_out) if soft_out else np.zeros(0, np.float32)
    return (bits, soft, WindowLevels.join(levels_out),
            EnergyState(pending.copy(), np.array(last), held))
