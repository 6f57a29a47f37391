"""The command line as a user meets it: exit codes, JSON lines, and a clean Ctrl-C."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from stream.cli import main

RATE = 200_000


def _write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def _tone_to_record(tmp_path: Path, samples: int = 0, realtime: bool = True) -> Path:
    return _write(tmp_path, f"""
[pipeline]
name = "bench-tone"
sample_rate = {RATE}
links = ["src -> g -> rec"]

[blocks.src]
kind = "tone"
samples = {samples}
chunk_size = 4000
realtime = {str(realtime).lower()}
noise_power = 0.5

[blocks.g]
kind = "gain"

[blocks.rec]
kind = "record"
format = "raw"
path = "{(tmp_path / 'out.cf32').as_posix()}"
""")


def _phasefree(*args: str, **kw) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "stream.cli", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def test_sigint_stops_cleanly_with_summary_and_complete_recording(tmp_path):
    proc = _phasefree("run", str(_tone_to_record(tmp_path)), "--json")
    # wait until the run is under way (its first status line), not a fixed time
    first = proc.stdout.readline()
    assert json.loads(first)["event"] == "status", first
    proc.send_signal(signal.SIGINT)
    t0 = time.monotonic()
    out, err = proc.communicate(timeout=10)
    elapsed = time.monotonic() - t0
    assert proc.returncode == 0, err
    assert elapsed < 2.0, f"took {elapsed:.2f} s to stop"
    summary = json.loads(out.strip().splitlines()[-1])
    assert summary["event"] == "summary" and summary["reason"] == "stopped"
    size = (tmp_path / "out.cf32").stat().st_size
    assert size > 0 and size % 8 == 0  # whole complex64 samples
    assert size // 8 == summary["blocks"]["rec"]["samples_in"]


def _catches(pid: int, signum: int) -> bool:
    """Whether process ``pid`` has a handler for ``signum`` (the SigCgt mask in /proc)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("SigCgt:"):
            return bool(int(line.split()[1], 16) >> (signum - 1) & 1)
    return False


def test_sigterm_during_start_up_is_honoured(tmp_path):
    proc = _phasefree("run", str(_tone_to_record(tmp_path)), "--json")
    deadline = time.monotonic() + 20
    while not _catches(proc.pid, signal.SIGTERM):  # handlers go in before the heavy imports
        assert time.monotonic() < deadline and proc.poll() is None
        time.sleep(0.001)
    proc.send_signal(signal.SIGTERM)  # most likely still importing numpy and scipy
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err
    assert json.loads(out.strip().splitlines()[-1])["reason"] == "stopped"


def test_json_lines_end_with_an_end_of_stream_summary(tmp_path, capsys):
    path = _tone_to_record(tmp_path, samples=50_000, realtime=False)
    assert main(["run", str(path), "--json"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    records = [json.loads(line) for line in lines]
    summary = records[-1]
    assert summary["event"] == "summary" and summary["reason"] == "end-of-stream"
    assert summary["blocks"]["rec"]["samples_in"] == 50_000
    assert set(summary["blocks"]) == {"src", "g", "rec"}
    assert all(r["event"] == "status" for r in records[:-1])


def test_time_limit(tmp_path, capsys):
    assert main(["run", str(_tone_to_record(tmp_path)), "--seconds", "0.5", "--json"]) == 0
    assert json.loads(capsys.readouterr().out.strip().splitlines()[-1])["reason"] == "time-limit"


def test_bad_pipeline_file_exits_2_before_running(tmp_path, capsys):
    path = _write(tmp_path, """
[pipeline]
links = ["src -> rec"]
[blocks.src]
kind = "tone"
sample_rate = -5
[blocks.rec]
kind = "discard"
""")
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert f"{path}: blocks.src.sample_rate: must be > 0 (got -5" in err


def test_bad_override_exits_2(tmp_path, capsys):
    path = _tone_to_record(tmp_path)
    assert main(["check", str(path), "--set", "src.noise_power=loud"]) == 2
    assert "blocks.src.noise_power: must be a number (got 'loud')" in capsys.readouterr().err


def test_a_failing_block_exits_3_with_its_id(tmp_path, capsys):
    data = np.ones(1000, dtype=np.complex64)
    data[700] = np.nan
    data.tofile(tmp_path / "bad.cf32")
    path = _write(tmp_path, f"""
[pipeline]
links = ["play -> sink"]
[blocks.play]
kind = "recording"
path = "{(tmp_path / 'bad.cf32').as_posix()}"
datatype = "cf32_le"
sample_rate = 1000
[blocks.sink]
kind = "discard"
""")
    assert main(["run", str(path), "--json"]) == 3
    captured = capsys.readouterr()
    summary = json.loads(captured.out.strip().splitlines()[-1])
    assert summary["reason"] == "error" and summary["error"]["block"] == "play"
    assert "'play'" in captured.err


def test_check_prints_each_link_with_dtype_and_rate(tmp_path, capsys):
    assert main(["check", str(_tone_to_record(tmp_path))]) == 0
    out = capsys.readouterr().out
    assert "src.out -> g.in" in out and "complex64" in out and "200,000.000" in out


def test_blocks_lists_kinds_and_describes_one(capsys):
    assert main(["blocks"]) == 0
    listing = capsys.readouterr().out
    for kind in ("sim", "matched_filter", "timing", "fsk_detect", "dpsk_detect", "ber"):
        assert kind in listing
    assert main(["blocks", "gain"]) == 0
    text = capsys.readouterr().out
    assert "gain_db [dB]: float, default 0.0, range >= -300, <= 300" in text
    assert main(["blocks", "no_such_kind"]) == 2


@pytest.mark.parametrize("name", ["default", "loopback-ook", "loopback-2fsk", "loopback-dbpsk",
                                  "loopback-dqpsk", "packets-2fsk"])
def test_every_shipped_pipeline_validates(name, capsys, monkeypatch, tmp_path):
    monkeypatch.chdir(tmp_path)  # a packets sink may name a relative file
    assert main(["check", name]) == 0, capsys.readouterr().err


def test_default_run_from_an_installed_location_runs_the_loopback(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[2]))
    proc = _phasefree("run", "--seconds", "2", "--json", "--set", "src.realtime=false",
                      cwd=tmp_path, env=env)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    summary = json.loads(out.strip().splitlines()[-1])
    assert summary["reason"] == "time-limit"
    assert summary["blocks"]["ber"]["bits"] > 0


def test_a_bad_cpus_option_exits_2_naming_the_option(tmp_path, capsys):
    assert main(["run", str(_tone_to_record(tmp_path)), "--cpus", "lots"]) == 2
    assert "--cpus" in capsys.readouterr().err
