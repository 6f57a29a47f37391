"""Tests for the ``radio`` source (blocks/radio.py) and its continuity kernel (_continuity.py).

The source runs against the scripted device of ``tests/fake_radio.py``: the signal on the air
is known sample by sample, so every check is exact. The strongest one: whatever went wrong,
each emitted chunk equals the air at ``first kept sample + chunk.start``, i.e. the stream
position skipped by exactly the samples lost. Return codes and flags are SoapySDR's (checked
against the installed module when there is one). The receive chain check uses the project's
2-FSK receiver and the ITU-T O.150 PRBS15 BER meter.
"""

from __future__ import annotations

import itertools
import json
import os
import signal
import subprocess
import sys
import threading
import time
import tomllib
import types
from pathlib import Path

import numpy as np
import pytest

import blocks.radio as radio
from blocks import _continuity as cont
from blocks.radio import RadioSource, RadioUnavailable
from blocks.simulator import SimSource
from stream.chunk import Chunk
from stream.errors import ParamError, PipelineError
from stream.loader import pipeline_from_dict
from tests.fake_radio import FakeAir, FakeFactory

ROOT = Path(__file__).resolve().parents[2]
RATE = 100_000.0
MTU = 1000
SETTLE = 1000             # settle_s = 0.01 at RATE
SIM = {"modulation": "2fsk", "symbol_rate": 9_600, "deviation_hz": 4_800, "ebn0_db": 11.0,
       "seed": 3}


def soapysdr_importable() -> bool:
    try:
        import SoapySDR  # noqa: F401
    except ImportError:
        return False
    return True


def noise_air(n: int = 200_000, seed: int = 1) -> FakeAir:
    rng = np.random.default_rng(seed)
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64) * 0.3
    return FakeAir(x, RATE)


def make_radio(monkeypatch, factory: FakeFactory, **params) -> RadioSource:
    monkeypatch.setattr(radio, "open_device", factory)
    monkeypatch.setattr(radio, "wall_clock", factory.air.clock)
    monkeypatch.setattr(radio, "reopen_delay_s", lambda attempt: 0.01)
    values = {"frequency_hz": 868.3e6, "sample_rate": RATE, "chunk_size": 4000,
              "settle_s": SETTLE / RATE, **params}
    block = RadioSource("src", **values)
    block.configure({})
    return block


def pump(block: RadioSource, produces: int) -> list[Chunk]:
    chunks = []
    for _ in range(produces):
        assert block.produce()
        chunks.extend(chunk for _, chunk in block.take_output())
    return chunks


def gaps(chunks: list[Chunk]) -> list:
    return [a for c in chunks for a in c.annotations if a.label == "gap"]


def assert_is_the_air(chunks: list[Chunk], air: FakeAir, first: int = SETTLE) -> None:
    """Every chunk is the air at ``first + start``: positions skip exactly what was lost."""
    assert chunks
    for c in chunks:
        assert c.samples.dtype == np.complex64
        np.testing.assert_array_equal(c.samples, air.samples[first + c.start:first + c.stop],
                                      err_msg=f"chunk at {c.start}")
    for a, b in itertools.pairwise(chunks):
        assert b.start >= a.stop


# -- the kernel -------------------------------------------------------------------------------
def test_codes_are_soapysdr_values():
    # SoapySDR Errors.h / Constants.h (API 0.8); compared with the module when installed
    assert (cont.TIMEOUT, cont.STREAM_ERROR, cont.CORRUPTION, cont.OVERFLOW) == (-1, -2, -3, -4)
    assert (cont.HAS_TIME, cont.END_BURST) == (4, 2)
    if soapysdr_importable():
        import SoapySDR

        for name in ("TIMEOUT", "STREAM_ERROR", "CORRUPTION", "OVERFLOW", "NOT_SUPPORTED",
                     "TIME_ERROR", "UNDERFLOW", "HAS_TIME", "END_BURST"):
            assert getattr(cont, name) == getattr(SoapySDR, f"SOAPY_SDR_{name}"), name
        assert radio._RX == SoapySDR.SOAPY_SDR_RX


