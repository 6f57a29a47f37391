"""ITU-T O.150 PRBS generators against a per-bit shift register and the m-sequence laws."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from blocks._prbs import (
    PRBS_NAMES,
    PRBS_POLYNOMIALS,
    TABLE_DEGREE,
    prbs_expected,
    prbs_sequence,
    prbs_state_after,
)

# (degree, tap, inverted) from ITU-T O.150 sec. 5 (prbs9, prbs15, prbs23; from memory of the
# recommendation's table) and common practice (prbs7, x^7 + x^6 + 1, not inverted).
O150 = {"prbs7": (7, 6, False), "prbs9": (9, 5, False), "prbs15": (15, 14, True),
        "prbs23": (23, 18, True)}

# Prime factors of 2^n - 1 for the period test (elementary arithmetic: 127 is prime,
# 511 = 7 * 73, 32767 = 7 * 31 * 151, 8388607 = 47 * 178481).
PERIOD_FACTORS = {"prbs7": (127,), "prbs9": (7, 73), "prbs15": (7, 31, 151),
                  "prbs23": (47, 178481)}


def shift_register_bits(degree: int, tap: int, inverted: bool, count: int) -> np.ndarray:
    """Slow reference: a Fibonacci register of stages 1..degree, all ones at the start.

    Each clock outputs stage ``degree``, shifts stages up by one and loads stage 1 with
    stage ``degree`` XOR stage ``tap`` (the generator drawn in ITU-T O.150 sec. 5).
    """
    stages = [1] * (degree + 1)  # stages[1..degree]; stages[0] unused
    out = []
    for _ in range(count):
        out.append(stages[degree] ^ int(inverted))
        feedback = stages[degree] ^ stages[tap]
        stages[2:] = stages[1:-1]
        stages[1] = feedback
    return np.array(out, dtype=np.uint8)


def runs(bits: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cyclic runs of one period: (values, lengths)."""
    # rotate so the sequence starts where a run starts
    change = np.flatnonzero(bits != np.roll(bits, 1))
    rolled = np.roll(bits, -change[0])
    edges = np.flatnonzero(np.diff(rolled) != 0) + 1
    starts = np.concatenate(([0], edges))
    lengths = np.diff(np.concatenate((starts, [len(rolled)])))
    return rolled[starts], lengths


def test_polynomials_are_the_o150_ones():
    assert set(PRBS_NAMES) == set(O150)
    for name, (degree, tap, inverted) in O150.items():
        poly = PRBS_POLYNOMIALS[name]
        assert (poly.degree, poly.tap, poly.inverted) == (degree, tap, inverted)


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_prefix_matches_the_shift_register(name):
    bits, _ = prbs_sequence(name, 3000)
    assert bits.dtype == np.uint8
    np.testing.assert_array_equal(bits, shift_register_bits(*O150[name], 3000))


def test_prbs9_known_bytes():
    # The first bytes of the 2^9-1 sequence from the all-ones register, MSB first, as quoted
    # in many test-pattern tables (from memory): FF 83 DF 17 32 09 4E D1.
    bits, _ = prbs_sequence("prbs9", 64)
    assert np.packbits(bits).tobytes() == bytes.fromhex("ff83df1732094ed1")


@pytest.mark.parametrize("name", ["prbs15", "prbs23"])
def test_o150_inversion(name):
    # O.150 sec. 5: the 2^15-1 and 2^23-1 patterns are transmitted inverted.
    degree, tap, _ = O150[name]
    bits, _ = prbs_sequence(name, 500)
    np.testing.assert_array_equal(bits, 1 - shift_register_bits(degree, tap, False, 500))
    assert not bits[:degree].any()  # the all-ones start register comes out as zeros


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_period_is_2n_minus_1(name):
    # Golomb (1967) ch. III: a primitive feedback polynomial gives period exactly 2^n - 1.
    # The register recurs after N bits and at no N/d for a prime factor d of N.
    poly = PRBS_POLYNOMIALS[name]
    n = poly.period
    bits, state = prbs_sequence(name, n)
    _, start = prbs_sequence(name, 0)
    assert state == start
    head = bits[:poly.degree]
    for d in PERIOD_FACTORS[name]:
        k = n // d
        assert not np.array_equal(bits[k:k + poly.degree], head), f"repeats after {k}"


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_balance_and_run_distribution(name):
    # Golomb's postulates R1/R2 for an m-sequence of degree n (Shift Register Sequences,
    # ch. III), on the uninverted sequence over one period:
    #   ones 2^(n-1), zeros 2^(n-1) - 1; 2^(n-1) runs in all; for 1 <= k <= n-2 there are
    #   2^(n-k-2) runs of ones and as many of zeros of length k; one run of n-1 zeros;
    #   one run of n ones.
    poly = PRBS_POLYNOMIALS[name]
    n = poly.degree
    bits, _ = prbs_sequence(name, poly.period)
    plain = bits ^ np.uint8(poly.inverted)
    assert int(plain.sum()) == 2 ** (n - 1)
    values, lengths = runs(plain)
    assert len(lengths) == 2 ** (n - 1)
    for value in (0, 1):
        counts = np.bincount(lengths[values == value], minlength=n + 2)
        for k in range(1, n - 1):
            assert counts[k] == 2 ** (n - k - 2), (value, k)
        assert counts[n - 1] == (1 if value == 0 else 0)
        assert counts[n] == (1 if value == 1 else 0)
        assert counts[n + 1:].sum() == 0


