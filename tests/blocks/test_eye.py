"""Eye kernels: trace starts and grid, phase-free quantities, histogram, eye opening and Q."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.interpolate import lagrange

from blocks._eye import (
    eye_opening,
    histogram_add,
    q_factor,
    trace_instants,
    trace_quantity,
    trace_starts,
)

FS = 40_000.0


def test_trace_instants_span_two_symbols_at_column_centres():
    got = trace_instants(np.array([10.0, 30.5]), 5.0, 4)
    np.testing.assert_allclose(got, [[11.25, 13.75, 16.25, 18.75], [31.75, 34.25, 36.75, 39.25]])
    # columns before the first continue the same grid, and ``out`` receives the same values
    out = np.empty((2, 6))
    wider = trace_instants(np.array([10.0, 30.5]), 5.0, 4, before=2, out=out)
    assert wider is out
    np.testing.assert_allclose(wider[:, 2:], got)
    np.testing.assert_allclose(wider[:, :2], [[6.25, 8.75], [26.75, 29.25]])


def window_by_window_starts(theta, first, window, sps, most):
    """Naive reference: each window's even strobes, thinned with numpy.linspace."""
    starts, windows = [], []
    for w, th in enumerate(theta):
        a, b = first + w * window, first + (w + 1) * window
        k0 = math.ceil(a / sps - th)
        k = np.arange(k0 + k0 % 2, math.ceil(b / sps - th), 2, dtype=np.float64)
        if most and k.shape[0] > most:
            k = k[np.linspace(0, k.shape[0] - 1, most).round().astype(np.int64)]
        starts.append((k + th) * sps - 0.5 * sps)
        windows.append(np.full(k.shape[0], w))
    return np.concatenate(starts), np.concatenate(windows)


@pytest.mark.parametrize("most", [0, 1, 5, 32, 1000])
@pytest.mark.parametrize(("window", "sps"), [(1333, 50_000 / 9_600), (40, 6.3), (7, 2.0)])
def test_trace_starts_agree_with_a_window_by_window_reference(most, window, sps):
    theta = np.random.default_rng(window + most).uniform(-0.5, 0.5, 23)
    first = 17 * window
    got, windows = trace_starts(theta, first, window, sps, most)
    want, want_windows = window_by_window_starts(theta, first, window, sps, most)
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(windows, want_windows)


def lagrange_at(x: np.ndarray, t: float) -> complex:
    """Reference: the cubic through the four samples around ``t`` (scipy.interpolate)."""
    m = math.floor(t)
    nodes = np.arange(m - 1, m + 3)
    return complex(lagrange(nodes - m, x[nodes].real)(t - m),
                   lagrange(nodes - m, x[nodes].imag)(t - m))


@pytest.mark.parametrize("time_bins", [64, 50, 9])
def test_trace_quantity_agrees_with_a_lagrange_reference(time_bins):
    # The grid values against the cubic through the four neighbours of each instant
    # (scipy.interpolate.lagrange), the quantities by their definitions (module notes). With
    # 64 columns the second instants are columns of the same grid, with 50 (frequency) and 9
    # they are interpolated on their own.
    rng = np.random.default_rng(time_bins)
    x = (rng.normal(size=300) + 1j * rng.normal(size=300)).astype(np.complex64)
    sps = 6.3
    starts = np.array([20.4, 61.0, 130.77, 250.1])
    instants = trace_instants(starts, sps, time_bins)
    for quantity, lag in (("envelope", 0.0), ("differential", sps), ("frequency", sps / 2)):
        got = trace_quantity(x, starts, sps, time_bins, quantity, lag, FS)
        assert got.shape == (4, time_bins)
        now = np.array([[lagrange_at(x, t) for t in row] for row in instants])
        if quantity == "envelope":
            want = np.abs(now)
        else:
            prod = now * np.conj([[lagrange_at(x, t - lag) for t in row] for row in instants])
            want = prod.real if quantity == "differential" else \
                np.angle(prod) * FS / (2 * math.pi * lag)
        np.testing.assert_allclose(got, want, atol=1e-5 * np.abs(want).max(), err_msg=quantity)


