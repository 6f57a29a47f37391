"""Tests of the timing kernels: spectral line, strobes, interpolation (blocks/_timing.py)."""

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.interpolate import lagrange

from blocks._fir import fir_filter
from blocks._pulses import rect_taps, rrc_taps
from blocks._timing import (
    cubic_interpolate,
    segment_strobes,
    spectral_line,
    timing_phase,
    tone_metric,
    unwrap_phase,
)
from tests.blocks.sync_signals import received
from tests.chunking import chunk_cuts, split


def circular_distance(a, b):
    return abs((a - b + 0.5) % 1.0 - 0.5)


@pytest.mark.parametrize("count", [200, 7])
def test_cubic_interpolation_matches_lagrange_polynomial(count):
    # Reference: scipy.interpolate.lagrange through the four neighbours m-1 .. m+2
    # (the third-order Lagrange interpolator of Erup, Gardner & Harris 1993); many positions
    # (differences per input sample) and few (differences per output).
    rng = np.random.default_rng(5)
    x = (rng.standard_normal(50) + 1j * rng.standard_normal(50)).astype(np.complex64)
    positions = rng.uniform(1, 46.999, count)
    got = cubic_interpolate(x, positions)
    for p, g in zip(positions, got, strict=True):
        m = math.floor(p)
        nodes = np.arange(m - 1, m + 3)
        ref = lagrange(nodes - m, x[nodes].real)(p - m) + 1j * lagrange(nodes - m,
                                                                        x[nodes].imag)(p - m)
        assert abs(g - ref) < 1e-5


def test_cubic_interpolation_is_exact_for_cubics():
    # A Lagrange interpolator of order 3 reproduces any cubic exactly (common practice).
    n = np.arange(40, dtype=np.float64)
    poly = np.poly1d([0.001, -0.02, 0.3, 1.0])
    p = np.linspace(1, 36.9, 123)
    got = cubic_interpolate(poly(n).astype(np.float32), p)
    np.testing.assert_allclose(got, poly(p), rtol=2e-6)


def test_cubic_interpolation_needs_neighbours():
    with pytest.raises(ValueError, match="positions must lie in"):
        cubic_interpolate(np.zeros(10, np.complex64), np.array([0.5]))


@settings(max_examples=100, deadline=None)
@given(sps=st.floats(2.0, 30.0), theta=st.floats(-3, 3), drift=st.floats(-0.45, 0.45),
       lengths=st.lists(st.floats(16.0, 400.0), min_size=1, max_size=8))
def test_segments_give_every_symbol_once(sps, theta, drift, lengths):
    # Consecutive segments (windows of 16 .. 400 symbols, the phase moving by up to 0.45
    # symbol per window) of a piecewise-linear phase track: the strobe indices must run on
    # without gap or repeat, and each instant must satisfy t = (k + theta(t)) sps.
    knots = np.concatenate(([0.0], np.cumsum(lengths) * sps))
    thetas = [theta + drift * i for i in range(len(knots))]
    expected_k = None
    for (a, b), (ta, tb) in zip(itertools.pairwise(knots), itertools.pairwise(thetas),
                                strict=True):
        first, t = segment_strobes(a, b, ta, tb, sps)
        if expected_k is not None:
            assert first == expected_k
        expected_k = first + t.shape[0]
        assert np.all((t >= a - 1e-9) & (t < b + 1e-9))  # [a, b) to rounding
        k = first + np.arange(t.shape[0])
        theta_t = ta + (tb - ta) * (t - a) / (b - a)
        np.testing.assert_allclose(t, (k + theta_t) * sps, atol=1e-6)


@settings(max_examples=50, deadline=None)
@given(sps=st.floats(2.0, 30.0), theta=st.floats(-3, 3), drift=st.floats(-0.45, 0.45),
       lengths=st.lists(st.floats(16.0, 400.0), min_size=2, max_size=8))
