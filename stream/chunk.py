"""Chunks: the pieces of a sample stream that travel between blocks.

A chunk is immutable. Its ``start`` is the index of its first sample on the stream of the port
that produced it, so a consumer can tell a continuous stream from one with samples missing.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["DTYPES", "Annotation", "Chunk"]

#: The sample types that may travel on a port, by the name used in port declarations.
DTYPES: dict[str, np.dtype] = {
    "complex64": np.dtype(np.complex64),
    "float32": np.dtype(np.float32),
    "uint8": np.dtype(np.uint8),
    "int16": np.dtype(np.int16),
    "int8": np.dtype(np.int8),
    "float64": np.dtype(np.float64),
}


@dataclass(frozen=True, slots=True)
class Annotation:
    """An event tied to one sample of a stream (the SigMF sense of the word).

    Parameters
    ----------
    index : int
        Absolute sample index on the stream that carries the annotation.
    label : str
        Short name of the event, e.g. ``"packet"``, ``"sync-lost"``, ``"gap"``.
    data : dict
        JSON-serialisable details.
    """

    index: int
    label: str
    data: dict[str, Any] = field(default_factory=dict)

    def moved(self, index: int) -> Annotation:
        """Return the same annotation placed at another sample index."""
        return Annotation(index, self.label, self.data)


@dataclass(frozen=True, slots=True)
class Chunk:
    """A piece of samples in flight.

    Parameters
    ----------
    samples : numpy.ndarray
        One-dimensional array of samples; treated as read-only by every consumer.
    start : int
        Index of ``samples[0]`` on the stream.
    rate : float
        Sample rate of the stream in samples per second.
    annotations : tuple of Annotation
        Events whose index falls inside (or, for end-of-chunk events, at the end of) the chunk.
    port : str or None
        The input port the chunk arrives on; set by the runtime for blocks with several inputs.
    """

    samples: np.ndarray
    start: int
    rate: float
    annotations: tuple[Annotation, ...] = ()
    port: str | None = None

    def __len__(self) -> int:
        return int(self.samples.shape[0])

    @property
    def stop(self) -> int:
        """Index one past the last sample of the chunk."""
        return self.start + int(self.samples.shape[0])

    @property
    def dtype_name(self) -> str:
        """The port-declaration name of the samples' dtype."""
        return self.samples.dtype.name
