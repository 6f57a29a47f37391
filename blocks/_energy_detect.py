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
from dataclasses import dataclass, field

import numpy as np
from scipy.special import i0e, i1e

__all__ = [
    "MIN_CLUSTER",
    "REFINE_STEPS",
    "EnergyState",
    "OokLevels",
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
    """``two_level_split`` of every row of ``s`` (rows sorted ascending), and their cumsums."""
    n = s.shape[1]
    csum = np.cumsum(s, axis=1)
    k = np.arange(1, n)
    m0 = csum[:, :-1] / k
    m1 = (csum[:, -1:] - csum[:, :-1]) / (n - k)
    best = np.argmax(k * (n - k) * (m1 - m0) ** 2, axis=1)
    rows = np.arange(s.shape[0])
    return m0[rows, best], m1[rows, best], best + 1, csum


def _log_i0(x: np.ndarray | float) -> np.ndarray:
    """log I0(x) without overflow, using the exponentially scaled Bessel function."""
    return np.log(i0e(x)) + np.abs(x)


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
    The equation is solved for ``x`` by Newton's method from ``x = 2 sqrt(A^2/s)``, where
    ``log I0(x) <= x^2/4`` guarantees a start below the root; ``log I0`` is convex, so the
    iteration converges monotonically after the first step. Then ``T = (x s)^2 / (4 A^2)``.
    The windows of ``energy_detect`` are solved together, one array per Newton step.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, sec. 2.3.
    """
    if not signal_power > 0 or not noise_floor > 0:
        raise ValueError(f"signal_power and noise_floor must be > 0 "
                         f"(got {signal_power!r}, {noise_floor!r})")
    return float(_rice_threshold_rows(np.array([signal_power], dtype=np.float64),
                                      np.array([noise_floor], dtype=np.float64))[0])


def _rice_threshold_rows(signal_power: np.ndarray, noise_floor: np.ndarray) -> np.ndarray:
    """``rice_threshold`` of every element (arrays of valid, positive values)."""
    gamma = signal_power / noise_floor
    x = 2.0 * np.sqrt(gamma)
    todo = np.arange(x.shape[0])
    for _ in range(60):
        xt = x[todo]
        step = (_log_i0(xt) - gamma[todo]) / (i1e(xt) / i0e(xt))
        xt = xt - step
        x[todo] = xt
        todo = todo[~(np.abs(step) <= 1e-13 * xt)]
        if not todo.size:
            break
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
    """
    a = np.sqrt(signal_power)
    x = 2.0 * a * np.sqrt(np.asarray(z, dtype=np.float64)) / noise_floor
    return _log_i0(x) - signal_power / noise_floor


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
    return _estimate_rows(z[None, :], false_alarm, min_contrast, held)[0]


def _estimate_rows(z: np.ndarray, false_alarm: float, min_contrast: float,
                   held: OokLevels | None) -> list[OokLevels]:
    """``estimate_levels`` of consecutive windows, the rows of ``z``, each holding for the next.

    Steps 1-2 of the module notes do not depend on earlier windows and run on all rows at once;
    only the choice between held levels and the noise-only threshold goes row by row.
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
    means = z.mean(axis=1)
    alpha = math.nan if signal.all() else cfar_factor(false_alarm, n)
    out = []
    for i in range(rows):
        if signal[i]:
            levels = OokLevels(float(noise[i]), float(on[i]), float(threshold[i]), True)
        elif held is not None and means[i] >= held.threshold:
            levels = OokLevels(held.noise_floor, held.on_level, held.threshold, True)
        else:
            mean = float(means[i])
            levels = OokLevels(mean, math.nan, alpha * mean, False)
        if levels.signal:
            held = levels
        out.append(levels)
    return out


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
    todo = np.arange(s.shape[0])
    for _ in range(REFINE_STEPS):
        count_off = np.count_nonzero(s[todo] <= threshold[todo, None], axis=1)
        keep = np.minimum(count_off, n - count_off) >= MIN_CLUSTER
        todo, count_off = todo[keep], count_off[keep]
        if not todo.size:
            break
        u = threshold[todo] / noise[todo]
        kept = 1.0 - u * np.exp(-u) / -np.expm1(-u)
        below = csum[todo, count_off - 1]
        noise[todo] = np.maximum(below / count_off / kept, _FLOOR * on[todo])
        on[todo] = (csum[todo, -1] - below) / (n - count_off)
        todo = todo[on[todo] > noise[todo]]
        if not todo.size:
            break
        threshold[todo] = _rice_threshold_rows(on[todo] - noise[todo], noise[todo])
    return noise, on, threshold


def _decide_rows(z: np.ndarray, levels: list[OokLevels],
                 ) -> tuple[np.ndarray, np.ndarray, list[OokLevels]]:
    """Hard and soft decisions of every row of ``z`` with its window's levels, and statistics."""
    noise = np.array([lv.noise_floor for lv in levels])
    on = np.array([lv.on_level for lv in levels])
    threshold = np.array([lv.threshold for lv in levels])
    signal = np.array([lv.signal for lv in levels], dtype=bool)
    soft = np.zeros(z.shape)
    rows = np.flatnonzero(signal)
    if rows.size:
        soft[rows] = ook_llr(z[rows], (on[rows] - noise[rows])[:, None], noise[rows, None])
    rows = np.flatnonzero(~signal & (noise > 0))
    if rows.size:
        soft[rows] = (z[rows] - threshold[rows, None]) / noise[rows, None]
    bits = soft > 0
    ones = np.count_nonzero(bits, axis=1)
    zeros = z.shape[1] - ones
    with np.errstate(invalid="ignore", divide="ignore"):
        m1 = np.where(bits, z, 0.0).sum(axis=1) / ones
        m0 = np.where(bits, 0.0, z).sum(axis=1) / zeros
        v1 = np.where(bits, (z - m1[:, None]) ** 2, 0.0).sum(axis=1) / ones
        v0 = np.where(bits, 0.0, (z - m0[:, None]) ** 2).sum(axis=1) / zeros
    full = [OokLevels(lv.noise_floor, lv.on_level, lv.threshold, lv.signal, int(ones[i]),
                      int(zeros[i]), float(m1[i]), float(v1[i]), float(m0[i]), float(v0[i]))
            for i, lv in enumerate(levels)]
    return bits.astype(np.uint8), soft.astype(np.float32), full


def energy_detect(y: np.ndarray, window: int, false_alarm: float, min_contrast: float,
                  state: EnergyState | None = None, final: bool = False,
                  ) -> tuple[np.ndarray, np.ndarray, list[OokLevels], EnergyState]:
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
    levels : list of OokLevels
        Levels and decision statistics of every window decided in this call.
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
        levels_out = _estimate_rows(rows, false_alarm, min_contrast, held)
        bits, soft, levels_out = _decide_rows(rows, levels_out)
        bits_out.append(bits.ravel())
        soft_out.append(soft.ravel())
        held = next((lv for lv in reversed(levels_out) if lv.signal), held)
        last = rows[-1]
    pending = z[full * window:]
    if final and pending.size:
        context = np.concatenate([last, pending])[-window:]
        levels = estimate_levels(context, false_alarm, min_contrast, held)
        bits, soft, levels = _decide_rows(pending[None, :], [levels])
        bits_out.append(bits.ravel())
        soft_out.append(soft.ravel())
        levels_out.extend(levels)
        pending = pending[:0]
    bits = np.concatenate(bits_out) if bits_out else np.zeros(0, np.uint8)
    soft = np.concatenate(soft_out) if soft_out else np.zeros(0, np.float32)
    return bits, soft, levels_out, EnergyState(pending.copy(), np.array(last), held)
