"""Tests for the monitor (stream/monitor.py, stream/metrics.py) and the run's --monitor option.

The exposition is checked with the Prometheus client library's own text parser
(``prometheus_client.parser.text_string_to_metric_families``), the reference reader of the
Prometheus text exposition format, not with a parser of this project. Counter families must
carry the ``_total`` suffix and gauges none, as that format's conventions say (Prometheus
documentation, "Metric and label naming"). Every request goes to 127.0.0.1.
"""

from __future__ import annotations

import io
import json
import math
import os
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from stream.host import HostProbe
from stream.loader import pipeline_from_dict
from stream.metrics import RunCollector, exposition
from stream.monitor import Monitor, is_loopback, open_monitor, parse_address
from stream.report import LiveView
from stream.runner import Runner
from tests.stream.monitored import REPO, MonitoredRun, samples, value, wait_for

STATUS = {
    "event": "status", "pipeline": "shed-gateway", "seconds": 12.5,
    "blocks": {
        "src": {"kind": "sim", "ebn0_db": 9.0, "modulation": "2fsk", "samples_in": 0,
                "samples_out": 1000, "chunks_in": 0, "chunks_out": 4, "busy_s": 0.5,
                "busy": 0.04},
        "ber": {"kind": "ber", "bits": 5000, "errors": 7, "ber": 0.0014, "ber_low": 0.0005,
                "ber_high": 0.0029, "locked": 1, "pattern": "prbs15", "samples_in": 5000,
                "samples_out": 0, "chunks_in": 9, "chunks_out": 0, "busy_s": 0.1, "busy": 0.01},
        "snr": {"kind": "snr", "ebn0_db": 8.7, "esn0_db": 8.7, "noise_power": float("nan"),
                "samples_in": 800, "samples_out": 0, "chunks_in": 3, "chunks_out": 0,
                "busy_s": 0.0, "busy": 0.0},
    },
    "links": {"src.out -> ber.in": {"label": "src.out -> ber.in", "tap": False, "sent": 9,
                                    "received": 9, "dropped": 0, "gaps": 1, "rejected": 2,
                                    "depth": 3}},
    "host": {"cpus": 4, "load_1m": 0.5, "load_5m": 0.4, "load_15m": 0.3, "cpu_busy": 0.25,
             "temperatures_c": {"cpu-thermal": 51.5},
             "slowdown": {"word": 0x50005, "under_voltage": True, "slowed": True,
                          "frequency_capped": False}},
}


def _exposed(status: dict) -> tuple[str, dict]:
    text = exposition(RunCollector(lambda: status, {"src"}), process=False)().decode()
    return text, samples(text)


# -- the exposition, from a known status record ------------------------------------------------
def test_exposition_parses_and_has_every_family():
    text, parsed = _exposed(STATUS)
    types = {f.name: f.type for f in text_string_to_metric_families(text)}
    assert all(name.startswith("phasefree_") for name in types)
    # counters: the parser names the family without _total, the samples carry it
    for family in ("phasefree_bits", "phasefree_bit_errors", "phasefree_block_samples_in",
                   "phasefree_link_dropped", "phasefree_link_gaps"):
        assert types[family] == "counter"
    for family in ("phasefree_ber", "phasefree_ebn0_db_estimate", "phasefree_link_depth",
                   "phasefree_block_busy_ratio", "phasefree_host_temperature_celsius"):
        assert types[family] == "gauge"
    assert value(parsed, "phasefree_ber", block="ber") == 0.0014
    assert value(parsed, "phasefree_ber_lower", block="ber") == 0.0005
    assert value(parsed, "phasefree_ber_upper", block="ber") == 0.0029
    assert value(parsed, "phasefree_bits_total", block="ber") == 5000
    assert value(parsed, "phasefree_bit_errors_total", block="ber") == 7
    assert value(parsed, "phasefree_block_samples_in_total", block="ber", kind="ber") == 5000
    assert value(parsed, "phasefree_block_busy_seconds_total", block="src") == 0.5
    assert value(parsed, "phasefree_link_gaps_total", link="src.out -> ber.in") == 1
    assert value(parsed, "phasefree_link_rejected_total", link="src.out -> ber.in") == 2
    assert value(parsed, "phasefree_link_depth", link="src.out -> ber.in", tap="false") == 3
    assert value(parsed, "phasefree_run_seconds", pipeline="shed-gateway") == 12.5


