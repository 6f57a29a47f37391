"""PNG pictures of a run (eye, spectrum, BER over time) and the end-of-run snapshot folder.

matplotlib is optional (the ``plot`` extra): it is imported only when a picture is drawn, on
the Agg backend so no display is needed. The eye's colour ramp is the monitor page's.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from stream.figures import (
    BerHistory,
    EyeFigure,
    SpectrumFigure,
    ber_history,
    eye_figure,
    spectrum_figure,
)
from stream.report import plain

__all__ = ["PICTURES", "PlotUnavailable", "draw", "load_pyplot", "snapshot_problem",
           "write_snapshot"]

#: The eye's ramp from an empty cell to the fullest (the monitor page uses the same colours).
EYE_RAMP = ("#18231f", "#205c4e", "#7cc4a0", "#f0a83c", "#fff6de")
_LINE = "#c77d12"
_BAND = "#7cc4a0"


class PlotUnavailable(RuntimeError):
    """matplotlib is not installed."""


def load_pyplot():
    """matplotlib's pyplot on the Agg backend; PlotUnavailable if it is not installed."""
    try:
        import matplotlib
    except ImportError:
        raise PlotUnavailable("pictures need matplotlib (install the 'plot' extra: "
                              "pip install 'phasefree[plot]')") from None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _eye(plt, fig, ax, eye: EyeFigure) -> None:
    from matplotlib.colors import LinearSegmentedColormap, PowerNorm

    ramp = LinearSegmentedColormap.from_list("phasefree-eye", EYE_RAMP).with_extremes(
        bad=EYE_RAMP[0])
    counts = np.ma.masked_less_equal(eye.counts, 0)
    peak = float(eye.counts.max()) if eye.counts.size else 0.0
    image = ax.imshow(counts, origin="lower", aspect="auto", cmap=ramp,
                      norm=PowerNorm(0.5, vmin=0, vmax=max(peak, 1.0)),
                      extent=(*eye.time_range, *eye.level_range), interpolation="nearest")
    ax.set_facecolor(EYE_RAMP[0])
    ax.set_xlabel("time (symbols)")
    ax.set_ylabel(eye.quantity)
    ax.set_title(f"eye diagram ({eye.block}, {int(eye.counts.sum())} samples)")
    fig.colorbar(image, ax=ax, label="count")


def _spectrum(plt, fig, ax, sp: SpectrumFigure) -> None:
    wide = float(np.nanmax(np.abs(sp.frequency_hz))) >= 2000
    scale, unit = (1e3, "kHz") if wide else (1.0, "Hz")
    ax.plot(sp.frequency_hz / scale, sp.power_db, color=_LINE, linewidth=1.0)
    ax.set_xlabel(f"frequency ({unit})")
    ax.set_ylabel("power density (dB/Hz)")
    ax.set_title(f"spectrum ({sp.block})")
    ax.grid(True, alpha=0.3)


def _ber(plt, fig, ax, h: BerHistory) -> None:
    positive = np.concatenate([v[np.isfinite(v) & (v > 0)]
                               for v in (h.ber, h.low, h.high) if v is not None])
    floor = 10.0 ** np.floor(np.log10(positive.min())) if positive.size else 1e-6
    if h.low is not None and h.high is not None:
        ax.fill_between(h.seconds, np.maximum(h.low, floor), np.maximum(h.high, floor),
                        color=_BAND, alpha=0.35, linewidth=0, label="confidence interval")
    ax.semilogy(h.seconds, np.maximum(h.ber, floor), color=_LINE, linewidth=1.2,
                label="measured BER")
    ax.set_ylim(bottom=floor)
    ax.set_xlabel("stream time (s)")
    ax.set_ylabel("bit error ratio")
    ax.set_title(f"BER over time ({h.block})")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="upper right")


#: Picture name -> (finder in a status record, drawing function).
PICTURES: dict[str, tuple[Callable[[Mapping[str, Any]], Any], Callable]] = {
    "eye": (eye_figure, _eye),
    "spectrum": (spectrum_figure, _spectrum),
    "ber": (ber_history, _ber),
}


def draw(name: str, record: Mapping[str, Any], path: Path) -> bool:
    """Draw picture ``name`` of ``record`` to a PNG at ``path``.

    Returns
    -------
    bool
        False (and no file) if the record holds no such figure.

    Raises
    ------
    PlotUnavailable
        If matplotlib is not installed.
    """
    find, paint = PICTURES[name]
    figure = find(record)
    if figure is None:
        return False
    plt = load_pyplot()
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=100)
    try:
        paint(plt, fig, ax, figure)
        fig.tight_layout()
        fig.savefig(path)
    finally:
        plt.close(fig)
    return True


def snapshot_problem(directory: Path) -> str | None:
    """Why a snapshot could not be written into ``directory`` (None if it can), checked before
    a run so a long run does not end in a failed write. Creates the folder."""
    try:
        directory.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        return f"cannot create folder {directory}: {err.strerror}"
    if not os.access(directory, os.W_OK | os.X_OK):
        return f"cannot write into folder {directory}: permission denied"
    return None


def write_snapshot(directory: Path, record: Mapping[str, Any]) -> list[str]:
    """Write ``status.json`` and the pictures the record holds into ``directory``.

    Returns
    -------
    list of str
        One line per file written or picture left out, for the user.
    """
    directory.mkdir(parents=True, exist_ok=True)
    status_path = directory / "status.json"
    status_path.write_text(json.dumps(plain(dict(record)), indent=1, allow_nan=False) + "\n")
    notes = [f"wrote {status_path}"]
    try:
        load_pyplot()
    except PlotUnavailable as err:
        return [*notes, f"no pictures: {err}"]
    for name in PICTURES:
        path = directory / f"{name}.png"
        if draw(name, record, path):
            notes.append(f"wrote {path}")
        else:
            notes.append(f"no {name} picture: no {name} meter with data in the record")
    return notes