def test_time_stamps_give_exact_losses_and_overlaps():
    ns = 1e9 / RATE
    v, s = cont.account_read(1000, 10.0, RATE, None, time_ns=0)
    assert v == cont.ReadVerdict()
    v, s = cont.account_read(1000, 10.01, RATE, s, time_ns=round(1000 * ns))
    assert v.missing == 0 and v.drop == 0 and s.accounted == 2000
    v, s = cont.account_read(1000, 10.05, RATE, s, time_ns=round(2777 * ns))   # 777 lost
    assert (v.missing, v.drop, v.cause, v.measured_by) == (777, 0, "time-jump", "time")
    assert s.accounted == 3777
    v, s = cont.account_read(1000, 10.06, RATE, s, time_ns=round(3377 * ns),
                             reported="overflow")                             # 400 overlap
    assert (v.missing, v.drop, v.cause) == (0, 400, "repeat")
    assert s.accounted == 4377
    v, s = cont.account_read(500, 10.07, RATE, s, time_ns=round(4377 * ns), reported="overflow")
    assert v == cont.ReadVerdict()   # time stamps say continuous: they outrank the report


def test_wall_clock_counts_only_beyond_the_tolerance_unless_the_driver_reported_a_loss():
    _, s = cont.account_read(1000, 0.01, RATE, None)
    # the queue filled for 0.5 s and drained: lag 50_000 < tolerance 100_000, nothing counted
    v, s = cont.account_read(1000, 0.52, RATE, s, tolerance=100_000)
    assert v == cont.ReadVerdict()
    # an overflow report: the excess is counted whatever its size
    _, s2 = cont.account_read(1000, 0.01, RATE, None)
    v, _ = cont.account_read(1000, 0.02 + 0.0123, RATE, s2, reported="overflow",
                             tolerance=100_000)
    assert (v.missing, v.cause, v.measured_by) == (1230, "overflow", "wallclock")
    # beyond the tolerance after a stall
    v, _ = cont.account_read(1000, 0.02 + 0.5, RATE, s2, reported="timeout", tolerance=10_000,
                             drift_ppm=0)
    assert (v.missing, v.cause) == (50_000, "stall")
    # the drift allowance (100 ppm of 0.51 s at 100 kS/s: 5 samples) is not counted
    v, _ = cont.account_read(1000, 0.02 + 0.5, RATE, s2, reported="timeout", tolerance=10_000)
    assert v.missing == 50_000 - 5


def test_wall_clock_reference_absorbs_a_slow_sample_clock():
    # a device 50 ppm slow loses no samples; with the 100 ppm allowance nothing is counted
    slow = RATE * (1 - 50e-6)
    _, s = cont.account_read(1000, 1000 / slow, RATE, None)
    total = 1000
    slow = RATE * (1 - 50e-6)
    for _ in range(20_000):   # 200 s of reads
        total += 1000
        v, s = cont.account_read(1000, total / slow, RATE, s, tolerance=500)
        assert v.missing == 0
    # without the allowance the drift would have read as losses
    _, s = cont.account_read(1000, 1000 / slow, RATE, None)
    total, lost = 1000, 0
    for _ in range(20_000):
        total += 1000
        v, s = cont.account_read(1000, total / slow, RATE, s, tolerance=500, drift_ppm=0)
        lost += v.missing
    assert lost > 0


def test_content_repeat_and_fingerprints():
    rng = np.random.default_rng(2)
    buf = rng.standard_normal(64).astype(np.float32)
    fp = cont.buffer_fingerprint(buf)
    assert fp == cont.buffer_fingerprint(buf.copy()) and fp != cont.buffer_fingerprint(buf[1:])
    assert cont.buffer_fingerprint(np.zeros(64, np.complex64)) is None   # a muted converter
    assert cont.buffer_fingerprint(buf[:10]) is None
    _, s = cont.account_read(64, 1.0, RATE, None, fingerprint=fp)
    v, s = cont.account_read(64, 1.0 + 64 / RATE, RATE, s, fingerprint=fp)
    assert (v.missing, v.drop, v.cause, v.measured_by) == (64, 64, "repeat", "content")


