"""Tests of the absolute-index window sums (blocks/_windows.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from blocks._windows import sum_windows
from tests.chunking import chunk_cuts, split


@settings(max_examples=80, deadline=None)
@given(cuts=chunk_cuts(1000), window=st.integers(1, 300))
def test_sums_match_reshape_reference(cuts, window):
    # Reference: numpy reshape of the whole signal into rows of W and a row sum.
    v = np.random.default_rng(3).standard_normal(1000) + 0.5j
    state, sums = None, []
    for piece in split(v, cuts):
        s, state = sum_windows(
            piece.shape[0], window, lambda a, b, p=piece: complex(p[a:b].sum()),
            lambda a, k, p=piece: p[a:a + k * window].reshape(k, window).sum(axis=1), state)
        sums.append(s)
    got = np.concatenate(sums)
    full = 1000 // window
    ref = v[: full * window].reshape(full, window).sum(axis=1)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(state.partial, v[full * window:].sum(), atol=1e-12)
    assert state.filled == 1000 - full * window


def test_window_must_be_positive():
    with pytest.raises(ValueError, match="window must be >= 1"):
        sum_windows(10, 0, lambda a, b: 0j, lambda a, k: np.zeros(k))