def test_a_sources_setting_is_not_reported_as_an_estimate():
    _, parsed = _exposed(STATUS)
    assert value(parsed, "phasefree_ebn0_db_estimate", block="snr") == 8.7
    assert value(parsed, "phasefree_ebn0_db_estimate", block="src") is None
    assert value(parsed, "phasefree_reading", block="src", name="ebn0_db") == 9.0


def test_other_readings_are_generic_and_strings_are_left_out():
    _, parsed = _exposed(STATUS)
    assert value(parsed, "phasefree_reading", block="ber", name="locked") == 1
    assert math.isnan(value(parsed, "phasefree_reading", block="snr", name="noise_power"))
    names = {lab["name"] for lab, _ in parsed["phasefree_reading"]}
    assert "pattern" not in names and "modulation" not in names


def test_host_figures_are_exposed_and_absent_ones_left_out():
    _, parsed = _exposed(STATUS)
    assert value(parsed, "phasefree_host_cpus") == 4
    assert value(parsed, "phasefree_host_load_average", window="15m") == 0.3
    assert value(parsed, "phasefree_host_cpu_busy_ratio") == 0.25
    assert value(parsed, "phasefree_host_temperature_celsius", zone="cpu-thermal") == 51.5
    assert value(parsed, "phasefree_host_slowdown", condition="under_voltage") == 1
    assert value(parsed, "phasefree_host_slowdown", condition="frequency_capped") == 0
    bare = {**STATUS, "host": {}}
    _, parsed = _exposed(bare)
    assert not any(name.startswith("phasefree_host_") for name in parsed)


def test_process_collector_is_prefixed():
    text = exposition(RunCollector(lambda: STATUS))().decode()
    parsed = samples(text)
    assert parsed["phasefree_process_resident_memory_bytes"][0][1] > 0


# -- addresses --------------------------------------------------------------------------------
@pytest.mark.parametrize(("text", "expected"), [
    ("127.0.0.1:8470", ("127.0.0.1", 8470)), ("localhost:0", ("localhost", 0)),
    ("[::1]:9000", ("::1", 9000)), ("0.0.0.0:80", ("0.0.0.0", 80)),
])
def test_parse_address(text, expected):
    assert parse_address(text) == expected


@pytest.mark.parametrize(("text", "message"), [
    ("8470", "HOST:PORT"), (":8470", "HOST:PORT"), ("127.0.0.1:http", "integer"),
    ("127.0.0.1:70000", "0..65535"),
])
def test_parse_address_errors(text, message):
    with pytest.raises(ValueError, match=message):
        parse_address(text)


def test_loopback_addresses():
    # 127.0.0.0/8 and ::1 are loopback (RFC 1122 section 3.2.1.3, RFC 4291 section 2.5.3)
    assert all(map(is_loopback, ("127.0.0.1", "127.3.2.1", "::1", "localhost")))
    assert not any(map(is_loopback, ("0.0.0.0", "192.0.2.7", "::", "example")))


# -- the server in this process ----------------------------------------------------------------
@pytest.fixture
def idle_runner():
    pipe = pipeline_from_dict({"pipeline": {"sample_rate": 48_000, "links": ["src -> end"]},
                               "blocks": {"src": {"kind": "tone", "frequency_hz": 100.0},
                                          "end": {"kind": "discard"}}})
    return Runner(pipe)


