"""Block-level tests of energy_detect, fsk_detect and dpsk_detect (blocks/detectors.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings

import blocks.detectors  # noqa: F401  (registers the kinds)
from blocks._dpsk_detect import dpsk_detect
from blocks._energy_detect import energy_detect
from blocks._fsk_detect import fsk_detect, tone_matrix
from stream.block import StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from tests.chunking import assert_chunk_invariant, chunk_cuts, make_block, run_block

RNG = np.random.default_rng(2024)
N_SYM = 1500


def noisy(x: np.ndarray, n0: float) -> np.ndarray:
    return (x + RNG.normal(0, math.sqrt(n0 / 2), (x.shape[0], 2)) @ [1, 1j]).astype(np.complex64)


OOK = noisy(3.0 * RNG.integers(0, 2, N_SYM), 0.5)
FSK_BITS = RNG.integers(0, 2, N_SYM)
FSK = noisy(np.exp(2j * np.pi * np.where(FSK_BITS[:, None], 1, -1) * 0.5 * np.arange(4) / 4
                   ).ravel(), 0.1)
DQPSK = noisy(np.exp(1j * np.pi / 4 * np.cumsum(RNG.choice([1, 3, -1, -3], N_SYM))), 0.2)

CASES = {
    "ook": (lambda: make_block("energy_detect", window=64), OOK, 1000.0),
    "fsk": (lambda: make_block("fsk_detect", samples_per_symbol=4, deviation_hz=500.0),
            FSK, 4000.0),
    "dbpsk": (lambda: make_block("dpsk_detect"), DQPSK, 1000.0),
    "dqpsk": (lambda: make_block("dpsk_detect", modulation="dqpsk"), DQPSK, 1000.0),
}


@pytest.mark.parametrize("case", sorted(CASES))
@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(N_SYM * 4))
def test_chunk_size_invariance(case: str, cuts: list[int]) -> None:
    make, signal, rate = CASES[case]
    assert_chunk_invariant(make, signal, rate, [c for c in cuts if c < len(signal)])


def test_blocks_give_the_kernel_output() -> None:
    out, _ = run_block(CASES["ook"][0](), [OOK], 1000.0)
    bits, soft, _, _ = energy_detect(OOK, 64, 1e-3, 10.0, final=True)
    np.testing.assert_array_equal(out["bits"], bits)
    np.testing.assert_array_equal(out["soft"], soft)
    out, _ = run_block(CASES["fsk"][0](), [FSK], 4000.0)
    np.testing.assert_array_equal(out["bits"], fsk_detect(FSK, tone_matrix(4, 500.0, 4000.0))[0])
    np.testing.assert_array_equal(out["bits"], FSK_BITS)
    out, _ = run_block(CASES["dqpsk"][0](), [DQPSK], 1000.0)
    np.testing.assert_array_equal(out["bits"], dpsk_detect(DQPSK, "dqpsk")[0])


def test_output_rates_and_symbol_rate_check() -> None:
    blk = make_block("dpsk_detect", modulation="dqpsk", symbol_rate=1000.0)
    specs = blk.configure({"in": StreamSpec("complex64", 1000.0)})
    assert specs["bits"] == StreamSpec("uint8", 2000.0)
    blk = make_block("fsk_detect", samples_per_symbol=4, deviation_hz=500.0, symbol_rate=900.0)
    with pytest.raises(ParamError, match="symbol_rate"):
        blk.configure({"in": StreamSpec("complex64", 4000.0)})
    with pytest.raises(ParamError, match="deviation_hz"):
        make_block("fsk_detect", samples_per_symbol=4, deviation_hz=3000.0).configure(
            {"in": StreamSpec("complex64", 4000.0)})


def test_gap_restarts_and_is_passed_on() -> None:
    blk = make_block("fsk_detect", samples_per_symbol=4, deviation_hz=500.0)
    blk.configure({"in": StreamSpec("complex64", 4000.0)})
    blk.deliver(Chunk(FSK[:402], 0, 4000.0))          # 100 symbols + 2 samples held
    blk.deliver(Chunk(FSK[801:1200], 801, 4000.0))    # jump: realign at sample 804
    blk.deliver(Chunk(FSK[1200:1600], 1200, 4000.0, (Annotation(1300, "gap"),)))
    blk.finish()
    out = blk.take_output()
    bits = np.concatenate([c.samples for p, c in out if p == "bits"])
    gaps = [a.index for p, c in out if p == "bits" for a in c.annotations if a.label == "gap"]
    # symbols 0..99, then 201..324 (from sample 804), gap at sample 1300 = symbol 325
    assert gaps == [100, 224]
    expected = np.concatenate([FSK_BITS[:100], FSK_BITS[201:325], FSK_BITS[325:400]])
    np.testing.assert_array_equal(bits, expected)


def test_nan_input_is_an_error_naming_the_sample() -> None:
    blk = make_block("dpsk_detect")
    blk.configure({"in": StreamSpec("complex64", 1000.0)})
    bad = np.ones(10, np.complex64)
    bad[7] = np.nan
    with pytest.raises(ValueError, match="sample 57"):
        blk.deliver(Chunk(bad, 50, 1000.0))


def test_energy_readings() -> None:
    blk = CASES["ook"][0]()
    run_block(blk, [OOK], 1000.0)
    r = blk.readings()
    assert r["signal"] == 1 and r["noise_floor"] == pytest.approx(0.5, rel=0.4)
    assert r["on_level"] == pytest.approx(9.5, rel=0.2) and r["ones"] + r["zeros"] > 0
    assert r["ones_mean"] > r["threshold"] > r["zeros_mean"]
