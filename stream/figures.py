"""The pictures in a status record: eye histogram, spectrum and BER history, found by kind.

A status record with views (the monitor's ``/status``, ``--snapshot``'s ``status.json``) holds
each meter's bulky figures under ``views[block_id]``. This module finds them by the block's kind
(``eye``, ``spectrum``, ``ber``) and the names of their keys, and returns them as arrays, so the
``plot`` command and snapshots draw the same thing the monitor page does (the page reads the
same keys in its script). A record without a figure gives None for it, never an error.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["BerHistory", "EyeFigure", "SpectrumFigure", "ber_history", "eye_figure",
           "spectrum_figure"]

# Key names tried in order (the page's script uses the same lists).
_EYE_COUNTS = ("counts", "histogram")
_EYE_LEVELS = ("level_edges", "levels")
_EYE_LOW = ("low", "level_low")
_EYE_HIGH = ("high", "level_high")
_EYE_TIME = ("time_symbols", "time_edges")
_FREQUENCY = ("freqs_hz", "frequency_hz", "freq_hz")
_POWER_DB = ("psd_db", "power_db", "level_db")
_POWER_LINEAR = ("psd", "power")
_SECONDS = ("t_s", "seconds", "time_s")
_BER_LOW = ("ber_low", "low")
_BER_HIGH = ("ber_high", "high")


@dataclass(frozen=True)
class EyeFigure:
    """An eye histogram: ``counts[level, time]`` with the ranges its axes span."""

    block: str
    counts: np.ndarray
    time_range: tuple[float, float]
    level_range: tuple[float, float]
    quantity: str


@dataclass(frozen=True)
class SpectrumFigure:
    """An averaged power spectrum in dB against frequency in Hz."""

    block: str
    frequency_hz: np.ndarray
    power_db: np.ndarray


@dataclass(frozen=True)
class BerHistory:
    """BER over run time, with its confidence interval where the meter gives one."""

    block: str
    seconds: np.ndarray
    ber: np.ndarray
    low: np.ndarray | None
    high: np.ndarray | None


def _views_of_kind(record: Mapping[str, Any], kind: str) -> Iterator[tuple[str, Mapping]]:
    blocks = record.get("blocks") or {}
    for bid, view in (record.get("views") or {}).items():
        if isinstance(view, Mapping) and (blocks.get(bid) or {}).get("kind") == kind:
            yield bid, view


def _vector(value: Any) -> np.ndarray | None:
    """A non-empty 1-D list of numbers (None entries become NaN) as float64, else None."""
    if not isinstance(value, Sequence) or isinstance(value, str) or not value:
        return None
    if not all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool))
               for v in value):
        return None
    return np.array([np.nan if v is None else v for v in value], dtype=np.float64)


def _matrix(value: Any) -> np.ndarray | None:
    if not isinstance(value, Sequence) or isinstance(value, str) or len(value) < 2:
        return None
    rows = [_vector(r) for r in value]
    if any(r is None for r in rows) or len({len(r) for r in rows}) != 1:
        return None
    return np.vstack(rows)


def _pick(view: Mapping[str, Any], names: Sequence[str], convert) -> Any:
    for name in names:
        if name in view:
            value = convert(view[name])
            if value is not None:
                return value
    return None


def _number(value: Any) -> float | None:
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    return float(value) if ok and np.isfinite(value) else None


def _span(axis: np.ndarray, bins: int) -> tuple[float, float]:
    """The range an axis covers: its ends if it lists edges, half a bin beyond if centres."""
    lo, hi = float(axis[0]), float(axis[-1])
    if len(axis) == bins and bins > 1:
        half = (hi - lo) / (bins - 1) / 2
        return lo - half, hi + half
    return lo, hi


def eye_figure(record: Mapping[str, Any]) -> EyeFigure | None:
    """The first eye meter's histogram in ``record`` (None if there is none)."""
    for bid, view in _views_of_kind(record, "eye"):
        counts = _pick(view, _EYE_COUNTS, _matrix)
        if counts is None:
            continue
        if view.get("rows") == "time":
            counts = counts.T
        levels = _pick(view, _EYE_LEVELS, _vector)
        low, high = _pick(view, _EYE_LOW, _number), _pick(view, _EYE_HIGH, _number)
        if levels is not None:
            level_range = _span(levels, counts.shape[0])
        elif low is not None and high is not None:
            level_range = (low, high)
        else:
            level_range = (0.0, float(counts.shape[0]))
        times = _pick(view, _EYE_TIME, _vector)
        # without a time axis the columns span the two symbol periods the eye meter draws
        time_range = _span(times, counts.shape[1]) if times is not None else (0.0, 2.0)
        quantity = str(view.get("quantity", "level"))
        if isinstance(view.get("unit"), str) and view["unit"] != quantity:
            quantity = f"{quantity} ({view['unit']})"
        return EyeFigure(bid, counts, time_range, level_range, quantity)
    return None


def spectrum_figure(record: Mapping[str, Any]) -> SpectrumFigure | None:
    """The first spectrum meter's averaged spectrum in ``record`` (None if there is none)."""
    for bid, view in _views_of_kind(record, "spectrum"):
        freq = _pick(view, _FREQUENCY, _vector)
        power = _pick(view, _POWER_DB, _vector)
        if power is None:
            linear = _pick(view, _POWER_LINEAR, _vector)
            if linear is not None:
                with np.errstate(divide="ignore", invalid="ignore"):
                    power = np.where(linear > 0, 10 * np.log10(linear), np.nan)
        if freq is not None and power is not None and freq.shape == power.shape:
            return SpectrumFigure(bid, freq, power)
    return None


def ber_history(record: Mapping[str, Any]) -> BerHistory | None:
    """The first BER meter's history in ``record`` (None if it has none yet).

    The history may be a mapping of equal-length lists (at the top of the view, or under
    ``history``) or a list of per-point mappings.
    """
    for bid, view in _views_of_kind(record, "ber"):
        hist = view.get("history", view.get("ber_history", view))
        if isinstance(hist, Sequence) and hist and isinstance(hist[0], Mapping):
            hist = {"seconds": [_pick(p, _SECONDS, _number) for p in hist],
                    "ber": [_pick(p, ("ber",), _number) for p in hist],
                    "ber_low": [_pick(p, _BER_LOW, _number) for p in hist],
                    "ber_high": [_pick(p, _BER_HIGH, _number) for p in hist]}
        if not isinstance(hist, Mapping):
            continue
        seconds = _pick(hist, _SECONDS, _vector)
        ber = _pick(hist, ("ber",), _vector)
        if seconds is None or ber is None or seconds.shape != ber.shape:
            continue
        low, high = _pick(hist, _BER_LOW, _vector), _pick(hist, _BER_HIGH, _vector)
        if low is None or high is None or low.shape != ber.shape or high.shape != ber.shape:
            low = high = None
        return BerHistory(bid, seconds, ber, low, high)
    return None