def test_outage_stall_limit_and_backoff():
    assert cont.outage_samples(10.0, 12.5, 1000, RATE) == 249_000
    assert cont.outage_samples(10.0, 10.001, 1000, RATE) == 0
    assert cont.stall_limit_s(1000, RATE) == 1.0
    assert cont.stall_limit_s(100_000, RATE) == 4.0
    assert [cont.reopen_delay_s(a) for a in range(7)] == [0.25, 0.5, 1, 2, 4, 8, 10]
    with pytest.raises(ValueError, match="count must be > 0"):
        cont.account_read(0, 1.0, RATE)


# -- the source on a scripted device ------------------------------------------------------------
def test_clean_stream_is_the_air_and_the_settings_reach_the_device(monkeypatch):
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU)
    block = make_radio(monkeypatch, factory, gain_db=20.0, ppm=-3.5, antenna="RX",
                       buffers=8, stream_args={"bufflen": 65536})
    chunks = pump(block, 10)
    assert_is_the_air(chunks, air)
    assert chunks[0].start == 0 and chunks[-1].stop == sum(len(c) for c in chunks)
    dev = factory.opened[0]
    assert dev.settings == {"sample_rate": RATE, "frequency_hz": 868.3e6, "agc": False,
                            "gain_db": 20.0, "ppm": -3.5, "antenna": "RX"}
    assert dev.stream_args == {"bufflen": "65536", "buffers": "8"} and dev.format == "CF32"
    r = block.readings()
    assert r["settle_discarded"] == SETTLE and r["gaps"] == 0 and r["radio"] == "running"
    assert not block.p.realtime   # the device paces itself


def test_automatic_gain_when_no_gain_is_given(monkeypatch):
    factory = FakeFactory(noise_air(), mtu=MTU)
    make_radio(monkeypatch, factory)
    assert factory.opened[0].settings["agc"] is True
    assert "gain_db" not in factory.opened[0].settings and "ppm" not in factory.opened[0].settings


@pytest.mark.parametrize("timestamps", [True, False])
def test_overflow_is_counted_and_annotated_where_the_samples_went(monkeypatch, timestamps):
    # 20 ms of samples queue up during a stall, then the driver drops its queue
    air = noise_air()
    script = [None] * 5 + [("stall", 0.02), ("overflow",)]
    factory = FakeFactory(air, mtu=MTU, timestamps=timestamps, scripts=(script,))
    block = make_radio(monkeypatch, factory)
    chunks = pump(block, 6)
    assert_is_the_air(chunks, air)
    (gap,) = gaps(chunks)
    # 4 reads kept before the stall, then 2000 lost: the first sample after the hole is 6000
    assert gap.index == 6000
    assert gap.data == {"samples_missing": 2000, "cause": "overflow",
                        "measured_by": "time" if timestamps else "wallclock"}
    holder = next(c for c in chunks if gap in c.annotations)
    assert holder.start == gap.index
    r = block.readings()
    assert (r["overflows"], r["timeouts"], r["gaps"], r["samples_missing"]) == (1, 1, 1, 2000)


def test_silent_drop_is_found_by_time_stamps(monkeypatch):
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, scripts=([None] * 5 + [("drop", 1234)],))
    block = make_radio(monkeypatch, factory)
    chunks = pump(block, 5)
    assert_is_the_air(chunks, air)
    (gap,) = gaps(chunks)
    assert (gap.index, gap.data["samples_missing"], gap.data["cause"]) == (5234, 1234,
                                                                           "time-jump")


def test_silent_drop_without_time_stamps_is_found_beyond_the_lag_tolerance(monkeypatch):
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, timestamps=False,
                          scripts=([None] * 5 + [("drop", 1234)],))
    block = make_radio(monkeypatch, factory, lag_tolerance_s=0.005)    # 500 samples
    chunks = pump(block, 5)
    assert_is_the_air(chunks, air)
    (gap,) = gaps(chunks)
    assert gap.data == {"samples_missing": 1234, "cause": "late", "measured_by": "wallclock"}


@pytest.mark.parametrize("timestamps", [True, False])
def test_a_short_stall_loses_nothing(monkeypatch, timestamps):
    # 0.3 s without samples; the driver queues them (no queue limit) and hands them over
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, timestamps=timestamps,
                          scripts=([None] * 5 + [("stall", 0.3)],))
    block = make_radio(monkeypatch, factory)
    chunks = pump(block, 12)
    assert_is_the_air(chunks, air)
    assert gaps(chunks) == [] and block.readings()["timeouts"] == 1


