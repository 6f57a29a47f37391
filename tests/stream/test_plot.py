"""Tests for pictures of a run: the figures found in a status record (stream/figures.py), the
PNGs (stream/pictures.py), ``phasefree plot`` and ``run --snapshot``.

A written picture is checked as a PNG file by its signature and its IHDR chunk (PNG
specification, ISO/IEC 15948 / W3C: section 5.2, the 8-byte signature 89 50 4E 47 0D 0A 1A 0A;
section 11.2.2, IHDR first, width and height as 4-byte big-endian integers), and read back with
matplotlib's own PNG reader.
"""

from __future__ import annotations

import json
import os
import struct
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from stream import pictures
from stream.cli import main as cli_main
from stream.figures import ber_history, eye_figure, spectrum_figure
from tests.stream.monitored import REPO

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
SIZE = (700, 450)  # 7 x 4.5 inches at 100 dots per inch


def _png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.fixture(scope="module")
def snapshot(tmp_path_factory) -> Path:
    """A short paced run of the shipped 2-FSK loopback with --snapshot."""
    out = tmp_path_factory.mktemp("snap") / "after-run"
    done = subprocess.run([sys.executable, "-m", "stream.cli", "run",
                           "configs/loopback-2fsk.toml", "--set", "src.realtime=true",
                           "--seconds", "4", "--json", "--snapshot", str(out)],
                          cwd=REPO, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(REPO)})
    assert done.returncode == 0, done.stderr
    assert f"snapshot: wrote {out / 'status.json'}" in done.stderr
    return out


def _record(views: dict, kinds: dict) -> dict:
    return {"blocks": {bid: {"kind": kind} for bid, kind in kinds.items()}, "views": views}


# -- figures from views -----------------------------------------------------------------------
def test_eye_figure_axes_from_bin_centres():
    counts = [[0, 1, 0, 0], [2, 0, 0, 5], [0, 0, 3, 0]]        # 3 level rows x 4 time columns
    view = {"counts": counts, "levels": [0.5, 1.5, 2.5], "time_symbols": [0.25, 0.75, 1.25, 1.75],
            "quantity": "frequency", "unit": "Hz"}
    eye = eye_figure(_record({"e": view}, {"e": "eye"}))
    np.testing.assert_array_equal(eye.counts, np.array(counts, dtype=float))
    assert eye.level_range == (0.0, 3.0)      # centres 0.5 .. 2.5, half a bin beyond
    assert eye.time_range == (0.0, 2.0)
    assert eye.quantity == "frequency (Hz)"
    flipped = eye_figure(_record({"e": {"counts": np.array(counts).T.tolist(), "rows": "time"}},
                                 {"e": "eye"}))
    np.testing.assert_array_equal(flipped.counts, eye.counts)


def test_figures_need_the_right_kind_and_shape():
    view = {"counts": [[1, 2], [3, 4]]}
    assert eye_figure(_record({"x": view}, {"x": "spectrum"})) is None
    assert eye_figure(_record({"x": {"counts": [[1, 2], [3]]}}, {"x": "eye"})) is None
    assert spectrum_figure({"blocks": {}}) is None
    assert ber_history(_record({"b": {"history": {"t_s": [], "ber": []}}}, {"b": "ber"})) is None


def test_spectrum_from_db_or_linear_power():
    sp = spectrum_figure(_record({"s": {"freqs_hz": [-1.0, 0.0, 1.0], "psd_db": [-3, 0, -3]}},
                                 {"s": "spectrum"}))
    np.testing.assert_array_equal(sp.power_db, [-3, 0, -3])
    lin = spectrum_figure(_record({"s": {"freqs_hz": [0, 1, 2], "psd": [1.0, 10.0, 0.0]}},
                                  {"s": "spectrum"}))
    np.testing.assert_allclose(lin.power_db[:2], [0.0, 10.0])   # 10 log10(p)
    assert np.isnan(lin.power_db[2])


def test_ber_history_columns_or_points():
    columns = {"t_s": [1, 2], "ber": [1e-3, 0.0], "ber_low": [5e-4, 0.0],
               "ber_high": [2e-3, 3e-4]}
    h = ber_history(_record({"b": {"history": columns}}, {"b": "ber"}))
    np.testing.assert_array_equal(h.seconds, [1, 2])
    np.testing.assert_array_equal(h.high, [2e-3, 3e-4])
    points = [{"seconds": 1, "ber": 1e-3}, {"seconds": 2, "ber": 2e-3}]
    h = ber_history(_record({"b": {"history": points}}, {"b": "ber"}))
    np.testing.assert_array_equal(h.ber, [1e-3, 2e-3])


