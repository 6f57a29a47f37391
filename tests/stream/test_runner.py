"""Tests for the threaded runner (stream/runner.py): conservation, taps, end of stream, stops.

The reference signal is the ``tone`` source run by hand, block by block, outside the runtime:
what the runtime delivers through its threads and links must be the same bytes. Gains of
exactly x2 and x0.5 (+-20*log10(2) dB) are exact in binary floating point (IEEE 754: scaling by
a power of two changes only the exponent), so a chain of them must reproduce its input bit for
bit. Nothing here asserts on speed; waits are conditions checked from the status hook, each
run bounded by ``seconds=`` so a broken runtime fails the test instead of hanging it.
"""

from __future__ import annotations

import math
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from blocks.basic import Discard, ToneSource
from stream.graph import Pipeline
from stream.loader import pipeline_from_dict
from stream.runner import Runner
from tests.stream import kinds
from tests.stream.kinds import Probe, Slow

RATE = 48_000.0
LIMIT_S = 20.0                 # a safety net only: a healthy run ends long before
TWICE_DB = 20 * math.log10(2)  # gain of exactly 2.0 once rounded to float32
ITEMSIZE = {"complex64": 8, "float32": 4}


def _tone(**params: Any) -> dict[str, Any]:
    return {"kind": "tone", "frequency_hz": 1234.5, "noise_power": 0.25, "seed": 11, **params}


def _tone_samples(count: int, **params: Any) -> np.ndarray:
    """The tone source's first ``count`` samples, produced directly (no runtime)."""
    params = {k: v for k, v in _tone(**params).items() if k != "kind"}
    src = ToneSource("reference", sample_rate=RATE, **params)
    src.configure({})
    pieces: list[np.ndarray] = []
    total = 0
    while total < count and src.produce():
        for _, chunk in src.take_output():
            pieces.append(chunk.samples)
            total += len(chunk)
    return np.concatenate(pieces)[:count]


def _pipeline(blocks: dict[str, dict[str, Any]], links: list[str]) -> Pipeline:
    return pipeline_from_dict({"pipeline": {"sample_rate": RATE, "links": links},
                               "blocks": blocks})


def _record(path: Path) -> dict[str, Any]:
    return {"kind": "record", "path": str(path), "format": "raw"}


def _recorded(path: Path, dtype: str = "complex64") -> np.ndarray:
    return np.fromfile(path, dtype=np.dtype(dtype).newbyteorder("<"))


def _check_lossless(summary: dict[str, Any]) -> None:
    for label, link in summary["links"].items():
        if not link["tap"]:
            assert (link["dropped"], link["gaps"], link["rejected"]) == (0, 0, 0), label
            assert link["received"] == link["sent"], label


@pytest.mark.parametrize("dtype", ["complex64", "float32"])
def test_samples_are_conserved_through_a_chain_with_a_slow_last_block(tmp_path, dtype):
    n, chunk = 40_009, 997                    # odd sizes: the last chunk is a short one
    rec = tmp_path / "chain.raw"
    pipe = _pipeline(
        {"src": _tone(samples=n, chunk_size=chunk, dtype=dtype),
         "g1": {"kind": "gain"}, "g2": {"kind": "gain", "gain_db": TWICE_DB},
         "g3": {"kind": "gain"}, "g4": {"kind": "gain", "gain_db": -TWICE_DB},
         "slow": {"kind": Slow.kind, "delay_s": 0.004},
         "rec": _record(rec)},
        ["src -> g1 -> g2 -> g3 -> g4 -> slow -> rec"])
    summary = Runner(pipe, queue_depth=2).run(seconds=LIMIT_S)

    assert summary["reason"] == "end-of-stream"
    expected = _tone_samples(n, samples=n, chunk_size=chunk, dtype=dtype)
    assert rec.read_bytes() == expected.astype(expected.dtype.newbyteorder("<")).tobytes()
    assert rec.stat().st_size == n * ITEMSIZE[dtype]
    for bid in ("g1", "g2", "g3", "g4", "slow", "rec"):
        assert summary["blocks"][bid]["samples_in"] == n, bid
    assert summary["blocks"]["src"]["chunks_out"] == math.ceil(n / chunk)
    assert summary["blocks"]["rec"]["samples_written"] == n
    _check_lossless(summary)


