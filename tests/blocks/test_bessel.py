"""The interpolated Bessel terms of the Rice law against scipy.special (the reference library)."""

from __future__ import annotations

import numpy as np
from scipy.special import i0e, i1e

from blocks._bessel import log_i0, log_i0_and_ratio

# Dense near 0, where I1/I0 ~ x/2, through the knee of the map u = x / (x + 2), out to
# arguments no receiver reaches (1e8 is an on-symbol SNR of some 77 dB).
X = np.concatenate([np.linspace(0.0, 60.0, 400_001), np.geomspace(60.0, 1e8, 20_001),
                    [1e15, 1e17, 1e300]])


def test_log_i0_matches_scipy_to_1e_12() -> None:
    want = np.log(i0e(X)) + X
    got = log_i0(X)
    assert np.all(np.abs(got - want) <= 1e-12 * np.maximum(1.0, np.abs(want)))


def test_ratio_matches_scipy_to_1e_12() -> None:
    want = i1e(X) / i0e(X)
    log, ratio = log_i0_and_ratio(X)
    assert np.all(np.abs(ratio - want) <= 1e-12)
    assert ratio[0] == 0.0
    np.testing.assert_array_equal(log, log_i0(X))


def test_small_arguments_follow_the_series() -> None:
    # Abramowitz & Stegun 9.6.12: I0 = 1 + x^2/4 + ..., I1 = x/2 + x^3/16 + ...
    x = np.array([1e-6, 1e-4, 1e-3])
    log, ratio = log_i0_and_ratio(x)
    np.testing.assert_allclose(ratio, x / 2 - x**3 / 16, rtol=1e-9)
    np.testing.assert_allclose(log, x**2 / 4, rtol=1e-3, atol=1e-15)
