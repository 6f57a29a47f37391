"""Eye kernels: trace grid, phase-free quantities, histogram and eye opening."""

from __future__ import annotations

import math

import numpy as np
import pytest

from blocks._eye import eye_opening, histogram_add, trace_instants, trace_quantity

FS = 40_000.0


def test_trace_instants_span_two_symbols_at_column_centres():
    got = trace_instants(np.array([10.0, 30.5]), 5.0, 4)
    np.testing.assert_allclose(got, [[11.25, 13.75, 16.25, 18.75], [31.75, 34.25, 36.75, 39.25]])


def test_frequency_and_differential_of_a_tone():
    # A tone exp(j 2 pi f n / fs) with a random phase: its phase advance over L samples is
    # 2 pi f L / fs (so the frequency is f), and Re(y conj y(t - L)) = cos(2 pi f L / fs)
    # times the power (common practice), whatever the phase.
    f, n = 1_300.0, np.arange(400)
    x = (2.0 * np.exp(2j * np.pi * f * n / FS + 1.1j)).astype(np.complex64)
    where = np.linspace(20.0, 300.0, 37).reshape(1, -1)
    freq = trace_quantity(x, where, "frequency", 7.5, FS)
    np.testing.assert_allclose(freq, f, rtol=1e-3)
    diff = trace_quantity(x, where, "differential", 12.0, FS)
    np.testing.assert_allclose(diff, 4.0 * math.cos(2 * math.pi * f * 12 / FS), atol=5e-3)
    env = trace_quantity(x, where, "envelope", 0.0, FS)
    np.testing.assert_allclose(env, 2.0, rtol=2e-3)
    with pytest.raises(ValueError, match="quantity"):
        trace_quantity(x, where, "phase", 1.0, FS)


def test_histogram_add_agrees_with_numpy_histogram2d():
    # Reference: numpy.histogram2d over (level, column) with the same edges.
    rng = np.random.default_rng(0)
    values = rng.normal(size=(500, 16)) * 1.5
    counts = np.zeros((12, 16))
    outside = histogram_add(counts, values, -3.0, 3.0)
    cols = np.broadcast_to(np.arange(16), values.shape)
    want, _, _ = np.histogram2d(values.ravel(), cols.ravel(),
                                bins=[np.linspace(-3, 3, 13), np.arange(17) - 0.5])
    inside = (values >= -3) & (values < 3)
    # histogram2d closes its last edge; values exactly at +3 cannot occur with normal draws
    np.testing.assert_array_equal(counts, want)
    assert outside == values.size - np.count_nonzero(inside)


def test_eye_opening_of_two_gaussian_levels():
    # Two levels at -1 and +1 with spread 0.1: opening (2 - 6 * 0.1) / 2 = 0.7 (the
    # definition, common practice); the histogram's bin width adds w^2 / 12 to each
    # variance (Sheppard's correction, from memory), kept small here.
    rng = np.random.default_rng(3)
    levels = np.linspace(-2, 2, 401)[:-1] + 0.005
    counts = np.zeros((400, 8))
    v = np.concatenate([rng.normal(-1, 0.1, 40_000), rng.normal(1, 0.1, 40_000)])
    histogram_add(counts, np.repeat(v[:, None], 8, axis=1), -2.0, 2.0)
    opening, mu0, s0, mu1, s1 = eye_opening(counts, levels, np.array([2, 6]))
    assert (mu0, mu1) == (pytest.approx(-1, abs=0.005), pytest.approx(1, abs=0.005))
    assert s0 == pytest.approx(0.1, rel=0.03) and s1 == pytest.approx(0.1, rel=0.03)
    assert opening == pytest.approx(0.7, abs=0.01)
    # wide spread: closed; empty: no figure
    wide = np.zeros((400, 8))
    spread = np.sign(v) + (v - np.sign(v)) * 4.0                 # same levels, spread 0.4
    histogram_add(wide, np.repeat(spread[:, None], 8, axis=1), -2.0, 2.0)
    assert eye_opening(wide, levels, np.array([2]))[0] == 0.0
    assert math.isnan(eye_opening(np.zeros((400, 8)), levels, np.array([2]))[0])