def test_slow_tap_drops_and_counts_and_never_holds_up_the_chain(tmp_path):
    n, chunk = 60_000, 499
    rec = tmp_path / "main.raw"
    gate = kinds.gate("tap-observer")
    # the tap is listed first, so its end of stream would be sent first if order mattered
    pipe = _pipeline(
        {"src": _tone(samples=n, chunk_size=chunk),
         "g1": {"kind": "gain"}, "g2": {"kind": "gain"}, "g3": {"kind": "gain"},
         "probe": {"kind": Probe.kind},
         "rec": _record(rec),
         "obs": {"kind": kinds.Hold.kind, "gate": "tap-observer", "hold_s": 10.0}},
        ["src ~> obs", "src -> g1 -> g2 -> g3 -> probe -> rec"])

    def release_when_chain_ended(status: dict[str, Any]) -> None:
        # the observer is stuck on its first chunk until the whole lossless chain has ended
        if status["blocks"]["probe"].get("finished"):
            gate.set()

    summary = Runner(pipe, queue_depth=2).run(seconds=LIMIT_S,
                                              on_status=release_when_chain_ended,
                                              status_interval=0.01)

    assert summary["reason"] == "end-of-stream"
    obs = summary["blocks"]["obs"]
    assert obs["timed_out"] == 0, "the chain did not end while the observer was stuck"
    produced = summary["blocks"]["src"]["chunks_out"]
    assert produced == math.ceil(n / chunk)
    assert 0 < obs["chunks"] < produced
    tap = summary["links"]["src.out ~> obs.in"]
    assert tap["dropped"] > 0
    assert tap["sent"] + tap["dropped"] == produced + 1       # + 1: the end-of-stream message
    assert tap["received"] == tap["sent"] == obs["chunks"] + 1
    assert tap["gaps"] == tap["dropped"]                      # the observer sees the loss too
    # the lossless sink got every sample, unchanged
    np.testing.assert_array_equal(_recorded(rec), _tone_samples(n, samples=n, chunk_size=chunk))
    _check_lossless(summary)


def test_end_of_stream_reaches_every_block_across_fan_out_and_join(tmp_path):
    n, chunk = 20_001, 1_003
    rec = tmp_path / "joined.raw"
    pipe = _pipeline(
        {"src": _tone(samples=n, chunk_size=chunk),
         "g1": {"kind": "gain"}, "g2": {"kind": "gain"},
         "slow": {"kind": Slow.kind, "delay_s": 0.002},
         "join": {"kind": kinds.Join.kind},
         "probe": {"kind": Probe.kind},
         "rec": _record(rec),
         "obs": {"kind": "discard", "delay_s": 0.001}},
        ["src -> g1 -> join.a", "src -> g2 -> slow -> join.b", "join -> probe -> rec",
         "g2 ~> obs"])
    summary = Runner(pipe, queue_depth=2).run(seconds=LIMIT_S)

    assert summary["reason"] == "end-of-stream"
    blocks = summary["blocks"]
    assert (blocks["join"]["a"], blocks["join"]["b"], blocks["join"]["finished"]) == (n, n, 1)
    assert (blocks["probe"]["seen"], blocks["probe"]["breaks"], blocks["probe"]["finished"]) \
        == (n, 0, 1)
    assert rec.stat().st_size == n * 8
    for label, link in summary["links"].items():
        # every link, taps included, delivered its end-of-stream message last
        assert link["received"] == link["sent"], label
    _check_lossless(summary)