def test_segments_in_one_call_equal_the_segments_one_by_one(sps, theta, drift, lengths):
    # Consecutive segments passed as arrays give the concatenation of the scalar calls.
    knots = np.concatenate(([0.0], np.cumsum(lengths) * sps))
    thetas = theta + drift * np.arange(knots.shape[0])
    first, t = segment_strobes(knots[:-1], knots[1:], thetas[:-1], thetas[1:], sps)
    parts = [segment_strobes(a, b, ta, tb, sps)
             for a, b, ta, tb in zip(knots[:-1], knots[1:], thetas[:-1], thetas[1:],
                                     strict=True)]
    assert first == parts[0][0]
    np.testing.assert_array_equal(t, np.concatenate([p[1] for p in parts]))


def test_unwrap_phase_picks_the_nearest_turn():
    assert unwrap_phase(0.05, 0.95) == pytest.approx(1.05)
    assert unwrap_phase(0.9, 0.1) == pytest.approx(-0.1)
    assert unwrap_phase(0.3, None) == 0.3


def test_spectral_line_phase_matches_the_known_rrc_delay():
    # Oerder & Meyr (IEEE Trans. Commun. 36(5), 1988): the phase of the symbol-rate line of
    # |x|^2 after the matched filter gives the optimum instant. The modulator centres
    # symbol k's pulse at symbol time k + 4 (blocks/_modulate.py, memory 8) and the
    # 8-symbol matched filter adds (len - 1) / 2 samples, so the optimum instant is
    # (k + 4) sps + 25 samples at sps = 6.3.
    sps = 6.3
    x, _, _, _ = received("dqpsk", 4000, sps, pulse="rrc", rolloff=0.35)
    taps = rrc_taps(sps, 0.35, 8)
    y, _ = fir_filter(x, taps)
    z = np.abs(y.astype(np.complex128)) ** 2
    _, state = spectral_line(z, 1 / sps, z.shape[0] + 1)
    expected = ((len(taps) - 1) / 2 / sps) % 1.0
    assert circular_distance(timing_phase(state.window.partial), expected) < 0.01


def test_spectral_line_phase_for_rect_ook_is_the_symbol_end():
    # Rectangular pulses and an integrate-and-dump matched filter: the triangular output
    # peaks on the last sample of each symbol (Proakis & Salehi 2008, ch. 4), 7/8 at 8 sps.
    x, _, _, _ = received("ook", 3000, 8.0, ebn0_db=10.0)
    y, _ = fir_filter(x, rect_taps(8.0))
    z = np.abs(y.astype(np.complex128)) ** 2
    _, state = spectral_line(z, 1 / 8, z.shape[0] + 1)
    assert circular_distance(timing_phase(state.window.partial), 7 / 8) < 0.02


def naive_tone_metric(x, dev, length):
    """Direct reference: the two tone correlators summed sample by sample."""
    n = np.arange(x.shape[0])
    z = np.zeros(x.shape[0])
    for f in (-dev, dev):
        mixed = x * np.exp(-2j * np.pi * f * n)
        for i in range(x.shape[0]):
            z[i] += abs(mixed[max(0, i - length + 1): i + 1].sum()) ** 2
    return z


@settings(max_examples=30, deadline=None)
@given(cuts=chunk_cuts(700))
def test_tone_metric_matches_direct_sums_in_any_chunks(cuts):
    x, _, _, _ = received("2fsk", 90, 8.0, deviation_hz=500.0, ebn0_db=8.0)
    x = x[:700]
    state, parts = None, []
    for piece in split(x, cuts):
        z, state = tone_metric(piece, 500 / 8000, 8, state)
        parts.append(z)
    np.testing.assert_allclose(np.concatenate(parts), naive_tone_metric(x, 500 / 8000, 8),
                               rtol=1e-4, atol=1e-4)


def test_tone_metric_peaks_where_the_correlator_spans_one_symbol():
    # Noiseless continuous-phase 2-FSK, h = 1: a one-symbol correlator aligned with a symbol
    # holds all its energy in one tone (orthogonal tones, Proakis & Salehi 2008, sec. 3.2);
    # the boundary sample is shared by both symbols, so the line peaks half a sample after
    # the last sample of each symbol: (7 + 1/2) / 8 of a symbol.
    x, _, _, _ = received("2fsk", 3000, 8.0, deviation_hz=500.0)
    z, _ = tone_metric(x, 500 / 8000, 8)
    _, state = spectral_line(z, 1 / 8, z.shape[0] + 1)
    assert circular_distance(timing_phase(state.window.partial), 7.5 / 8) < 0.01
