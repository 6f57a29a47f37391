"""Tests of the lag-autocorrelation frequency estimator (blocks/_cfo.py)."""

import numpy as np
import pytest
from hypothesis import given, settings

from blocks._cfo import design_lag_estimator, offset_from_correlation, windowed_lag_correlation
from tests.blocks.sync_signals import received
from tests.chunking import chunk_cuts, split

RS = 1000.0
SPS = 7.3
CASES = [
    ("ook", "rrc", {}),
    ("2fsk", "rect", {"deviation_hz": 500.0}),
    ("2fsk", "gaussian", {"deviation_hz": 500.0}),
    ("dbpsk", "rrc", {}),
    ("dqpsk", "rrc", {}),
]


def estimate(x, fs, deviation=0.0, window=None):
    design = design_lag_estimator(fs, RS, 0.25 * RS, deviation)
    _, state = windowed_lag_correlation(x, design, window or x.shape[0] + 1)
    return offset_from_correlation(state.window.partial, design.lag, fs)


def errors(modulation, pulse, design, ebn0_db, trials=8):
    out = []
    for t in range(trials):
        cfo = 0.1 * RS * (1 if t % 2 else -1)
        x, fs, _, _ = received(modulation, 8192, SPS, pulse=pulse, cfo_hz=cfo,
                               ebn0_db=ebn0_db, seed=200 + t, **design)
        out.append((estimate(x, fs, design.get("deviation_hz", 0.0)) - cfo) / RS)
    return np.array(out)


@pytest.mark.parametrize(("modulation", "pulse", "design"), CASES)
def test_offset_of_ten_percent_is_found_at_10_db(modulation, pulse, design):
    # The delay-and-multiply estimate is unbiased for real pulses with zero-mean data and
    # for symmetric 2-FSK (Mengali & D'Andrea, Synchronization Techniques for Digital
    # Receivers, 1997, ch. 3). Bounds: the residual must stay well under 1% of the symbol
    # rate for DPSK (a fraction of a degree of phase per symbol); FSK tolerates more.
    e = errors(modulation, pulse, design, 10.0)
    fsk = modulation == "2fsk"
    assert abs(e.mean()) < (0.006 if fsk else 0.002)
    assert np.sqrt(np.mean(e**2)) < (0.012 if fsk else 0.005)


@pytest.mark.parametrize(("modulation", "pulse", "design"), CASES)
def test_offset_of_ten_percent_is_found_at_0_db(modulation, pulse, design):
    # At Eb/N0 = 0 dB the estimate must still land near the offset (no wrap, no collapse to
    # 0 Hz from noise correlation): every trial within 6% of the symbol rate.
    e = errors(modulation, pulse, design, 0.0)
    assert np.max(np.abs(e)) < 0.06


def test_prefiltered_noise_is_uncorrelated_at_the_lag():
    # The prefilter is a root raised cosine for a "symbol" of L samples, so |H|^2 is a
    # raised-cosine (Nyquist) spectrum and its autocorrelation vanishes at lag L
    # (Proakis & Salehi, Digital Communications, 5th ed., sec. 9.2, Nyquist criterion).
    d = design_lag_estimator(16_000.0, 1000.0, 250.0)
    assert d.lag >= 2
    h = d.taps.astype(np.float64)
    r = np.correlate(h, h, mode="full")[h.shape[0] - 1:]
    assert abs(r[d.lag]) < 0.01 * r[0]


def test_design_keeps_the_offset_unambiguous_and_in_band():
    for fs in (2_700.0, 4_000.0, 8_000.0, 50_000.0):
        d = design_lag_estimator(fs, 1000.0, 300.0)
        assert d.unambiguous_hz > 300.0
        if d.lag > 1:
            assert d.passband_hz >= 1000.0 + 300.0


def test_fsk_lag_keeps_the_tone_turn_below_60_degrees():
    d = design_lag_estimator(100_000.0, 1000.0, 250.0, deviation_hz=5000.0)
    assert 2 * np.pi * 5000.0 * d.lag / 100_000.0 <= np.pi / 3 + 1e-12


def test_noiseless_tone_is_estimated_exactly():
    # A pure complex exponential: angle(sum x[n] x*[n-L]) = 2 pi f L / fs exactly
    # (Mengali & D'Andrea 1997, ch. 3).
    fs = 8000.0
    n = np.arange(20_000)
    x = np.exp(2j * np.pi * 123.4 * n / fs).astype(np.complex64)
    assert estimate(x, fs) == pytest.approx(123.4, abs=1e-3)


@settings(max_examples=30, deadline=None)
@given(cuts=chunk_cuts(6000))
def test_window_sums_do_not_depend_on_chunking(cuts):
    x, fs, _, _ = received("dbpsk", 800, 7.5, pulse="rrc", cfo_hz=80.0, ebn0_db=5.0)
    x = x[:6000]
    d = design_lag_estimator(fs, RS, 250.0)
    whole, _ = windowed_lag_correlation(x, d, 1000)
    state, parts = None, []
    for piece in split(x, cuts):
        s, state = windowed_lag_correlation(piece, d, 1000, state)
        parts.append(s)
    np.testing.assert_allclose(np.concatenate(parts), whole, rtol=1e-6)


def test_errors_name_the_parameter():
    with pytest.raises(ValueError, match="max_offset_hz must be > 0"):
        design_lag_estimator(8000.0, 1000.0, 0.0)
    with pytest.raises(ValueError, match="must be below half the sample rate"):
        design_lag_estimator(2000.0, 1000.0, 500.0)