def test_a_stall_longer_than_the_queue_is_an_overflow(monkeypatch):
    # 8 buffers of 1000 samples; a 0.3 s stall overruns them and the driver drops the queue
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, timestamps=False, queue=8 * MTU,
                          scripts=([None] * 5 + [("stall", 0.3)],))
    block = make_radio(monkeypatch, factory, buffers=8)
    chunks = pump(block, 6)
    (gap,) = gaps(chunks)
    assert (gap.data["cause"], gap.data["measured_by"]) == ("overflow", "wallclock")
    # the wall clock's estimate, within the 100 ppm drift allowance (3 samples in 0.3 s)
    missing = gap.data["samples_missing"]
    assert 30_000 - 3 <= missing <= 30_000
    before = [c for c in chunks if c.start < gap.index]
    assert_is_the_air(before, air)
    assert_is_the_air([c for c in chunks if c.start >= gap.index], air,
                      SETTLE + 30_000 - missing)


def test_repeated_buffer_without_time_stamps(monkeypatch):
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, timestamps=False, scripts=([None] * 5 + [("repeat",)],))
    block = make_radio(monkeypatch, factory)
    chunks = pump(block, 5)
    assert_is_the_air(chunks, air)       # the stale copy never reaches the stream
    (gap,) = gaps(chunks)
    assert (gap.index, gap.data) == (5000, {"samples_missing": MTU, "cause": "repeat",
                                            "measured_by": "content"})
    assert block.readings()["repeated_buffers"] == 1


def test_repeated_buffer_with_time_stamps(monkeypatch):
    # the stale buffer repeats its time stamp: dropped; the samples it displaced show as a jump
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, scripts=([None] * 5 + [("repeat",)],))
    block = make_radio(monkeypatch, factory)
    chunks = pump(block, 5)
    assert_is_the_air(chunks, air)
    (gap,) = gaps(chunks)
    assert (gap.index, gap.data["samples_missing"], gap.data["cause"]) == (5000, MTU,
                                                                           "time-jump")
    r = block.readings()
    assert (r["repeated_buffers"], r["samples_repeated"]) == (1, MTU)


def pump_until(block: RadioSource, done, limit_s: float = 10.0) -> list[Chunk]:
    chunks: list[Chunk] = []
    deadline = time.monotonic() + limit_s
    while not done(chunks):
        assert time.monotonic() < deadline, f"gave up: {block.readings()}"
        assert block.produce()
        chunks.extend(chunk for _, chunk in block.take_output())
    return chunks


@pytest.mark.parametrize("how", ["dead", "error"])
def test_device_lost_is_reopened_and_the_outage_annotated(monkeypatch, how):
    air = noise_air(400_000)
    factory = FakeFactory(air, mtu=MTU, fail=2, open_s=0.25, scripts=([None] * 9 + [(how,)],))
    block = make_radio(monkeypatch, factory)
    chunks = pump_until(block, lambda cs: sum(len(c) for c in cs) > 40_000)
    assert_is_the_air(chunks, air)
    (gap,) = gaps(chunks)
    assert gap.index == 8000 + gap.data["samples_missing"]
    assert gap.data["cause"] == "device-lost"
    # closed, three attempts (two failed), each 0.25 s of fake time; plus the stall if dead
    lost_for = 1.0 if how == "dead" else 0.0
    assert gap.data["outage_s"] == pytest.approx(lost_for + 0.75 + SETTLE / RATE
                                                 + MTU / RATE, abs=0.12)
    r = block.readings()
    assert (r["device_losses"], r["reopens"], r["gaps"]) == (1, 1, 1)
    assert r["samples_missing"] == gap.data["samples_missing"] > 0
    assert r["driver_errors"] == (how == "error")
    assert factory.opened[0].closed and not factory.opened[1].closed
    assert factory.attempts[1:] == ["driver=fake,serial=F00D"] * 3
    block.finish()
    assert factory.opened[1].closed


def test_a_dead_device_never_holds_produce(monkeypatch):
    air = noise_air()
    factory = FakeFactory(air, mtu=MTU, real_timeouts=True, scripts=([None, ("dead",)],))
    block = make_radio(monkeypatch, factory)
    for _ in range(4):
        t0 = time.monotonic()
        assert block.produce()
        assert time.monotonic() - t0 < 0.3


