"""Tests of the per-thread work arrays and the held-sample buffer (blocks/_scratch.py)."""

import threading

import numpy as np

from blocks._scratch import KEEP_LIMIT, HeldSamples, work_array


def test_shape_and_dtype_are_as_asked():
    a = work_array("test.a", (3, 5), np.complex64)
    assert a.shape == (3, 5) and a.dtype == np.complex64 and a.flags.c_contiguous
    assert work_array("test.a", 7, np.float64).shape == (7,)


def test_a_name_reuses_its_memory_and_names_do_not_overlap():
    a = work_array("test.b", 1000, np.float32)
    b = work_array("test.b", 500, np.float32)
    c = work_array("test.c", 1000, np.float32)
    assert np.shares_memory(a, b)
    assert not np.shares_memory(a, c)


def test_threads_get_their_own_arrays():
    mine = work_array("test.d", 100, np.float64)
    theirs = []
    t = threading.Thread(target=lambda: theirs.append(work_array("test.d", 100, np.float64)))
    t.start()
    t.join(timeout=10)
    assert theirs and not np.shares_memory(mine, theirs[0])


def test_large_requests_are_not_kept():
    count = KEEP_LIMIT // 8 + 1
    a = work_array("test.e", count, np.float64)
    b = work_array("test.e", count, np.float64)
    assert a.shape == (count,) and not np.shares_memory(a, b)


def test_held_samples_match_a_plain_concatenation_through_appends_drops_and_holes():
    # reference: the stream kept whole, sliced at the held range (a plain numpy model)
    rng = np.random.default_rng(3)
    held = HeldSamples()
    stream = np.zeros(0, np.complex64)
    for _ in range(200):
        x = (rng.normal(size=rng.integers(0, 300)) + 1j).astype(np.complex64)
        if rng.random() < 0.1:                          # a hole: restart further on
            hole = int(rng.integers(0, 1_000))
            held.restart(held.end + hole)
            stream = np.concatenate((stream, np.full(hole, np.nan, np.complex64)))
            assert held.samples.shape[0] == 0 and held.start == stream.shape[0]
        held.append(x)
        stream = np.concatenate((stream, x))
        held.drop_before(held.start + int(rng.integers(0, held.samples.shape[0] + 50)))
        assert held.end == stream.shape[0]
        np.testing.assert_array_equal(held.samples, stream[held.start:])