# -- the snapshot and the plot command --------------------------------------------------------
def test_snapshot_writes_status_and_pictures(snapshot):
    record = json.loads((snapshot / "status.json").read_text())
    assert record["event"] == "summary"
    assert {"eye", "spectrum", "ber"} <= set(record["views"])
    assert "host" in record and record["sources"] == ["src"]
    for name in ("eye", "spectrum", "ber"):
        assert _png_size(snapshot / f"{name}.png") == SIZE


@pytest.mark.parametrize("picture", ["eye", "spectrum", "ber"])
def test_plot_command_draws_from_a_snapshot(snapshot, tmp_path, picture, capsys):
    out = tmp_path / f"{picture}.png"
    assert cli_main(["plot", picture, str(snapshot / "status.json"), "-o", str(out)]) == 0
    assert _png_size(out) == SIZE
    plt = pictures.load_pyplot()
    image = plt.imread(out)
    assert image.shape[:2] == (SIZE[1], SIZE[0])
    assert image[..., :3].std() > 0.05       # not a blank canvas


def test_eye_picture_uses_the_ramp_where_counts_are(tmp_path):
    counts = np.zeros((8, 16))
    counts[6, :] = 100.0                                    # one bright band near the top
    record = _record({"e": {"counts": counts.tolist()}}, {"e": "eye"})
    out = tmp_path / "eye.png"
    assert pictures.draw("eye", record, out)
    rgb = (pictures.load_pyplot().imread(out)[..., :3] * 255).round()
    top = np.array([int(pictures.EYE_RAMP[-1][i:i + 2], 16) for i in (1, 3, 5)])
    hot = np.all(np.abs(rgb - top) <= 2, axis=-1)
    rows = np.nonzero(hot.any(axis=1))[0]
    empty = np.array([int(pictures.EYE_RAMP[0][i:i + 2], 16) for i in (1, 3, 5)])
    cold_rows = np.nonzero(np.all(np.abs(rgb - empty) <= 2, axis=-1).any(axis=1))[0]
    # the full band sits above the plot's middle: rows of the image count from the top
    assert rows.size and cold_rows.size and rows.mean() < cold_rows.mean()


def test_plot_errors(tmp_path, capsys):
    status = tmp_path / "status.json"
    out = tmp_path / "out.png"
    assert cli_main(["plot", "eye", str(tmp_path / "missing.json"), "-o", str(out)]) == 2
    assert "cannot read" in capsys.readouterr().err
    status.write_text("{not json")
    assert cli_main(["plot", "eye", str(status), "-o", str(out)]) == 2
    assert "is not JSON" in capsys.readouterr().err
    status.write_text("[1, 2]")
    assert cli_main(["plot", "eye", str(status), "-o", str(out)]) == 2
    assert "not a status record" in capsys.readouterr().err
    status.write_text(json.dumps({"blocks": {"ber": {"kind": "ber"}}, "views": {}}))
    assert cli_main(["plot", "spectrum", str(status), "-o", str(out)]) == 1
    assert "holds no spectrum figure" in capsys.readouterr().err
    assert not out.exists()
    with pytest.raises(SystemExit) as stop:
        cli_main(["plot", "waterfall", str(status), "-o", str(out)])
    assert stop.value.code == 2


def test_snapshot_without_matplotlib_writes_the_json_and_says_so(tmp_path, monkeypatch):
    def missing():
        raise pictures.PlotUnavailable("pictures need matplotlib")

    monkeypatch.setattr(pictures, "load_pyplot", missing)
    record = _record({"e": {"counts": [[1, 2], [3, 4]]}}, {"e": "eye"})
    notes = pictures.write_snapshot(tmp_path / "snap", record)
    assert json.loads((tmp_path / "snap/status.json").read_text()) == record
    assert notes[-1] == "no pictures: pictures need matplotlib"
    assert not list((tmp_path / "snap").glob("*.png"))


def test_snapshot_folder_is_checked_before_the_run(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    assert "cannot create folder" in pictures.snapshot_problem(blocker / "snap")
    assert pictures.snapshot_problem(tmp_path / "new" / "snap") is None
    assert (tmp_path / "new" / "snap").is_dir()