def _get(url: str) -> tuple[int, dict, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, dict(r.headers), r.read()
    except urllib.error.HTTPError as err:
        return err.code, dict(err.headers), err.read()


def test_monitor_serves_page_status_and_metrics(idle_runner):
    with Monitor(idle_runner, "127.0.0.1", 0, probe=HostProbe(vcgencmd=False)) as mon:
        host, port = mon.address
        assert host == "127.0.0.1" and port > 0 and mon.loopback
        code, headers, page = _get(mon.url)
        assert code == 200 and headers["Content-Type"].startswith("text/html")
        assert "connect-src 'self'" in headers["Content-Security-Policy"]
        assert b"<canvas" in page
        code, headers, body = _get(mon.url + "status")
        record = json.loads(body)
        assert code == 200 and headers["Content-Type"] == "application/json"
        assert set(record) >= {"blocks", "links", "views", "host", "sources"}
        assert record["sources"] == ["src"]
        code, headers, body = _get(mon.url + "metrics")
        assert code == 200 and headers["Content-Type"].startswith("text/plain; version=0.0.4")
        assert "phasefree_block_samples_in_total" in samples(body.decode())
        code, _, body = _get(mon.url + "nothing-here")
        assert code == 404 and b"/status" in body
    with pytest.raises(OSError):  # stopped: the port no longer answers
        socket.create_connection(("127.0.0.1", port), timeout=2).close()


def test_a_taken_port_is_a_clear_error(idle_runner):
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        err = io.StringIO()
        assert open_monitor(idle_runner, ("127.0.0.1", port), err=err) is None
        assert f"monitor cannot listen on 127.0.0.1:{port}" in err.getvalue()


def test_a_bind_beyond_loopback_warns_there_is_no_authentication(idle_runner, monkeypatch):
    # the bind itself stays on loopback; only the check that decides the warning is forced
    monkeypatch.setattr(Monitor, "loopback", property(lambda self: False))
    err = io.StringIO()
    mon = open_monitor(idle_runner, ("127.0.0.1", 0), err=err)
    try:
        assert "no authentication" in err.getvalue()
        assert f"monitor: {mon.url}" in err.getvalue()
    finally:
        mon.stop()


@pytest.mark.parametrize("address", ["nonsense", "127.0.0.1:99999"])
def test_run_rejects_a_bad_monitor_address(address):
    done = subprocess.run([sys.executable, "-m", "stream.cli", "run", "--monitor", address,
                           "--seconds", "1"], cwd=REPO, capture_output=True, text=True,
                          timeout=60, env={**os.environ, "PYTHONPATH": str(REPO)})
    assert done.returncode == 2
    assert "--monitor" in done.stderr


# -- the whole run ----------------------------------------------------------------------------
def _headline(parsed: dict) -> dict[str, float | None]:
    return {"bits": value(parsed, "phasefree_bits_total", block="ber"),
            "errors": value(parsed, "phasefree_bit_errors_total", block="ber"),
            "ber": value(parsed, "phasefree_ber", block="ber"),
            "ebn0": value(parsed, "phasefree_ebn0_db_estimate", block="snr"),
            "det_in": value(parsed, "phasefree_block_samples_in_total", block="det",
                            kind="fsk_detect"),
            "src_out": value(parsed, "phasefree_block_samples_out_total", block="src",
                             kind="sim")}


def test_run_with_monitor_scraped_twice():
    with MonitoredRun() as run:
        run.wait_ready()
        first = wait_for(lambda: (h := _headline(run.metrics()))["errors"] and
                         h["ebn0"] is not None and h, 60, what="bit errors and an Eb/N0 "
                                                                "estimate on /metrics")
        second = wait_for(lambda: (h := _headline(run.metrics()))["bits"] > first["bits"] and h,
                          30, what="the bit counter to move")
        for name in ("bits", "errors", "det_in", "src_out"):
            assert second[name] >= first[name]
        assert second["src_out"] > first["src_out"] and second["det_in"] > first["det_in"]
        # the simulator is set to 11 dB; the meters' own tests check the estimate's accuracy,
        # here it only has to be a live, sensible figure
        assert 5 < second["ebn0"] < 17
        assert 0 < second["ber"] < 0.01
        record = run.status()
        assert record["blocks"]["ber"]["bits"] >= second["bits"]
        assert {"eye", "spectrum", "ber"} <= set(record["views"])
        assert "load_1m" in record["host"]
        port = run.port
        assert run.stop() == 0
    lines = [json.loads(line) for line in run.stdout]
    assert lines[-1]["event"] == "summary" and lines[-1]["reason"] == "stopped"
    assert all("host" in line for line in lines)
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", port), timeout=2).close()


def _proc_figures(pid: int) -> tuple[int, int, int]:
    """Resident memory (kB), threads and open file descriptors of a process (proc(5))."""
    fields = dict(line.split(":", 1) for line in Path(f"/proc/{pid}/status").read_text()
                  .splitlines() if ":" in line)
    rss_kb = int(fields["VmRSS"].split()[0])
    threads = int(fields["Threads"])
    fds = len(os.listdir(f"/proc/{pid}/fd"))
    return rss_kb, threads, fds


SOAK_S = float(os.environ.get("PHASEFREE_SOAK_S", "600"))
WARM_UP_S = 60.0
RSS_GROWTH_KB = 20 * 1024   # bound on resident memory growth after the warm-up


@pytest.mark.slow
def test_soak_monitor_scraped_every_second():
    """Ten minutes of /metrics and /status every second: memory, threads and fds stay flat.

    After a minute of warm-up (imports, first allocations, the histories filling), resident
    memory may grow by at most 20 MB; the number of threads and of open file descriptors
    (which include every socket) must not grow. Figures are read from /proc (proc(5)).
    """
    with MonitoredRun(seconds=SOAK_S + 120) as run:
        run.wait_ready()
        pid = run.proc.pid
        start = time.monotonic()
        early: list[tuple[int, int, int]] = []
        late: list[tuple[int, int, int]] = []
        while (elapsed := time.monotonic() - start) < SOAK_S:
            tick = time.monotonic()
            assert "phasefree_block_samples_in_total" in run.metrics()
            assert run.status()["event"] == "status"
            figures = _proc_figures(pid)
            if WARM_UP_S <= elapsed < WARM_UP_S + 30:
                early.append(figures)
            elif elapsed >= SOAK_S - 30:
                late.append(figures)
            time.sleep(max(0.0, 1.0 - (time.monotonic() - tick)))
        assert early and late
        rss_early = sorted(f[0] for f in early)[len(early) // 2]
        rss_late = sorted(f[0] for f in late)[len(late) // 2]
        assert rss_late - rss_early < RSS_GROWTH_KB, (rss_early, rss_late)
        assert max(f[1] for f in late) <= max(f[1] for f in early), (early, late)
        assert max(f[2] for f in late) <= max(f[2] for f in early), (early, late)
        assert run.stop() == 0


# -- the terminal view ------------------------------------------------------------------------
def test_live_view_headline_shows_ber_estimate_packets_and_host():
    status = json.loads(json.dumps(STATUS))
    status["blocks"]["frames"] = {"kind": "deframe", "packets": 12, "crc_failures": 1,
                                  "samples_in": 900, "samples_out": 0, "chunks_in": 2,
                                  "chunks_out": 0, "busy_s": 0.0, "busy": 0.0}
    out = io.StringIO()
    LiveView(out).draw(status)
    lines = out.getvalue().split("\n")
    headline = lines[1]
    assert "BER 1.40e-03 [5.00e-04, 2.90e-03] over 5000 bits" in headline
    assert "Eb/N0 8.7 dB (estimate)" in headline        # the snr meter's, not the source's 9.0
    assert "packets 12, 1 CRC failures" in headline
    assert "load 0.50" in headline and "52 °C" in headline and "board slowed" in headline
    assert any(line.removeprefix("\x1b[2K").startswith("ber ") for line in lines)