@pytest.mark.parametrize(("fmt", "step"), [("CS16", 1 / 32768), ("CS8", 1 / 128),
                                           ("CU8", 1 / 127.5)])
def test_integer_formats_become_floats_by_the_recordings_rule(monkeypatch, fmt, step):
    # rule of blocks/_sampleformat.py: signed v / 2**(N-1), unsigned (v - 127.5) / 127.5
    air = noise_air()
    air.samples *= 0.5       # within full scale: no clipping
    factory = FakeFactory(air, mtu=MTU)
    block = make_radio(monkeypatch, factory, sample_format=fmt)
    chunks = pump(block, 3)
    assert factory.opened[0].format == fmt
    got = np.concatenate([c.samples for c in chunks])
    want = air.samples[SETTLE:SETTLE + got.shape[0]]
    assert got.dtype == np.complex64
    np.testing.assert_allclose(got.real, want.real, atol=step / 2 + 1e-7)
    np.testing.assert_allclose(got.imag, want.imag, atol=step / 2 + 1e-7)


def test_skip_moves_the_next_start():
    sim = SimSource("s", sample_rate=RATE, chunk_size=100, **SIM)
    sim.configure({})
    sim.produce()
    sim.skip(50)
    sim.produce()
    starts = [c.start for _, c in sim.take_output()]
    assert starts == [0, 150]
    with pytest.raises(ValueError, match="samples must be >= 0"):
        sim.skip(-1)


# -- the receive chain re-acquires across a gap ---------------------------------------------
def test_ber_meter_reacquires_after_a_gap_without_counting_it(monkeypatch):
    # The shipped default receiver (2-FSK, 9.6 kBd at 250 kS/s) behind the radio; the node
    # sends PRBS15 without noise. 6250 samples (240 symbols) vanish in an overflow.
    doc = tomllib.loads((ROOT / "configs" / "default.toml").read_text())
    rate = float(doc["pipeline"]["sample_rate"])
    node = SimSource("node", sample_rate=rate, chunk_size=200_000, modulation="2fsk",
                     symbol_rate=9_600, deviation_hz=4_800, pattern="prbs15", seed=7,
                     cfo_hz=1_300)
    node.configure({})
    node.produce()
    air = FakeAir(node.take_output()[0][1].samples, rate)
    script = [None] * 40 + [("drop", 6250)]
    factory = FakeFactory(air, mtu=2500, scripts=(script,))
    monkeypatch.setattr(radio, "open_device", factory)
    monkeypatch.setattr(radio, "wall_clock", air.clock)
    doc["blocks"]["src"] = {"kind": "radio", "frequency_hz": 868.3e6, "chunk_size": 5000}
    pipe = pipeline_from_dict(doc)

    def deliver(block_id: str) -> None:
        for port, chunk in pipe.blocks[block_id].take_output():
            for e in pipe.edges:
                if e.src == block_id and e.src_port == port:
                    pipe.blocks[e.dst].deliver(Chunk(chunk.samples, chunk.start, chunk.rate,
                                                     chunk.annotations, e.dst_port))
                    deliver(e.dst)

    src = pipe.blocks["src"]
    while (factory.opened[0].pos or 0) < air.samples.shape[0] - 5000:
        src.produce()
        deliver("src")
    for block_id in pipe.order():
        pipe.blocks[block_id].finish()
        deliver(block_id)
    assert src.readings()["gaps"] == 1 and src.readings()["samples_missing"] == 6250
    meter = pipe.blocks["ber"].readings()
    assert meter["gaps"] >= 1 and meter["errors"] == 0
    assert meter["locked"] == 1
    # bits the radio passed on: everything but the settle time, the gap and the unread tail
    passed = src.readings()["samples_read"] - src.readings()["settle_discarded"]
    before_gap = 40 * 2500 - src.readings()["settle_discarded"]
    assert meter["bits"] > 0.9 * passed / rate * 9_600          # lock lost only briefly
    assert meter["bits"] > 1.5 * before_gap / rate * 9_600      # counting went on after it