def test_a_failing_block_stops_the_run_with_its_id(tmp_path):
    rec = tmp_path / "partial.raw"
    pipe = _pipeline(
        {"src": _tone(chunk_size=512),      # endless: only the failure can end this run
         "g": {"kind": "gain"}, "bad": {"kind": kinds.Fail.kind, "after": 3},
         "rec": _record(rec)},
        ["src -> g -> bad -> rec"])
    runner = Runner(pipe)
    summary = runner.run(seconds=LIMIT_S)

    assert summary["reason"] == "error"
    assert summary["error"]["block"] == "bad"
    assert summary["error"]["type"] == "RuntimeError"
    assert "deliberate failure on chunk 3" in summary["error"]["message"]
    assert runner.failure is not None and runner.failure.block_id == "bad"
    assert summary["blocks"]["bad"]["chunks_in"] == 4
    assert rec.stat().st_size % 8 == 0       # the sink still closed a well-formed file


def test_stop_from_another_thread_ends_an_endless_run_cleanly(tmp_path):
    rec = tmp_path / "stopped.raw"
    chunk = 4_095
    pipe = _pipeline(
        {"src": _tone(chunk_size=chunk), "g": {"kind": "gain"},
         "rec": _record(rec)},
        ["src -> g -> rec"])
    runner = Runner(pipe, drain_s=LIMIT_S)
    timer = threading.Timer(0.3, runner.stop)
    timer.start()
    try:
        summary = runner.run(seconds=LIMIT_S)
    finally:
        timer.cancel()

    assert summary["reason"] == "stopped"
    size = rec.stat().st_size
    assert size > 0 and size % 8 == 0
    written = size // 8
    # a clean stop drains: everything the source produced is in the file, in order
    assert written == summary["blocks"]["src"]["samples_out"]
    assert written == summary["blocks"]["rec"]["samples_written"]
    np.testing.assert_array_equal(_recorded(rec), _tone_samples(written, chunk_size=chunk))
    _check_lossless(summary)


def test_run_with_a_time_limit_ends_with_reason_time_limit(tmp_path):
    pipe = _pipeline({"src": _tone(chunk_size=2_048, realtime=True), "sink": {"kind": "discard"}},
                     ["src -> sink"])
    summary = Runner(pipe).run(seconds=0.3)
    assert summary["reason"] == "time-limit"
    assert summary["seconds"] >= 0.3
    assert summary["blocks"]["sink"]["samples_in"] == summary["blocks"]["src"]["samples_out"] > 0


def test_backpressure_keeps_every_link_within_its_bound():
    depth, chunk, count = 3, 256, 200
    # queue_depth chunks at each end of a link; depth counts the one message a consumer has
    # taken off its socket but not yet counted as received, so it may read one more
    bound = 2 * depth + 1
    pipe = Pipeline("backpressure", queue_depth=depth)   # the runner takes it from here
    pipe.add(ToneSource("src", sample_rate=RATE, samples=count * chunk, chunk_size=chunk))
    pipe.add(Probe("probe"))
    pipe.add(Slow("slow", delay_s=0.003))
    pipe.add(Discard("sink"))
    pipe.add(Discard("obs", delay_s=0.01))
    pipe.connect("src", "probe")
    pipe.connect("probe", "slow")
    pipe.connect("slow", "sink")
    pipe.connect("probe", "obs", tap=True)
    deepest: dict[str, int] = {}
    ahead: list[int] = []

    def sample(status: dict[str, Any]) -> None:
        for label, link in status["links"].items():
            deepest[label] = max(deepest.get(label, 0), link["depth"])
        blocks = status["blocks"]
        ahead.append(blocks["src"]["samples_out"] - blocks["sink"]["samples_in"])

    runner = Runner(pipe)
    assert runner.queue_depth == depth
    summary = runner.run(seconds=LIMIT_S, on_status=sample, status_interval=0.005)

    assert summary["reason"] == "end-of-stream"
    assert summary["blocks"]["sink"]["samples_in"] == count * chunk
    assert len(ahead) >= 5, "the status hook was hardly called"
    assert set(deepest) == set(summary["links"])
    assert all(0 <= d <= bound for d in deepest.values()), deepest
    assert deepest["probe.out -> slow.in"] >= 1      # the slow consumer did build a queue
    # the source is held back: in flight at most one chunk per link end and per block
    in_flight = 3 * 2 * depth + 3
    assert max(ahead) <= in_flight * chunk
    assert summary["links"]["probe.out ~> obs.in"]["dropped"] > 0
    _check_lossless(summary)
