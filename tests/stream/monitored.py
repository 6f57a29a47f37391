"""Test helper: ``phasefree run ... --monitor 127.0.0.1:0`` in a subprocess, and its monitor.

The run is paced to wall-clock time (``src.realtime=true``) so it keeps a moderate CPU load,
and bounded by ``--seconds`` so a broken monitor fails the test instead of hanging it. The
bound port is read from the line the run prints on stderr (``monitor: http://HOST:PORT/``).
Every request goes to 127.0.0.1 only.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from collections.abc import Callable
from pathlib import Path
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

REPO = Path(__file__).resolve().parents[2]
CONFIG = "configs/loopback-2fsk.toml"
_MONITOR_LINE = re.compile(r"^monitor: (http://127\.0\.0\.1:(\d+)/)$")


def wait_for(condition: Callable[[], Any], timeout: float, interval: float = 0.2,
             what: str = "condition") -> Any:
    """Poll ``condition`` until it returns something truthy; fail after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(interval)


def samples(text: str) -> dict[str, list[tuple[dict[str, str], float]]]:
    """Exposition text parsed by the Prometheus client's own parser: sample name -> samples."""
    out: dict[str, list[tuple[dict[str, str], float]]] = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out.setdefault(s.name, []).append((dict(s.labels), s.value))
    return out


def value(parsed: dict[str, list], sample: str, /, **labels: str) -> float | None:
    """The value of the one sample named ``sample`` whose labels include ``labels``."""
    hits = [v for lab, v in parsed.get(sample, []) if all(lab.get(k) == x
                                                          for k, x in labels.items())]
    return hits[0] if len(hits) == 1 else None


class MonitoredRun:
    """A pipeline run with its monitor, as a context manager that always stops the process."""

    def __init__(self, *extra: str, config: str = CONFIG, seconds: float = 120.0) -> None:
        cmd = [sys.executable, "-m", "stream.cli", "run", config, "--monitor", "127.0.0.1:0",
               "--json", "--set", "src.realtime=true", "--seconds", str(seconds), *extra]
        env = {**os.environ, "PYTHONPATH": str(REPO)}
        self.proc = subprocess.Popen(cmd, cwd=REPO, env=env, stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True)
        self.stdout: list[str] = []
        self.stderr: list[str] = []
        self.url: str | None = None
        self.port: int | None = None
        self._ready = threading.Event()
        self._readers = [threading.Thread(target=self._read, args=(self.proc.stdout, False),
                                          daemon=True),
                         threading.Thread(target=self._read, args=(self.proc.stderr, True),
                                          daemon=True)]
        for t in self._readers:
            t.start()

    def _read(self, stream, is_err: bool) -> None:
        for line in stream:
            line = line.rstrip("\n")
            (self.stderr if is_err else self.stdout).append(line)
            match = _MONITOR_LINE.match(line) if is_err else None
            if match:
                self.url, self.port = match.group(1), int(match.group(2))
                self._ready.set()
        self._ready.set()

    def wait_ready(self, timeout: float = 60.0) -> str:
        """The page's address once the monitor listens."""
        self._ready.wait(timeout)
        if self.url is None:
            raise AssertionError("the run printed no monitor address; stderr:\n"
                                 + "\n".join(self.stderr))
        return self.url

    def get(self, path: str, timeout: float = 10.0) -> bytes:
        with urllib.request.urlopen(f"{self.url}{path.lstrip('/')}", timeout=timeout) as r:
            return r.read()

    def metrics(self) -> dict[str, list]:
        return samples(self.get("metrics").decode())

    def status(self) -> dict[str, Any]:
        return json.loads(self.get("status"))

    def stop(self, timeout: float = 30.0) -> int:
        """Ask for a clean stop (SIGINT, as Ctrl-C) and wait for the exit status."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
        try:
            code = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(10)
            raise AssertionError("the run did not stop within 30 s of SIGINT") from None
        for t in self._readers:
            t.join(5)
        return code

    def __enter__(self) -> MonitoredRun:
        return self

    def __exit__(self, *exc: object) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)
