"""Tests of the stateful FIR filter and polyphase decimator (blocks/_fir.py)."""

import numpy as np
import pytest
from hypothesis import given, settings
from scipy import signal

from blocks._fir import antialias_taps, fir_decimate, fir_filter
from tests.chunking import chunk_cuts, split

RNG = np.random.default_rng(11)
X = (RNG.standard_normal(4000) + 1j * RNG.standard_normal(4000)).astype(np.complex64)


def run_in_pieces(x, taps, factor, cuts):
    state, out = None, []
    for piece in split(x, cuts):
        y, state = fir_decimate(piece, taps, factor, state)
        out.append(y)
    return np.concatenate(out)


@pytest.mark.parametrize("numtaps", [1, 2, 17, 101])
def test_fir_filter_matches_lfilter(numtaps):
    # Reference: scipy.signal.lfilter(h, 1, x) in double precision.
    h = RNG.standard_normal(numtaps)
    y, _ = fir_filter(X, h)
    assert y.dtype == np.complex64
    ref = signal.lfilter(h.astype(np.float32), [1.0], X.astype(np.complex128))
    np.testing.assert_allclose(y, ref, atol=2e-5 * np.sqrt(numtaps))


@settings(max_examples=60, deadline=None)
@given(cuts=chunk_cuts(len(X)))
@pytest.mark.parametrize("factor", [1, 2, 3, 7])
def test_decimate_in_pieces_matches_upfirdn(cuts, factor):
    # Reference: scipy.signal.upfirdn(h, x, 1, M) on the whole signal; chunks of any length,
    # not multiples of the factor, must give the same outputs.
    h = antialias_taps(factor) if factor > 1 else RNG.standard_normal(9)
    got = run_in_pieces(X, h, factor, cuts)
    ref = signal.upfirdn(h.astype(np.float32), X.astype(np.complex128), 1, factor)
    assert got.shape[0] == -(-len(X) // factor)
    np.testing.assert_allclose(got, ref[: got.shape[0]], atol=1e-5)


@pytest.mark.parametrize("factor", [2, 4, 5])
def test_default_design_is_resample_polys_delayed(factor):
    # Reference: scipy.signal.resample_poly(x, 1, M) uses the same Kaiser (beta 5) design with
    # half-length 10 M; our causal output lags it by 10 output samples.
    y, _ = fir_decimate(X, antialias_taps(factor), factor)
    ref = signal.resample_poly(X.astype(np.complex128), 1, factor)
    n = ref.shape[0] - 10
    np.testing.assert_allclose(y[10:10 + n], ref[:n], atol=2e-6)


def test_real_input_stays_real():
    x = RNG.standard_normal(100).astype(np.float32)
    y, _ = fir_decimate(x, antialias_taps(3), 3)
    assert y.dtype == np.float32
    assert y.shape == (34,)


def test_short_chunks_keep_the_output_phase():
    # One sample at a time: outputs appear only at input indices that are multiples of M.
    h = antialias_taps(4)
    state, counts = None, []
    for i in range(12):
        y, state = fir_decimate(X[i:i + 1], h, 4, state)
        counts.append(y.shape[0])
    assert counts == [1, 0, 0, 0] * 3


def test_antialias_cutoff_is_at_the_requested_edge():
    # firwin places the -6 dB point at the cut-off (scipy.signal.firwin documentation).
    h = antialias_taps(4, cutoff=0.2, numtaps=201)
    _, resp = signal.freqz(h, worN=[0.2 * np.pi])
    assert 20 * np.log10(abs(resp[0])) == pytest.approx(-6.02, abs=0.1)


def test_errors_name_the_parameter():
    with pytest.raises(ValueError, match="factor must be an integer >= 1"):
        fir_decimate(X, [1.0], 0)
    with pytest.raises(ValueError, match="cutoff must be in"):
        antialias_taps(2, cutoff=1.5)


@settings(max_examples=40, deadline=None)
@given(cuts=chunk_cuts(len(X)))
@pytest.mark.parametrize(("numtaps", "factor"), [(10, 1), (25, 1), (41, 1), (101, 5), (13, 3)])
def test_pieces_give_exactly_the_whole_output(cuts, numtaps, factor):
    # Every output is summed at the same place of a matrix product of the same shape
    # whatever the chunking, so pieces reproduce the one-shot output to the last bit.
    h = RNG.standard_normal(numtaps)
    whole, _ = fir_decimate(X, h, factor)
    np.testing.assert_array_equal(run_in_pieces(X, h, factor, cuts), whole)
    real, _ = fir_decimate(X.real.copy(), h, factor)
    np.testing.assert_array_equal(run_in_pieces(X.real.copy(), h, factor, cuts), real)
