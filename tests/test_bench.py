"""Smoke test of the benchmark: it runs end to end and reports every figure.

Only the shape of the report is checked (keys, positive finite numbers): speed targets are
judged by reading the benchmark's output, never by a timed test.
"""

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SCHEMES = ("ook", "2fsk", "dbpsk", "dqpsk")
KERNELS = ("mixer", "decimate", "cfo", "matched_filter", "timing_envelope", "timing_tones",
           "energy_detect", "fsk_detect", "dbpsk_detect", "dqpsk_detect", "framer", "ber")


def positive(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) \
        and math.isfinite(value) and value > 0


@pytest.mark.slow
def test_bench_quick_json_reports_every_figure():
    env = dict(os.environ, PHASEFREE_BENCH_TINY="1")
    done = subprocess.run([sys.executable, str(ROOT / "tools" / "bench.py"), "--quick", "--json"],
                          capture_output=True, text=True, timeout=300, env=env, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["size"] == "tiny"
    assert set(result["receivers"]) == set(SCHEMES)
    for scheme in SCHEMES:
        assert set(result["receivers"][scheme]) == {"4096", "16384", "65536"}
        assert all(positive(v) for v in result["receivers"][scheme].values())
        assert positive(result["references"][scheme])
        assert positive(result["receivers_equal"][scheme])
        assert positive(result["overhead"][scheme])
        assert 0 < result["observed"][scheme] <= 1
        assert positive(result["start_stop_ms"][scheme])
    assert set(KERNELS) <= set(result["kernels"])
    assert all(positive(v) for v in result["kernels"].values())
    assert set(result["links"]) == {"inproc", "ipc", "tcp"}
    assert all(positive(v) for v in result["links"].values())
    for key in ("processes", "peak_rss_mb", "rss_growth", "latency_ms"):
        assert positive(result[key]), key
    split = result["process_msps"]
    assert "src" in split["front"] and not set(split["front"]) & set(split["back"])
    assert all(positive(split[k]) for k in ("one", "two", "one_all_cores"))


def test_bench_table_names_the_targets():
    sys.path.insert(0, str(ROOT / "tools"))
    try:
        import bench
    finally:
        sys.path.remove(str(ROOT / "tools"))
    figures = {s: {"4096": 1.0, "16384": 2.0, "65536": 40.0} for s in SCHEMES}
    result = {
        "receivers": figures, "references": dict.fromkeys(SCHEMES, 42.0),
        "receivers_equal": dict.fromkeys(SCHEMES, 38.0),
        "observed": dict.fromkeys(SCHEMES, 0.37),
        "overhead": dict.fromkeys(SCHEMES, 38 / 42),
        "realtime_margin": dict.fromkeys(SCHEMES, 40 / 2.4),
        "start_stop_ms": dict.fromkeys(SCHEMES, 12.0),
        "kernels": {"decimate": 100.0}, "links": {"inproc": 0.8}, "link_msps": {"inproc": 300.0},
        "processes": 1.6, "process_msps": {"one": 10.0, "two": 16.0, "one_all_cores": 7.0,
                                           "scheme": "ook", "cut": "cfo -> mf"},
        "peak_rss_mb": 150.0, "rss_growth": 1.01, "latency_ms": 2.5,
    }
    text = bench.table(result)
    assert "ook" in text and "0.90" in text and "16.7" in text and "0.37" in text
    assert "1.60x" in text and "150.0 MB" in text and "cut at cfo -> mf" in text
    assert "ook 12 ms" in text
