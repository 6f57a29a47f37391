"""The ``record`` sink: writes the stream it receives as a SigMF recording or a raw file.

A SigMF recording is a ``.sigmf-data`` file of samples and a ``.sigmf-meta`` file describing it
(datatype, sample rate, captures, annotations). The metadata is rewritten every few seconds of
recorded data and at the end, each time to a temporary file renamed over the old one after the
data it describes has been flushed; a run that is killed therefore leaves a pair that agrees for
everything up to the last rewrite, and Ctrl-C (which ends the stream cleanly) leaves it whole.

Each discontinuity of the input (a ``"gap"`` annotation, or a chunk whose ``start`` does not
continue the one before) starts a new capture segment whose ``core:global_index`` is the input
stream's index there. Other annotations (``"packet"``, ``"sync-lost"``, ...) become SigMF
annotations; their details go under the optional ``phasefree:data`` key.

Events from further down the receive chain (a framer's ``payload`` port, a detector's bits)
come in on the optional ``events`` port, which may run at another rate than the samples; only
their annotations are used. Each is placed on the recording by time: an event at index ``i`` of
an events stream at rate ``r`` happened ``i / r`` seconds into the stream, which is input sample
``round(i / r * sample_rate)``, found in the dataset through the captures' global indices.
An event that carries its own ``time_s`` (a framer's packet: the time of its sync word's first
bit on the detector's bit stream) is placed by that instead, since a packet annotation sits on
the payload stream, whose index is no clock. A packet's ``core:sample_count`` spans its sync
word, length byte, payload and CRC-16 (``payload_start - start + payload_bits + 16`` bits at
the events' rate, the bit rate); other events mark one sample. The placement is approximate
by the latency of the receive chain between the recorded samples and the events (the delays
of its filters and of timing recovery: a few symbols), and events falling in a gap between
captures go to the first sample after it.
"""

from __future__ import annotations

import bisect
import json
import logging
import math
import os
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from blocks._packets import CRC_BITS
from blocks._sampleformat import encode_samples, parse_datatype
from blocks._sigmf import DATA_KEY, metadata_document, sigmf_paths, write_metadata
from stream.block import Block, Port, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from stream.params import Param

__all__ = ["Record"]

log = logging.getLogger(__name__)


