"""The recording sink: writes the stream it receives to a file."""

from __future__ import annotations

from pathlib import Path
from typing import BinaryIO

import numpy as np

from stream.block import Block, Port, StreamSpec
from stream.chunk import Chunk
from stream.errors import ParamError
from stream.params import Param

__all__ = ["Record"]


class Record(Block):
    """Write the incoming samples to a file (raw little-endian complex64 or float32)."""

    kind = "record"
    inputs = (Port("in", ("complex64", "float32"), "samples to record"),)
    params = (
        Param("path", str, doc="output file"),
        Param("format", str, "raw", choices=("raw",), doc="file format"),
        Param("overwrite", bool, True, doc="replace an existing file"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        path = Path(self.p.path)
        if not path.parent.exists():
            raise ParamError("path", f"folder does not exist (got {self.p.path!r})")
        if path.exists() and not self.p.overwrite:
            raise ParamError("path", f"file exists and overwrite is false (got {self.p.path!r})")
        self._file: BinaryIO | None = None
        self._written = 0
        return {}

    def process(self, chunk: Chunk) -> None:
        if self._file is None:
            self._file = open(self.p.path, "wb")  # noqa: SIM115 - closed in finish()
        data = chunk.samples.astype(chunk.samples.dtype.newbyteorder("<"), copy=False)
        self._file.write(memoryview(np.ascontiguousarray(data)).cast("B"))
        self._written += len(chunk)

    def finish(self) -> None:
        if self._file is None:
            self._file = open(self.p.path, "wb")  # noqa: SIM115 - an empty recording
        self._file.close()

    def readings(self) -> dict[str, int | str]:
        return {"samples_written": self._written, "path": self.p.path}
