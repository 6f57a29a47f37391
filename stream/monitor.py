"""The monitor: a small HTTP server beside a run, for watching it from another machine.

Three addresses, all read-only:

- ``/metrics``: the Prometheus text exposition format (``stream.metrics``);
- ``/status``: one JSON object, the run's status record plus ``views`` (each meter's bulky
  figures: eye histogram, spectrum, BER history, in full, so a late viewer has the whole picture
  at once), ``host`` (``stream.host``) and ``sources`` (ids of the source blocks, whose
  readings are settings, not measurements);
- ``/``: the page (``stream/monitor_page.html``), self-contained, which polls ``/status``.

The server runs in daemon threads and only reads the runner's published records, so a slow or
stuck viewer never slows the receiver. It has no authentication: it binds to loopback unless
told otherwise, and the run command warns when it is told otherwise.
"""

from __future__ import annotations

import argparse
import ipaddress
import json
import logging
import socket
import sys
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from typing import Any, TextIO

from stream.block import Source
from stream.host import HostProbe
from stream.metrics import CONTENT_TYPE, RunCollector, exposition
from stream.report import plain
from stream.runner import Runner

__all__ = ["Monitor", "is_loopback", "monitor_argument", "open_monitor", "parse_address",
           "with_views"]

log = logging.getLogger("phasefree.monitor")

_PAGE = "monitor_page.html"
#: The page may talk to its own origin only; everything it needs is inline.
_PAGE_POLICY = ("default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
                "connect-src 'self'; img-src 'self' data:; base-uri 'none'; form-action 'none'")


def parse_address(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[::1]:PORT`` for IPv6; port 0 = any free one) -> (host, port).

    Raises
    ------
    ValueError
        If the text is not of that form or the port is out of range.
    """
    host, sep, port_text = text.rpartition(":")
    if not sep or not host:
        raise ValueError(f"monitor address must be HOST:PORT (got {text!r})")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    try:
        port = int(port_text)
    except ValueError:
        raise ValueError(f"monitor port must be an integer (got {port_text!r})") from None
    if not 0 <= port <= 65535:
        raise ValueError(f"monitor port must be in 0..65535 (got {port})")
    return host, port


def monitor_argument(text: str) -> tuple[str, int]:
    """``--monitor HOST:PORT`` for argparse (a bad address is a usage error)."""
    try:
        return parse_address(text)
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err)) from None


def is_loopback(host: str) -> bool:
    """True if ``host`` is ``localhost`` or a loopback address (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class _Server(ThreadingHTTPServer):
    daemon_threads = True
    monitor: Monitor


class _Server6(_Server):
    address_family = socket.AF_INET6


class _Handler(BaseHTTPRequestHandler):
    server: _Server
    server_version = "phasefree-monitor"
    sys_version = ""

    def do_GET(self) -> None:
        self._answer(body=True)

    def do_HEAD(self) -> None:
        self._answer(body=False)

    def _answer(self, body: bool) -> None:
        monitor = self.server.monitor
        path = self.path.split("?", 1)[0]
        try:
            if path == "/metrics":
                self._send(200, CONTENT_TYPE, monitor.metrics(), body)
            elif path == "/status":
                data = json.dumps(plain(monitor.record()), separators=(",", ":"),
                                  allow_nan=False).encode()
                self._send(200, "application/json", data, body)
            elif path in ("/", "/index.html"):
                self._send(200, "text/html; charset=utf-8", monitor.page, body,
                           policy=_PAGE_POLICY)
            else:
                self._send(404, "text/plain; charset=utf-8",
                           b"not found: the monitor serves /, /status and /metrics\n", body)
        except (BrokenPipeError, ConnectionResetError):
            pass  # the viewer went away mid-answer
        except Exception:
            log.exception("monitor: answering %s failed", path)
            self._send(500, "text/plain; charset=utf-8", b"internal error, see the log\n",
                       body)

    def _send(self, code: int, ctype: str, data: bytes, body: bool,
              policy: str | None = None) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(data)))
        self.send_header("Cache-Control", "no-store")
        self.send_header("X-Content-Type-Options", "nosniff")
        if policy:
            self.send_header("Content-Security-Policy", policy)
        self.end_headers()
        if body:
            self.wfile.write(data)

    def log_message(self, format: str, *args: Any) -> None:
        log.debug("%s %s", self.address_string(), format % args)