# -- fallback ---------------------------------------------------------------------------------
def fallback_radio(**params) -> RadioSource:
    values = {"frequency_hz": 868.3e6, "sample_rate": 250_000.0, "chunk_size": 4096,
              "fallback": "sim", "fallback_params": dict(SIM), **params}
    return RadioSource("src", **values)


def test_missing_module_falls_back_in_one_line(monkeypatch, caplog):
    monkeypatch.setitem(sys.modules, "SoapySDR", None)     # import SoapySDR now fails
    block = fallback_radio()
    block.configure({})
    lines = [r.getMessage() for r in caplog.records if r.levelname == "WARNING"]
    assert len(lines) == 1 and "\n" not in lines[0]
    assert "running as the fallback 'sim'" in lines[0]
    assert "SoapySDR Python module is not importable" in lines[0]
    # the fallback's samples, exactly
    twin = SimSource("src", sample_rate=250_000.0, chunk_size=4096, **SIM)
    twin.configure({})
    for _ in range(3):
        assert block.produce() and twin.produce()
        (_, a), (_, b) = block.take_output()[0], twin.take_output()[0]
        assert a.start == b.start
        np.testing.assert_array_equal(a.samples, b.samples)
    r = block.readings()
    assert r["radio"] == "fallback" and r["fallback"] == "sim"
    assert "not importable" in r["fallback_reason"] and r["modulation"] == "2fsk"


def test_recording_fallback_plays_the_file(monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "SoapySDR", None)
    x = noise_air(5000).samples
    path = tmp_path / "bench.cf32"
    x.tofile(path)
    block = RadioSource("src", frequency_hz=868.3e6, sample_rate=RATE, chunk_size=2000,
                        fallback="recording",
                        fallback_params={"path": str(path), "datatype": "cf32_le"})
    block.configure({})
    got = []
    while block.produce():
        got.extend(c.samples for _, c in block.take_output())
    np.testing.assert_array_equal(np.concatenate(got), x)
    assert block.readings()["fallback"] == "recording"


def test_fallback_none_refuses_to_run_with_the_reason(monkeypatch):
    monkeypatch.setitem(sys.modules, "SoapySDR", None)
    block = RadioSource("src", frequency_hz=868.3e6, sample_rate=250_000.0)
    with pytest.raises(ParamError) as info:
        block.configure({})
    assert info.value.name == "driver"
    assert "not importable" in info.value.message and "(fallback = none)" in info.value.message
    doc = tomllib.loads((ROOT / "configs" / "default.toml").read_text())
    doc["blocks"]["src"] = {"kind": "radio", "frequency_hz": 868.3e6, "driver": "driver=rtlsdr"}
    with pytest.raises(PipelineError, match=r"blocks\.src\.driver: the SoapySDR Python module"):
        pipeline_from_dict(doc)


def fake_module(devices: list, modules: list) -> types.SimpleNamespace:
    """Stands in for the SoapySDR module: enumeration and module listing only."""
    return types.SimpleNamespace(
        Device=types.SimpleNamespace(enumerate=lambda args: list(devices)),
        listModules=lambda: list(modules), registerLogHandler=lambda handler: None)


@pytest.mark.parametrize(("modules", "reason"), [
    ([], "no SoapySDR device is attached: no SoapySDR hardware modules are installed"),
    (["libfooSupport.so"], "no SoapySDR device is attached (is it plugged in?")])
def test_module_without_device_falls_back_and_says_why(monkeypatch, caplog, modules, reason):
    monkeypatch.setitem(sys.modules, "SoapySDR", fake_module([], modules))
    block = fallback_radio()
    block.configure({})
    (line,) = [r.getMessage() for r in caplog.records if r.levelname == "WARNING"]
    assert reason in line
    with pytest.raises(RadioUnavailable, match=r"no SoapySDR device matches 'driver=rtlsdr'"):
        radio.open_device("driver=rtlsdr")


@pytest.mark.skipif(not soapysdr_importable(), reason="SoapySDR module not importable here")
def test_real_module_without_device(caplog):
    block = fallback_radio(driver="driver=rtlsdr,serial=phasefree-absent")
    block.configure({})
    (line,) = [r.getMessage() for r in caplog.records if r.levelname == "WARNING"]
    assert "no SoapySDR device matches 'driver=rtlsdr,serial=phasefree-absent'" in line