def _number(value: Any) -> float | None:
    """``value`` as a finite number, or None."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


class Record(Block):
    """Write the incoming samples to a SigMF recording or a raw sample file.

    Annotations arriving on the optional ``events`` port (any rate, e.g. a framer's
    ``payload``) are written too, placed on the recording by their time; that placement is
    approximate by the receive chain's latency (its filter delays: a few symbols).
    """

    kind = "record"
    mixed_rates = True
    inputs = (
        Port("in", ("complex64", "float32"), "samples to record"),
        Port("events", "any", "annotations to record (e.g. a framer's payload port), placed by "
             "time: approximate by the receive chain's latency, a few symbols", optional=True),
    )
    params = (
        Param("path", str, doc="sigmf: base name, .sigmf-meta or .sigmf-data; raw: the file"),
        Param("format", str, "sigmf", choices=("sigmf", "raw"),
              doc="sigmf (data and metadata files) or raw (samples only)"),
        Param("datatype", str, None,
              doc="SigMF datatype stored: cf32_le (default; rf32_le for real input), ci16_le, "
                  "ci8, cu8, ..."),
        Param("frequency_hz", float, None, unit="Hz",
              doc="center frequency written in every capture (core:frequency)"),
        Param("description", str, "", doc="core:description of the recording"),
        Param("metadata_every_s", float, 5.0, unit="s", low=0, low_open=True,
              doc="seconds of recorded data between metadata rewrites"),
        Param("overwrite", bool, True, doc="replace an existing recording"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        spec = inputs["in"]
        is_complex = spec.dtype == "complex64"
        name = self.p.datatype or ("cf32_le" if is_complex else "rf32_le")
        try:
            self._fmt = parse_datatype(name)
        except ValueError as err:
            raise ParamError("datatype", str(err)) from None
        if self._fmt.is_complex != is_complex:
            need = "complex (c...)" if is_complex else "real (r...)"
            raise ParamError("datatype", f"a {spec.dtype} input needs a {need} datatype "
                             f"(got {name!r})")
        if self.p.format == "sigmf":
            self._meta, self._data = sigmf_paths(self.p.path)
        else:
            self._meta, self._data = None, Path(self.p.path)
        for target in (self._data, self._meta):
            if target is None:
                continue
            if not target.parent.exists():
                raise ParamError("path", f"folder does not exist (got {self.p.path!r})")
            if target.exists() and not self.p.overwrite:
                raise ParamError("path", f"{target} exists and overwrite is false")
        self._rate = spec.rate
        events = inputs.get("events")
        if events is not None and not events.rate > 0:
            raise ParamError("events", f"input rate must be > 0 (got {events.rate!r})")
        self._every = max(1, round(self.p.metadata_every_s * spec.rate))
        self._file: BinaryIO | None = None
        self._written = 0
        self._described = 0
        self._expected: int | None = None
        self._captures: list[dict[str, Any]] = []
        self._notes: list[dict[str, Any]] = []
        self._clipped = 0
        self._nonfinite = 0
        self._undescribed = 0
        return {}

    # -- writing ----------------------------------------------------------------------------
    def _open(self) -> BinaryIO:
        if self._meta is not None and self._meta.exists():
            os.remove(self._meta)        # never pair an old description with new data
        out = open(self._data, "wb")  # noqa: SIM115 - closed in finish()
        self._file = out
        return out

    def process(self, chunk: Chunk) -> None:
        if chunk.port == "events":
            for note in chunk.annotations:
                if note.label != "gap":          # gaps come from the recorded stream itself
                    self._event(note, chunk.rate)
            return
        out = self._file or self._open()
        if self._expected is None or chunk.start != self._expected:
            self._new_capture(self._written, chunk.start)
        for note in chunk.annotations:
            self._note(note, chunk)
        stored, clipped, nonfinite = encode_samples(chunk.samples, self._fmt)
        self._clipped += clipped
        self._nonfinite += nonfinite
        out.write(memoryview(stored.view(np.uint8)))
        self._written += len(chunk)
        self._expected = chunk.stop
        if self._meta is not None and self._written - self._described >= self._every:
            self._describe()

    def _new_capture(self, sample_start: int, stream_index: int) -> None:
        capture: dict[str, Any] = {"core:sample_start": sample_start,
                                   "core:global_index": stream_index}
        if self.p.frequency_hz is not None:
            capture["core:frequency"] = self.p.frequency_hz
        if self._captures and self._captures[-1]["core:sample_start"] == sample_start:
            self._captures[-1] = capture
        else:
            self._captures.append(capture)

    def _note(self, note: Annotation, chunk: Chunk) -> None:
        at = max(0, self._written + note.index - chunk.start)
        if note.label == "gap":
            if chunk.start <= note.index < chunk.stop:
                self._new_capture(at, note.index)
            return
        count = note.data.get("sample_count") if isinstance(note.data, dict) else None
        if isinstance(count, bool) or not isinstance(count, int) or count < 0:
            count = 1       # an event marks the sample it happened at
        self._add_note(note, at, count)

    def _event(self, note: Annotation, rate: float) -> None:
        """Place an annotation of the events stream (at ``rate``) on the recording by time."""
        data = note.data if isinstance(note.data, dict) else {}
        when = _number(data.get("time_s"))
        stream_index = round((note.index / rate if when is None else when) * self._rate)
        count = 1
        if note.label == "packet":
            fields = [_number(data.get(k)) for k in ("start", "payload_start", "payload_bits")]
            if None not in fields:
                start, payload_start, payload_bits = fields
                bits = payload_start - start + payload_bits + CRC_BITS
                count = max(1, round(bits / rate * self._rate))
        self._add_note(note, self._dataset_index(stream_index), count)

    def _dataset_index(self, stream_index: int) -> int:
        """The recording's sample index of the input stream's ``stream_index``."""
        if not self._captures:
            return max(0, stream_index)
        starts = [c["core:global_index"] for c in self._captures]
        k = max(0, bisect.bisect_right(starts, stream_index) - 1)
        capture = self._captures[k]
        at = capture["core:sample_start"] + stream_index - capture["core:global_index"]
        if k + 1 < len(self._captures):
            at = min(at, self._captures[k + 1]["core:sample_start"])
        return max(0, at)

    def _add_note(self, note: Annotation, at: int, count: int) -> None:
        entry: dict[str, Any] = {"core:sample_start": at, "core:sample_count": count,
                                 "core:label": str(note.label)}
        try:
            json.dumps(note.data, allow_nan=False)
        except (TypeError, ValueError):
            self._undescribed += 1
        else:
            if note.data:
                entry[DATA_KEY] = note.data
        self._notes.append(entry)

    def _describe(self) -> None:
        """Flush the data, then replace the metadata with one describing exactly that data."""
        assert self._file is not None and self._meta is not None
        self._file.flush()
        os.fsync(self._file.fileno())
        doc = metadata_document(self._fmt.name, self._rate, self._captures, self._notes,
                                self.p.description)
        write_metadata(self._meta, doc)
        self._described = self._written

    def finish(self) -> None:
        if self._file is None:
            self._open()            # an empty recording is still a valid pair
            self._new_capture(0, 0)
        if self._meta is not None:
            self._describe()
        assert self._file is not None
        self._file.close()
        if self._clipped:
            log.warning("%s: %d samples clipped to the %s range", self._data, self._clipped,
                        self._fmt.name)
        if self._nonfinite:
            log.warning("%s: %d samples were NaN or infinite", self._data, self._nonfinite)
        if self._undescribed:
            log.warning("%s: details of %d annotations were not JSON and were left out",
                        self._data, self._undescribed)

    def readings(self) -> dict[str, int | str]:
        return {"samples_written": self._written, "path": self.p.path,
                "datatype": self._fmt.name, "clipped": self._clipped,
                "nonfinite": self._nonfinite, "captures": len(self._captures),
                "annotations": len(self._notes)}
