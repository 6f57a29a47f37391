"""Welch spectrum kernels against scipy.signal.welch (the reference library)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from scipy.signal import welch

from blocks._spectrum import design_window, periodograms, update_average
from tests.chunking import chunk_cuts, split

FS = 48_000.0
RNG = np.random.default_rng(4)
SIGNAL = (RNG.normal(size=6000) + 1j * RNG.normal(size=6000)).astype(np.complex64)


def welch_average(x: np.ndarray, nfft: int, hop: int, pieces=None) -> np.ndarray:
    win, scale, _ = design_window(nfft, FS)
    state, avg, count = None, None, 0
    for piece in pieces if pieces is not None else [x]:
        power, state = periodograms(piece, win, hop, state)
        avg, count = update_average(avg, count, power, 0)
    return avg * scale


@pytest.mark.parametrize("dtype", [np.complex64, np.float32])
@pytest.mark.parametrize(("nfft", "hop"), [(256, 128), (128, 128), (100, 33), (101, 40)])
def test_equal_weight_average_is_scipy_welch(dtype, nfft, hop):
    # scipy.signal.welch: Hann (periodic) window, density scaling, two-sided, no detrending.
    x = SIGNAL.real.astype(dtype) if dtype == np.float32 else SIGNAL
    _, want = welch(x.astype(np.complex128), FS, window="hann", nperseg=nfft,
                    noverlap=nfft - hop, detrend=False, return_onesided=False,
                    scaling="density")
    np.testing.assert_allclose(welch_average(x, nfft, hop), want, rtol=1e-5)


@settings(max_examples=25, deadline=None)
@given(cuts=chunk_cuts(len(SIGNAL)))
def test_periodograms_do_not_depend_on_chunking(cuts):
    np.testing.assert_allclose(welch_average(SIGNAL, 256, 96, split(SIGNAL, cuts)),
                               welch_average(SIGNAL, 256, 96), rtol=1e-9)


def test_exponential_average_matches_a_segment_by_segment_loop():
    # Naive reference: equal weight until k segments, then P <- P + (S - P) / k.
    rng = np.random.default_rng(1)
    power = rng.random((40, 8))
    k = 6
    want = np.zeros(8)
    for n, row in enumerate(power, start=1):
        want = want + (row - want) / min(n, k)
    got, count = None, 0
    for piece in (power[:3], power[3:4], power[4:25], power[25:]):
        got, count = update_average(got, count, piece, k)
    assert count == 40
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_window_scale_and_noise_bandwidth():
    # Hann window: equivalent noise bandwidth 1.5 bins (common practice).
    win, scale, enbw = design_window(1024, FS)
    assert enbw == pytest.approx(1.5 * FS / 1024, rel=1e-9)
    assert scale == pytest.approx(1 / (FS * np.sum(win ** 2)))
    with pytest.raises(ValueError, match="nfft"):
        design_window(1, FS)
    with pytest.raises(ValueError, match="hop"):
        periodograms(SIGNAL, win, 0)
