"""A pipeline in parts: the shipped board/host split over tcp://127.0.0.1 with CURVE.

Each part runs as its own process (``python -m stream.cli run ...``), as on two machines. The
tests wait on status lines (``--json``) with timeouts, never on fixed sleeps.
"""

from __future__ import annotations

import json
import os
import queue
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from stream.cli import main
from stream.errors import PipelineError
from stream.loader import load_pipeline
from stream.parts import choose_parts
from stream.shipped import shipped_dir

REPO = Path(__file__).resolve().parents[2]
LINK = "dec.out -> cfo.in"
SHIPPED_ADDRESS = 'address = "tcp://127.0.0.1:5571"'


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _split_files(tmp_path: Path, front: dict[str, str] | None = None) -> tuple[Path, Path]:
    """Copies of the shipped split files on a free port, with keys made by ``keygen``.

    ``front`` replaces text in the front file (where the crossing is declared).
    """
    port = _free_port()
    paths = []
    for name in ("split-front.toml", "split-back.toml"):
        text = (shipped_dir() / name).read_text()
        text = text.replace(SHIPPED_ADDRESS, f'address = "tcp://127.0.0.1:{port}"')
        if name == "split-front.toml":
            assert SHIPPED_ADDRESS not in text
            for old, new in (front or {}).items():
                assert old in text, old
                text = text.replace(old, new)
        paths.append(tmp_path / name)
        paths[-1].write_text(text)
    if not (tmp_path / "keys").exists():
        assert main(["keygen", str(tmp_path / "keys"), "host", "board", "intruder"]) == 0
    return paths[0], paths[1]