def test_frequency_and_differential_of_a_tone():
    # A tone exp(j 2 pi f n / fs) with a random phase: its phase advance over L samples is
    # 2 pi f L / fs (so the frequency is f), and Re(y conj y(t - L)) = cos(2 pi f L / fs)
    # times the power (common practice), whatever the phase.
    f, n = 1_300.0, np.arange(400)
    x = (2.0 * np.exp(2j * np.pi * f * n / FS + 1.1j)).astype(np.complex64)
    starts = np.linspace(20.0, 300.0, 6)
    sps = 15.0
    freq = trace_quantity(x, starts, sps, 32, "frequency", 7.5, FS)
    np.testing.assert_allclose(freq, f, rtol=1e-3)
    diff = trace_quantity(x, starts, sps, 32, "differential", 12.0, FS)
    np.testing.assert_allclose(diff, 4.0 * math.cos(2 * math.pi * f * 12 / FS), atol=5e-3)
    env = trace_quantity(x, starts, sps, 32, "envelope", 0.0, FS)
    np.testing.assert_allclose(env, 2.0, rtol=2e-3)
    with pytest.raises(ValueError, match="quantity"):
        trace_quantity(x, starts, sps, 32, "phase", 1.0, FS)


def test_histogram_add_agrees_with_numpy_histogram2d():
    # Reference: numpy.histogram2d over (level, column) with the same edges, unweighted and
    # with a weight per trace.
    rng = np.random.default_rng(0)
    values = rng.normal(size=(500, 16)) * 1.5
    cols = np.broadcast_to(np.arange(16), values.shape)
    edges = [np.linspace(-3, 3, 13), np.arange(17) - 0.5]
    inside = (values >= -3) & (values < 3)
    # histogram2d closes its last edge; values exactly at +3 cannot occur with normal draws
    counts = np.zeros((12, 16))
    outside = histogram_add(counts, values, -3.0, 3.0)
    want, _, _ = np.histogram2d(values.ravel(), cols.ravel(), bins=edges)
    np.testing.assert_array_equal(counts, want)
    assert outside == values.size - np.count_nonzero(inside)
    weights = 0.9 ** rng.integers(0, 30, 500)
    weighted = np.ones((12, 16))
    outside = histogram_add(weighted, values, -3.0, 3.0, weights)
    want, _, _ = np.histogram2d(values.ravel(), cols.ravel(), bins=edges,
                                weights=np.repeat(weights, 16))
    np.testing.assert_allclose(weighted, want + 1.0, rtol=1e-12)
    assert outside == values.size - np.count_nonzero(inside)
    # NaN and infinite values count as outside
    odd = np.zeros((12, 16))
    assert histogram_add(odd, np.array([[np.nan, np.inf, -np.inf, 0.0] * 4]), -3, 3) == 12
    assert odd.sum() == 4


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


def test_q_factor_of_a_shut_eye_predicts_the_error_fraction_of_gaussian_levels():
    # Levels -1 (spread 0.3) and +1 (spread 0.5): the 3-sigma opening is shut, Q = 2 / 0.8 =
    # 2.5. At the threshold (s1 mu0 + s0 mu1) / (s0 + s1) each level errs with probability
    # Q(2.5) (Personick 1973, from memory), here scipy.stats.norm.sf, and the sampled levels'
    # error fractions agree with it.
    rng = np.random.default_rng(8)
    low, high = rng.normal(-1, 0.3, 200_000), rng.normal(1, 0.5, 200_000)
    levels = np.linspace(-4, 4, 801)[:-1] + 0.005
    counts = np.zeros((800, 4))
    histogram_add(counts, np.repeat(np.concatenate([low, high])[:, None], 4, axis=1), -4.0, 4.0)
    opening, mu0, s0, mu1, s1 = eye_opening(counts, levels, np.array([1]))
    assert opening == 0.0
    q = q_factor(mu0, s0, mu1, s1)
    # the two-means cut assigns the far tails to the wrong level: a few per cent off
    assert q == pytest.approx(2.5, rel=0.04)
    threshold = (0.5 * -1 + 0.3 * 1) / 0.8
    errors = (np.count_nonzero(low > threshold) + np.count_nonzero(high < threshold)) / 400_000
    assert errors == pytest.approx(stats.norm.sf(2.5), rel=0.05)
    assert stats.norm.sf(q) == pytest.approx(errors, rel=0.12)
    # no spread: infinite; reversed or missing levels: no figure
    assert q_factor(-1.0, 0.0, 1.0, 0.0) == math.inf
    assert math.isnan(q_factor(1.0, 0.1, -1.0, 0.1))
    assert math.isnan(q_factor(math.nan, math.nan, math.nan, math.nan))