class Monitor:
    """Serve a runner's figures over HTTP while it runs.

    Parameters
    ----------
    runner : Runner
        The run to watch (read only: ``status()``, ``views()`` and the pipeline's blocks).
    host : str
        Address to bind (``127.0.0.1`` by default; anything else is reachable by others).
    port : int
        Port to bind; 0 picks a free one (see :attr:`address`).
    probe : HostProbe or None
        Reads the host figures (default: a probe of this machine).

    Examples
    --------
    >>> with Monitor(runner, "127.0.0.1", 0) as mon:   # doctest: +SKIP
    ...     print(mon.url)
    ...     runner.run(seconds=10)
    """

    def __init__(self, runner: Runner, host: str = "127.0.0.1", port: int = 0,
                 probe: HostProbe | None = None) -> None:
        self.runner = runner
        self.probe = probe or HostProbe()
        self.page = resources.files("stream").joinpath(_PAGE).read_bytes()
        sources = _source_ids(runner)
        self.metrics = exposition(RunCollector(self.status, sources))
        family = socket.AF_INET6 if ":" in host else socket.AF_INET
        server_class = _Server6 if family == socket.AF_INET6 else _Server
        try:
            self._server = server_class((host, port), _Handler)
        except OSError as err:
            raise OSError(err.errno, f"monitor cannot listen on {host}:{port}: "
                                     f"{err.strerror}") from err
        self._server.monitor = self
        self._thread: threading.Thread | None = None

    @property
    def address(self) -> tuple[str, int]:
        """The bound (host, port); the port is the real one when 0 was asked for."""
        host, port = self._server.server_address[:2]
        return str(host), int(port)

    @property
    def url(self) -> str:
        """The page's address, e.g. ``http://127.0.0.1:8470/``."""
        host, port = self.address
        return f"http://[{host}]:{port}/" if ":" in host else f"http://{host}:{port}/"

    @property
    def loopback(self) -> bool:
        """True when only this machine can reach the monitor."""
        return is_loopback(self.address[0])

    def status(self) -> dict[str, Any]:
        """The runner's status record with the host figures added (for ``/metrics``)."""
        record = _status_of(self.runner)
        record["host"] = self.probe.read()
        return record

    def record(self) -> dict[str, Any]:
        """What ``/status`` serves: :meth:`status`, the source ids and every meter's ``views``."""
        return with_views(self.runner, self.status())

    def start(self) -> Monitor:
        """Start serving in a daemon thread; returns self."""
        if self._thread is None:
            self._thread = threading.Thread(target=self._server.serve_forever,
                                            kwargs={"poll_interval": 0.2},
                                            name="monitor", daemon=True)
            self._thread.start()
        return self

    def stop(self) -> None:
        """Stop serving and close the listening socket (idempotent)."""
        if self._thread is not None:
            self._server.shutdown()
            self._thread.join(5.0)
            self._thread = None
        self._server.server_close()

    def __enter__(self) -> Monitor:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def _status_of(runner: Runner) -> dict[str, Any]:
    """``runner.status()``, retried if the runner was still wiring its links (start-up race)."""
    for _ in range(3):
        try:
            return runner.status()
        except RuntimeError:  # a dict grew while it was being read, during the run's start
            continue
    return runner.status()


def _source_ids(runner: Runner) -> list[str]:
    return sorted(bid for bid, b in runner.pipeline.blocks.items() if isinstance(b, Source))


def with_views(runner: Runner, record: dict[str, Any]) -> dict[str, Any]:
    """``record`` (a status or summary) with ``sources`` and the meters' ``views`` added."""
    record["sources"] = _source_ids(runner)
    record["views"] = runner.views()
    return record


def open_monitor(runner: Runner, address: tuple[str, int], probe: HostProbe | None = None,
                 err: TextIO | None = None) -> Monitor | None:
    """Start a monitor for the run command; print its address (or why it failed) to ``err``.

    A bind to anything but loopback prints a warning: the monitor has no authentication.
    Returns None if it cannot listen (the address is taken or not on this machine).
    """
    err = err or sys.stderr
    try:
        monitor = Monitor(runner, *address, probe=probe)
    except OSError as failure:
        print(f"phasefree: {failure.strerror}", file=err)
        return None
    if not monitor.loopback:
        print(f"phasefree: warning: the monitor listens on {address[0]}, reachable from other "
              "machines, and has no authentication: anyone who can reach it can read the "
              "page, /status and /metrics", file=err)
    print(f"monitor: {monitor.url}", file=err, flush=True)
    return monitor.start()
