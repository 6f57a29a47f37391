"""Chunk-size invariance: helpers that feed a block a signal in pieces and compare.

Every stateful block must give the same output whatever the chunk boundaries. Tests use
``chunk_cuts`` (a hypothesis strategy choosing boundaries) with ``assert_chunk_invariant``::

    @given(cuts=chunk_cuts(len(SIGNAL)))
    def test_gain_is_chunk_invariant(cuts):
        assert_chunk_invariant(lambda: make_block("gain", gain_db=6), SIGNAL, 48_000.0, cuts)
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from itertools import pairwise
from typing import Any

import numpy as np
from hypothesis import strategies as st

from stream import registry
from stream.block import Block, StreamSpec
from stream.chunk import Annotation, Chunk

__all__ = ["assert_chunk_invariant", "chunk_cuts", "make_block", "run_block", "split"]


def make_block(kind: str, block_id: str = "", **params: Any) -> Block:
    """Build a registered block kind with parameters (not yet configured)."""
    cls = registry.lookup(kind)
    if cls is None:
        raise KeyError(f"unknown kind {kind!r}")
    return cls(block_id or kind, **params)


def split(signal: np.ndarray, cuts: Sequence[int]) -> list[np.ndarray]:
    """Split ``signal`` at the sorted, de-duplicated positions ``cuts``."""
    edges = [0, *sorted({c for c in cuts if 0 < c < len(signal)}), len(signal)]
    return [signal[a:b] for a, b in pairwise(edges)]


def run_block(block: Block, pieces: Sequence[np.ndarray], rate: float,
              annotations: Sequence[Annotation] = (), port: str | None = None,
              starts: Sequence[int] | None = None,
              ) -> tuple[dict[str, np.ndarray], dict[str, list[Annotation]]]:
    """Configure ``block`` for one input stream, feed ``pieces`` in order, then finish.

    Parameters
    ----------
    block : Block
        A fresh block (not configured).
    pieces : sequence of numpy.ndarray
        Consecutive pieces of the input signal.
    rate : float
        Input sample rate.
    annotations : sequence of Annotation
        Input annotations (absolute indices); each goes with the piece that holds its index.
    port : str or None
        Input port name (None: the block's only input).
    starts : sequence of int, optional
        Absolute index of each piece's first sample (default: each piece right after the
        one before, from 0); a jump is a hole in the stream, as a tap that dropped chunks
        leaves.

    Returns
    -------
    outputs : dict
        Each output port's concatenated samples.
    notes : dict
        Each output port's annotations, in order.
    """
    in_port = type(block).port("in", port).name
    dtype = pieces[0].dtype.name if pieces else "complex64"
    block.configure({in_port: StreamSpec(dtype, rate)})
    got: dict[str, list[np.ndarray]] = {name: [] for name in block.output_specs}
    notes: dict[str, list[Annotation]] = {name: [] for name in block.output_specs}

    def drain() -> None:
        for name, chunk in block.take_output():
            got[name].append(chunk.samples)
            notes[name].extend(chunk.annotations)

    start = 0
    for i, piece in enumerate(pieces):
        start = start if starts is None else int(starts[i])
        stop = start + len(piece)
        mine = tuple(a for a in annotations if start <= a.index < stop)
        piece = piece.copy()
        piece.setflags(write=False)
        block.deliver(Chunk(piece, start, rate, mine, in_port))
        drain()
        start = stop
    block.finish()
    drain()
    outputs = {}
    for name, parts in got.items():
        dt = block.output_specs[name].dtype
        outputs[name] = np.concatenate(parts) if parts else np.zeros(0, dtype=dt)
    return outputs, notes


def chunk_cuts(length: int, max_cuts: int = 12) -> st.SearchStrategy[list[int]]:
    """Hypothesis strategy: up to ``max_cuts`` boundaries inside a signal of ``length``."""
    return st.lists(st.integers(min_value=1, max_value=max(1, length - 1)), max_size=max_cuts)


def assert_chunk_invariant(make: Callable[[], Block], signal: np.ndarray, rate: float,
                           cuts: Sequence[int], rtol: float = 1e-5, atol: float = 1e-6,
                           annotations: Sequence[Annotation] = ()) -> dict[str, np.ndarray]:
    """Assert that ``make()`` gives the same output for ``signal`` whole and cut at ``cuts``.

    Returns the whole-signal outputs so the caller can check them further.
    """
    whole, whole_notes = run_block(make(), [signal], rate, annotations)
    parts, parts_notes = run_block(make(), split(signal, cuts), rate, annotations)
    for name in whole:
        a, b = whole[name], parts[name]
        assert a.shape == b.shape, f"port {name}: {a.shape} whole vs {b.shape} in chunks"
        if a.dtype.kind in "fc":
            np.testing.assert_allclose(b, a, rtol=rtol, atol=atol, err_msg=f"port {name}")
        else:
            np.testing.assert_array_equal(b, a, err_msg=f"port {name}")
        assert [(n.index, n.label) for n in whole_notes[name]] == \
            [(n.index, n.label) for n in parts_notes[name]], f"port {name} annotations"
    return whole
