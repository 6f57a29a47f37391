"""Browser test of the monitor page (stream/monitor_page.html) in headless Chromium.

Chromium loads ``/`` from a live run of the shipped 2-FSK loopback, runs the page's script for
a few seconds of virtual time (``--virtual-time-budget``) and dumps the resulting DOM
(``--dump-dom``). The page publishes what it drew in data attributes: ``data-updates`` (polls
of ``/status`` rendered), each canvas's ``data-inked`` (pixels of its plot area that the data
coloured, from ``getImageData``), and the BER tile's raw figures. Chromium's own network log
(``--log-net-log``, the NetLog JSON) lists every request the page made.

The host resolver is mapped so no name but 127.0.0.1 resolves: neither the page nor the
browser's background services can reach beyond this machine.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from tests.stream.monitored import MonitoredRun, wait_for

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (Debian "
                                "package 'chromium'; CI installs it)")

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--disable-default-apps", "--no-default-browser-check",
         "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1")


class _Attributes(HTMLParser):
    """Attributes of every element with an id."""

    def __init__(self) -> None:
        super().__init__()
        self.by_id: dict[str, dict[str, str]] = {}
        self.body: dict[str, str] = {}
        self._text_of: str | None = None
        self.text: dict[str, str] = {}

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        found = {k: v or "" for k, v in attrs}
        if tag == "body":
            self.body = found
        if "id" in found:
            self.by_id[found["id"]] = found
            self._text_of = found["id"]
            self.text.setdefault(found["id"], "")

    def handle_data(self, data: str) -> None:
        if self._text_of is not None:
            self.text[self._text_of] += data

    def handle_endtag(self, tag: str) -> None:
        self._text_of = None


def _browse(url: str, workdir: Path) -> tuple[_Attributes, dict]:
    net_log = workdir / "net-log.json"
    done = subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={workdir / 'profile'}",
                           f"--log-net-log={net_log}", "--virtual-time-budget=6000",
                           "--dump-dom", url], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    dom = _Attributes()
    dom.feed(done.stdout)
    return dom, json.loads(net_log.read_text())


def _page_requests(log: dict, site: str) -> list[str]:
    """URLs of every request made on behalf of a page whose top frame is ``site``."""
    names = {v: k for k, v in log["constants"]["logEventTypes"].items()}
    urls = []
    for event in log["events"]:
        params = event.get("params") or {}
        if names.get(event["type"]) == "URL_REQUEST_START_JOB" and \
                str(params.get("network_isolation_key", "")).split(" ")[0] == site:
            urls.append(params["url"])
    return urls


def _ready(record: dict) -> dict | None:
    """``record`` once it holds an eye, a spectrum, a BER history and some bit errors."""
    views, ber = record.get("views", {}), record["blocks"]["ber"]
    full = (views.get("eye", {}).get("counts") and views.get("spectrum", {}).get("psd_db")
            and views.get("ber", {}).get("history", {}).get("ber") and ber["errors"] > 0)
    return record if full else None


def test_page_draws_live_figures_and_shows_the_status_ber(tmp_path):
    with MonitoredRun() as run:
        url = run.wait_ready()
        page_source = run.get("/").decode()
        before = wait_for(lambda: _ready(run.status()), 60,
                          what="eye, spectrum and BER history in /status")
        dom, log = _browse(url, tmp_path)
        after = run.status()
        assert run.stop() == 0

    # live: several polls of /status rendered in one page load, without reloading
    assert int(dom.body["data-updates"]) >= 3
    seconds = float(dom.body["data-seconds"])
    assert before["seconds"] < seconds <= after["seconds"]

    # the canvases carry drawn data, not only axes (thresholds far below a normal drawing:
    # the eye fills most of its plot area, the spectrum and BER lines a few thousand pixels)
    assert int(dom.by_id["eye"]["data-inked"]) > 5000
    assert int(dom.by_id["spectrum"]["data-inked"]) > 300
    assert int(dom.by_id["ber-history"]["data-inked"]) > 100

    # the BER shown is the meter's figure from /status between the two requests made here
    tile = dom.by_id["ber-value"]
    bits, errors = int(dom.by_id["bits-value"]["data-bits"]), int(
        dom.by_id["bits-value"]["data-errors"])
    lo, hi = before["blocks"]["ber"], after["blocks"]["ber"]
    assert lo["bits"] <= bits <= hi["bits"] and lo["errors"] <= errors <= hi["errors"]
    shown = float(tile["data-value"])
    assert shown == pytest.approx(errors / bits, rel=1e-12)
    assert float(dom.text["ber-value"]) == pytest.approx(shown, rel=5e-3)   # 3 digits shown
    assert hi["ber_low"] <= shown <= hi["ber_high"]
    assert float(dom.by_id["ebn0-value"]["data-value"]) == pytest.approx(
        after["blocks"]["snr"]["ebn0_db"], abs=1.5)

    # nothing from outside the monitor: no absolute address in the source, and every request
    # the page made went to the monitor's own origin
    assert not re.findall(r"(?:https?:)?//[\w.-]+", re.sub(r"<!--.*?-->", "", page_source))
    assert not re.search(r"<script[^>]+src|<link[^>]+stylesheet|@import|url\(", page_source)
    origin = urlsplit(url)
    requests = _page_requests(log, f"{origin.scheme}://{origin.hostname}")
    assert f"{url}status" in requests
    assert all(urlsplit(r).netloc == origin.netloc for r in requests), requests