def test_fallback_params_are_checked_on_any_machine():
    with pytest.raises(ParamError) as info:
        fallback_radio(fallback_params={"symbol_rate": 9_600})
    assert (info.value.name, info.value.message) == ("fallback_params.modulation", "is required")
    with pytest.raises(ParamError, match="radio's own sample_rate"):
        fallback_radio(fallback_params={**SIM, "sample_rate": 1e6})
    assert RadioSource("src", frequency_hz=1e8, fallback_params=SIM).fallback_source is None
    assert fallback_radio().fallback_source.p.modulation == "2fsk"


# -- whole runs -------------------------------------------------------------------------------
def phasefree(code: str, *args: str, **kw) -> subprocess.Popen:
    """``phasefree ARGS`` in a fresh interpreter, after ``code`` ran there."""
    script = f"import sys\n{code}\nfrom stream.cli import main\nsys.exit(main({list(args)!r}))"
    return subprocess.Popen([sys.executable, "-c", script], cwd=ROOT, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kw)


NO_MODULE = "sys.modules['SoapySDR'] = None"


def test_default_receiver_runs_on_its_fallback_without_the_module():
    proc = phasefree(NO_MODULE, "run", "--seconds", "1", "--json")
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    lines = [line for line in err.splitlines() if "fallback" in line]
    assert len(lines) == 1 and "running as the fallback 'sim'" in lines[0]
    assert "SoapySDR Python module is not importable" in lines[0]
    summary = json.loads(out.splitlines()[-1])
    assert summary["blocks"]["src"]["fallback"] == "sim"
    assert summary["blocks"]["ber"]["bits"] > 0


def test_fallback_none_exits_2_with_the_reason():
    proc = phasefree(NO_MODULE, "run", "--set", "src.fallback=none", "--seconds", "1")
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 2
    assert "blocks.src.driver: the SoapySDR Python module is not importable" in err
    assert "(fallback = none)" in err


@pytest.mark.skipif(not soapysdr_importable(), reason="SoapySDR module not importable here")
def test_default_receiver_with_the_module_but_no_device():
    proc = phasefree("", "run", "--seconds", "1", "--json", "--set",
                     "src.driver=driver=rtlsdr,serial=phasefree-absent")
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    (line,) = [line for line in err.splitlines() if "fallback" in line]
    assert "no SoapySDR device matches 'driver=rtlsdr,serial=phasefree-absent'" in line


DEAD_RADIO = """
import blocks.radio
from tests.fake_radio import FakeAir, FakeFactory
import numpy as np
air = FakeAir(np.ones(10_000_000, np.complex64) * 0.1, 250_000.0)
factory = FakeFactory(air, fail=10**6, mtu=4096, real_timeouts=True,
                      scripts=([None] * 20 + [("dead",)],))
blocks.radio.open_device = factory
"""


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_stop_with_the_radio_active_ends_within_a_second(sig):
    # the device dies, the source declares it lost and keeps trying to reopen it; a stop
    # signal then ends the run cleanly within a second
    proc = phasefree(DEAD_RADIO, "run", "--json")
    lost, ended = threading.Event(), threading.Event()
    lines: list[str] = []

    def watch(stream, marker: str, event: threading.Event) -> None:
        for line in stream:
            lines.append(line)
            if marker in line:
                event.set()

    threading.Thread(target=watch, args=(proc.stderr, "device lost", lost), daemon=True).start()
    threading.Thread(target=watch, args=(proc.stdout, '"summary"', ended), daemon=True).start()
    try:
        assert lost.wait(60), "the source never declared the device lost"
        time.sleep(0.3)                       # inside the reopen backoff
        t0 = time.monotonic()
        os.kill(proc.pid, sig)
        assert ended.wait(5)
        took = time.monotonic() - t0
        proc.wait(timeout=10)
    finally:
        proc.kill()
    # the run has ended (sources closed, pipeline drained, summary written) within 1 s; the
    # interpreter's own teardown after that is not the source's to speed up
    assert took < 1.0, f"stop took {took:.2f} s"
    assert proc.returncode == 0
    summary = json.loads(next(line for line in lines if '"summary"' in line))
    assert summary["reason"] == "stopped"
    assert summary["blocks"]["src"]["device_losses"] == 1