@pytest.mark.parametrize(("name", "zeros"), [("prbs7", 6), ("prbs9", 8), ("prbs15", 15),
                                             ("prbs23", 23)])
def test_longest_zero_run_as_transmitted(name, zeros):
    # ITU-T O.150 sec. 5 (from memory): longest sequence of zeros 8 for 2^9-1 (non-inverted
    # signal), 15 for 2^15-1 and 23 for 2^23-1 (inverted signal); prbs7: n - 1 = 6 (Golomb).
    poly = PRBS_POLYNOMIALS[name]
    bits, _ = prbs_sequence(name, poly.period)
    values, lengths = runs(bits)
    assert lengths[values == 0].max() == zeros


@settings(max_examples=40, deadline=None)
@given(name=st.sampled_from(PRBS_NAMES),
       sizes=st.lists(st.integers(min_value=0, max_value=700), min_size=1, max_size=8))
def test_chunked_generation_equals_one_shot(name, sizes):
    whole, end_whole = prbs_sequence(name, sum(sizes))
    state = None
    parts = []
    for size in sizes:
        piece, state = prbs_sequence(name, size, state)
        parts.append(piece)
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    assert state == end_whole


@pytest.mark.parametrize("name", [n for n in PRBS_NAMES
                                  if PRBS_POLYNOMIALS[n].degree <= TABLE_DEGREE])
def test_tabulated_patterns_run_through_their_period_like_the_shift_register(name):
    # The patterns kept as a table: pieces that start anywhere in the period, wrap round its
    # end and span several periods match the per-bit register over 2.2 periods.
    degree, tap, inverted = O150[name]
    period = PRBS_POLYNOMIALS[name].period
    total = int(2.2 * period)
    want = shift_register_bits(degree, tap, inverted, total)
    sizes = [period - 5, 3, period + 10, total]
    state, parts = None, []
    for size in sizes:
        piece, state = prbs_sequence(name, min(size, total - sum(map(len, parts))), state)
        parts.append(piece)
    np.testing.assert_array_equal(np.concatenate(parts), want)


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_state_seeded_from_received_bits_continues_the_sequence(name):
    bits, _ = prbs_sequence(name, 2000)
    for cut in (PRBS_POLYNOMIALS[name].degree, 333, 1500):
        state = prbs_state_after(name, bits[:cut])
        rest, _ = prbs_sequence(name, 2000 - cut, state)
        np.testing.assert_array_equal(rest, bits[cut:])


@pytest.mark.parametrize("name", PRBS_NAMES)
def test_recurrence_check_on_clean_errored_and_flipped_data(name):
    poly = PRBS_POLYNOMIALS[name]
    p, q = poly.degree, poly.tap
    bits, _ = prbs_sequence(name, 400)
    np.testing.assert_array_equal(prbs_expected(name, bits), bits[p:])
    # one error at position e disturbs the predictions for e, e+q and e+p: it enters each of
    # the recurrence's three terms once (follows from the O.150 recurrence itself)
    e = 100
    hit = bits.copy()
    hit[e] ^= 1
    wrong = np.flatnonzero(prbs_expected(name, hit) != hit[p:]) + p
    assert wrong.tolist() == sorted({e, e + q, e + p})
    # flipped polarity: every prediction fails
    flipped = 1 - bits
    assert (prbs_expected(name, flipped) != flipped[p:]).all()
    assert prbs_expected(name, bits[:p]).size == 0


def test_errors_name_the_problem():
    with pytest.raises(ValueError, match="pattern must be one of"):
        prbs_sequence("prbs11", 5)
    with pytest.raises(ValueError, match="count must be"):
        prbs_sequence("prbs9", -1)
    _, st9 = prbs_sequence("prbs9", 3)
    with pytest.raises(ValueError, match="belongs to 'prbs9'"):
        prbs_sequence("prbs15", 3, st9)
    with pytest.raises(ValueError, match="at least 9 bits"):
        prbs_state_after("prbs9", np.ones(4, np.uint8))
    with pytest.raises(ValueError, match="all zero"):
        prbs_state_after("prbs9", np.zeros(20, np.uint8))
    with pytest.raises(ValueError, match="all zero"):
        prbs_state_after("prbs15", np.ones(20, np.uint8))  # inverted pattern: ones are zeros