class Part:
    """One part running in its own process; its JSON status lines are collected as they come."""

    def __init__(self, cwd: Path, *args: str) -> None:
        env = dict(os.environ, PYTHONPATH=str(REPO))
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "stream.cli", "run", *args, "--json",
             "--status-interval", "0.25"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=cwd, env=env)
        self.lines: queue.Queue[dict[str, Any] | None] = queue.Queue()
        self.last: dict[str, Any] | None = None
        self.stderr = ""
        threading.Thread(target=self._read, daemon=True).start()
        threading.Thread(target=self._read_err, daemon=True).start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.put(json.loads(line))
        self.lines.put(None)

    def _read_err(self) -> None:
        assert self.proc.stderr is not None
        for line in self.proc.stderr:
            self.stderr += line

    def wait_for(self, condition: Callable[[dict[str, Any]], bool], timeout: float,
                 what: str) -> dict[str, Any]:
        """The first record (status or summary) for which ``condition`` holds."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                record = self.lines.get(timeout=max(0.01, deadline - time.monotonic()))
            except queue.Empty:
                break
            if record is None:
                break
            self.last = record
            if condition(record):
                return record
        raise AssertionError(f"timed out waiting for {what}; last record: "
                             f"{json.dumps(self.last)[:1500]}\nstderr: {self.stderr[-1500:]}")

    def summary(self, timeout: float) -> dict[str, Any]:
        return self.wait_for(lambda r: r["event"] == "summary", timeout, "the summary")

    def stop_timed(self, signum: int = signal.SIGTERM) -> tuple[float, dict[str, Any]]:
        """Send ``signum``; return the seconds until the summary line and the summary."""
        t0 = time.monotonic()
        self.proc.send_signal(signum)
        summary = self.summary(timeout=10)
        return time.monotonic() - t0, summary

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait(timeout=10)


@pytest.fixture
def parts():
    running: list[Part] = []

    def start(cwd: Path, *args: str) -> Part:
        running.append(Part(cwd, *args))
        return running[-1]

    yield start
    for part in running:
        part.kill()


def _link(record: dict[str, Any]) -> dict[str, Any]:
    return record["links"][LINK]


def _bits(record: dict[str, Any]) -> int:
    return record["blocks"]["ber"].get("bits", 0)  # readings appear with the first bits


def _locked(record: dict[str, Any]) -> bool:
    return bool(record["blocks"]["ber"].get("locked"))


# ----------------------------------------------------------------------------------------------
# the pipeline file


def test_either_half_validates_the_whole_receiver_and_runs_its_own_part(tmp_path,
                                                                        monkeypatch):
    front, back = _split_files(tmp_path)
    monkeypatch.chdir(tmp_path)  # key paths are relative to the working folder
    for path, own, side in ((front, {"src", "dec"}, "sender"),
                            (back, {"cfo", "timing", "det", "ber"}, "receiver")):
        pipe = load_pipeline(path)
        assert set(pipe.blocks) == {"src", "dec", "cfo", "timing", "det", "ber"}
        # dtype and rate across the crossing come from validating the whole graph
        edge = next(e for e in pipe.edges if e.label() == LINK)
        assert (edge.spec.dtype, edge.spec.rate) == ("complex64", 50_000.0)
        plan = choose_parts(pipe, None)
        assert plan is not None and plan.blocks == own
        [(crossing_edge, crossing, where, keys)] = plan.network
        assert crossing_edge == edge and where == side and keys is not None
        assert crossing.binds == "receiver" and crossing.curve
        everything = choose_parts(pipe, "front,back")
        assert everything is not None and everything.network == ()


@pytest.mark.parametrize(("change", "key", "message"), [
    ({'"tcp://127.0.0.1:': '"tcp://0.0.0.0:'}, "address", "beyond the loopback"),
    ({'"tcp://127.0.0.1:': '"tcp://192.168.1.20:'}, "address", "allow_remote = true"),
    ({'"tcp://127.0.0.1:': '"udp://127.0.0.1:'}, "address", "ipc:// or tcp://"),
    ({'binds = "receiver"': 'binds = "both"'}, "binds", "'receiver' or 'sender'"),
    ({'[crossings."dec -> cfo"]': '[crossings."src -> dec"]'}, "", "stays inside part"),
    ({'front = ["src", "dec"]': 'front = ["src"]'}, "", "blocks in no part: dec"),
    ({'front = ["src", "dec"]': 'front = ["src", "dec", "ber"]'}, "", "already in part"),
    ({'admit = ["keys/board.key"]': 'admit = []'}, "admit", "non-empty list"),
    ({'dialer_secret = "keys/board.key_secret"': 'dialer_key = "x"'}, "dialer_key",
     "unknown key"),
])
def test_a_wrong_layout_is_refused_before_anything_runs(tmp_path, change, key, message):
    front, _ = _split_files(tmp_path, front=change)
    with pytest.raises(PipelineError, match=message) as info:
        load_pipeline(front)
    assert info.value.key.endswith(key)


def test_tcp_without_keys_needs_an_explicit_curve_false(tmp_path):
    keys = {line: "" for line in (
        'listener_public = "keys/host.key"           # paths relative to the working folder',
        'listener_secret = "keys/host.key_secret"    # read by the host only',
        'dialer_secret = "keys/board.key_secret"     # read by the board only',
        'admit = ["keys/board.key"]                  # boards the host accepts')}
    front, _ = _split_files(tmp_path, front=keys)
    with pytest.raises(PipelineError, match="curve = false"):
        load_pipeline(front)
    text = front.read_text().replace('binds = "receiver"', 'binds = "receiver"\ncurve = false')
    front.write_text(text)
    plan = choose_parts(load_pipeline(front), None)
    assert plan is not None and plan.network[0][3] is None  # no keys: runs unencrypted


def test_a_missing_key_file_stops_the_run_with_its_key(tmp_path, capsys, monkeypatch):
    front, back = _split_files(tmp_path)
    monkeypatch.chdir(tmp_path)
    (tmp_path / "keys" / "board.key_secret").unlink()
    assert main(["run", str(front)]) == 2
    err = capsys.readouterr().err
    assert "dialer_secret" in err and "board.key_secret" in err and "no such key file" in err
    assert main(["run", str(back), "--part", "middle"]) == 2
    assert "unknown part 'middle'" in capsys.readouterr().err


# ----------------------------------------------------------------------------------------------
# running in two processes


def test_split_run_gives_the_same_bits_and_errors_as_one_process(tmp_path, parts, capsys,
                                                                 monkeypatch):
    front, back = _split_files(tmp_path)
    finite = ["--set", "src.symbols=24000", "--set", "src.realtime=false"]
    host = parts(tmp_path, str(back), *finite)
    board = parts(tmp_path, str(front), *finite)
    split_back = host.summary(timeout=120)
    split_front = board.summary(timeout=30)
    assert split_back["reason"] == split_front["reason"] == "end-of-stream"
    assert set(split_back["blocks"]) == {"cfo", "timing", "det", "ber"}
    assert set(split_front["blocks"]) == {"src", "dec"}
    wire = _link(split_back)
    assert wire["received"] == _link(split_front)["sent"] > 0
    assert wire["gaps"] == wire["restarts"] == wire["rejected"] == 0
    # the same receiver in one process (every part declared: crossings are in-process links)
    monkeypatch.chdir(tmp_path)
    assert main(["run", str(front), "--part", "front,back", "--json", *finite]) == 0
    single = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert single["reason"] == "end-of-stream"
    got = {k: split_back["blocks"]["ber"][k] for k in ("bits", "errors", "sync_losses")}
    want = {k: single["blocks"]["ber"][k] for k in ("bits", "errors", "sync_losses")}
    assert got == want
    assert got["bits"] > 10_000


@pytest.mark.parametrize("binds", ["receiver", "sender"])
def test_a_peer_with_a_wrong_key_is_refused_and_gets_no_samples(tmp_path, parts, binds):
    front, back = _split_files(tmp_path, front={'binds = "receiver"': f'binds = "{binds}"'})
    # the intruder holds a key pair of its own, not one the binding end admits
    intruder = front.read_text().replace('"keys/board.key_secret"', '"keys/intruder.key_secret"')
    (tmp_path / "intruder").mkdir()
    rogue_front = tmp_path / "intruder" / "split-front.toml"
    rogue_front.write_text(intruder)
    shutil.copy(back, tmp_path / "intruder" / "split-back.toml")
    rogue_file = rogue_front if binds == "receiver" else tmp_path / "intruder" / "split-back.toml"
    legit_file = back if binds == "receiver" else front
    legit = parts(tmp_path, str(legit_file))
    rogue = parts(tmp_path, str(rogue_file))
    seen = legit.wait_for(lambda r: _link(r)["refused"] >= 1, 60, "a counted refusal")
    rogue_seen = rogue.wait_for(lambda r: _link(r)["refused"] >= 1, 30,
                                "the refusal seen by the intruder")
    assert _link(seen)["peer_state"] == "waiting"
    receiver = rogue_seen if binds == "sender" else seen
    assert _link(receiver)["received"] == 0
    assert receiver["blocks"]["cfo"]["samples_in"] == receiver["blocks"]["ber"]["samples_in"] == 0
    _, summary = legit.stop_timed()
    assert _link(summary)["received"] == 0 and _link(summary)["sent"] == 0
    assert "refused a peer whose key" in legit.stderr
    assert "refused this end's key" in rogue.stderr


def test_a_restarted_board_is_a_counted_gap_and_the_host_carries_on(tmp_path, parts):
    front, back = _split_files(tmp_path)
    host = parts(tmp_path, str(back))
    board = parts(tmp_path, str(front))
    locked = host.wait_for(lambda r: _locked(r) and _bits(r) > 20_000, 90,
                           "the BER meter locked")
    board.proc.send_signal(signal.SIGKILL)
    board.proc.wait(timeout=10)
    gone = host.wait_for(lambda r: _link(r)["peer_state"] in ("gone", "stale"), 20,
                         "the board shown gone")
    assert _link(gone)["last_seen_s"] is not None
    bits_before = _bits(gone)
    assert bits_before >= _bits(locked)
    board = parts(tmp_path, str(front))
    back_again = host.wait_for(lambda r: _link(r)["restarts"] == 1
                               and r["blocks"]["ber"].get("gaps", 0) >= 1
                               and _bits(r) > bits_before + 20_000, 90,
                               "BER counting again after the restart")
    wire = _link(back_again)
    assert wire["sessions"] == 2 and wire["peer_state"] == "up"
    # an outage of at least the time the board took to start again, at 50 kS/s
    assert wire["samples_missing"] > 50_000 * 0.2
    assert _locked(back_again)
    # SIGTERM of the host with its board gone: out within 1 s
    board.proc.send_signal(signal.SIGKILL)
    board.proc.wait(timeout=10)
    took, summary = host.stop_timed()
    assert summary["reason"] == "stopped"
    assert took < 1.0, f"the host took {took:.2f} s to stop"
    host.proc.wait(timeout=10)
    assert host.proc.returncode == 0


def test_a_silent_peer_is_shown_stale_and_a_board_stops_without_its_host(tmp_path, parts):
    front, back = _split_files(tmp_path)
    host = parts(tmp_path, str(back))
    board = parts(tmp_path, str(front))
    host.wait_for(lambda r: _link(r)["peer_state"] == "up" and _link(r)["received"] > 0, 90,
                  "samples arriving")
    board.proc.send_signal(signal.SIGSTOP)  # frozen: connected but silent
    try:
        stale = host.wait_for(lambda r: _link(r)["peer_state"] == "stale", 20, "stale")
        assert _link(stale)["last_seen_s"] >= 3.0
    finally:
        board.proc.send_signal(signal.SIGCONT)
    host.wait_for(lambda r: _link(r)["peer_state"] == "up", 20, "up again")
    board.wait_for(lambda r: _link(r)["peer_state"] == "up", 20, "the board hears the host")
    host.proc.send_signal(signal.SIGKILL)
    host.proc.wait(timeout=10)
    board.wait_for(lambda r: _link(r)["peer_state"] in ("gone", "stale"), 20, "the host gone")
    took, summary = board.stop_timed()
    assert summary["reason"] == "stopped"
    assert took < 1.0, f"the board took {took:.2f} s to stop"
    board.proc.wait(timeout=10)
    assert board.proc.returncode == 0
