"""The ``recording`` source: plays a SigMF recording or a bare sample file into a pipeline.

The data file is memory-mapped and read one chunk at a time, so a recording of any size plays
in constant memory. Integer samples become floats by the rule in ``blocks/_sampleformat.py``
(signed ``v / 2**(N-1)``, unsigned ``(v - m) / m`` with ``m = (2**N - 1) / 2``); complex
datatypes play as complex64, real ones as float32.

Discontinuities are marked, never hidden: every SigMF capture segment after the first, and
every restart of a looping recording, puts a ``"gap"`` annotation on its first sample, so the
detectors, framer and BER meter restart there. SigMF annotations in the file travel downstream
as annotations (label ``core:label``, or ``"sigmf"``).
"""

from __future__ import annotations

import bisect
import logging
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from blocks._sampleformat import SampleFormat, decode_samples, parse_datatype
from blocks._sigmf import (
    DATA_SUFFIX,
    META_SUFFIX,
    Capture,
    Description,
    Segment,
    layout,
    read_metadata,
    sigmf_paths,
)
from stream.block import Port, Source, StreamSpec
from stream.chunk import Annotation
from stream.errors import ParamError
from stream.params import Param

__all__ = ["RecordingSource"]

log = logging.getLogger(__name__)


class RecordingSource(Source):
    """Play a SigMF recording or a bare sample file, in chunks, once or looping."""

    kind = "recording"
    outputs = (Port("out", ("complex64", "float32"),
                    "the recorded samples (complex64 for IQ datatypes, float32 for real)"),)
    params: ClassVar[tuple[Param, ...]] = (
        *Source.common_params,
        Param("path", str, doc="a .sigmf-meta or .sigmf-data file, or a bare sample file"),
        Param("datatype", str, None,
              doc="SigMF datatype of a bare file: cf32_le, ci16_le, ci8, cu8, ... "
                  "(SigMF recordings: from the metadata)"),
        Param("frequency_hz", float, None, unit="Hz",
              doc="center frequency of a bare file (SigMF recordings: from the captures)"),
        Param("offset", int, 0, unit="samples", low=0,
              doc="samples skipped at the start of the recording"),
        Param("loop", bool, False,
              doc="play again from offset at the end (a gap annotation marks each restart)"),
    )

    # -- prepare once ---------------------------------------------------------------------
    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        try:
            data, info = self._describe()
            self._open(data, info)
        except ParamError:
            raise
        except ValueError as err:
            raise ParamError("path", str(err)) from None
        except OSError as err:
            raise ParamError("path", f"cannot read {err.filename or self.p.path}: "
                             f"{err.strerror or err}") from None
        self._rate = self._choose_rate(info.sample_rate)
        self._pos = self.p.offset
        self._loops = 0
        self._read = 0
        return {"out": StreamSpec(self._fmt.output, self._rate)}

    @property
    def rate(self) -> float:
        """Sample rate: the metadata's ``core:sample_rate``, else the ``sample_rate`` param."""
        return getattr(self, "_rate", None) or super().rate

    def _describe(self) -> tuple[Path, Description]:
        """Find the data file and its description (metadata, or the bare-file parameters)."""
        path = Path(self.p.path)
        meta, data = sigmf_paths(path)
        if path.suffix == ".sigmf":
            raise ValueError(f"{path}: SigMF archives are not read directly; unpack it "
                             f"(tar -xf) and give the .sigmf-meta file")
        is_sigmf = path.suffix == META_SUFFIX or (
            meta.is_file() and (path.suffix == DATA_SUFFIX or not path.is_file()))
        if not is_sigmf:
            if path.suffix == DATA_SUFFIX and self.p.datatype is None:
                raise ValueError(f"{path}: its metadata {meta.name} is missing; give datatype "
                                 f"and sample_rate to read it as a bare file")
            if self.p.datatype is None:
                raise ParamError("datatype", f"is required for a bare file such as "
                                 f"{str(path)!r} (SigMF names: cf32_le, ci16_le, ci8, cu8, ...)")
            parse_datatype(self.p.datatype)
            self._meta_path: Path | None = None
            return path, Description(self.p.datatype, None,
                                     (Capture(0, frequency=self.p.frequency_hz),), (), None, 0)
        info = read_metadata(meta)
        if self.p.datatype is not None and self.p.datatype != info.datatype:
            raise ParamError("datatype", f"{meta} says core:datatype {info.datatype!r}; leave "
                             f"datatype out for SigMF recordings (got {self.p.datatype!r})")
        if self.p.frequency_hz is not None:
            raise ParamError("frequency_hz", f"SigMF recordings take the center frequency from "
                             f"their captures; leave it out (got {self.p.frequency_hz:g})")
        self._meta_path = meta
        return (meta.with_name(info.dataset) if info.dataset else data), info

    def _open(self, data: Path, info: Description) -> None:
        """Map the data file, lay out its captures, and index the events to emit."""
        fmt = self._fmt = parse_datatype(info.datatype)
        size = data.stat().st_size
        segments, partial = layout(info.captures, fmt.sample_bytes, size, info.trailing_bytes)
        self._segments = segments
        self._starts = [s.first for s in segments]
        self._total = sum(s.count for s in segments)
        self._data_path = data
        self._partial = partial
        self._shortfall = (fmt.sample_bytes - partial) % fmt.sample_bytes
        if partial:
            log.warning("%s: %d bytes after the last whole sample are not read (%s samples are "
                        "%d bytes): the file looks truncated", data, partial, fmt.name,
                        fmt.sample_bytes)
        kept = sum(s.capture is not None for s in segments)
        if kept < len(info.captures):
            log.warning("%s: the data ends before capture %d; %d later capture(s) ignored",
                        data, kept, len(info.captures) - kept)
        if self.p.offset >= self._total and self._total:
            raise ParamError("offset", f"must be below the recording's {self._total} samples "
                             f"(got {self.p.offset})")
        # one read-only map of the whole file; chunks are copied out of it as they are played
        self._bytes = (np.asarray(np.memmap(data, dtype=np.uint8, mode="r")) if size
                       else np.zeros(0, np.uint8))
        self._captures = info.captures
        self._capture_starts = [c.sample_start for c in info.captures]
        self._events = self._index_events(info)

    def _index_events(self, info: Description) -> list[tuple[int, int, Annotation]]:
        """(dataset index, order, annotation) of every gap and file annotation to emit."""
        events: list[tuple[int, int, Annotation]] = []
        caps = info.captures
        for k in range(1, len(caps)):
            cap, prev = caps[k], caps[k - 1]
            if not self.p.offset < cap.sample_start < self._total:
                continue
            # SigMF: a missing core:global_index counts as equal to core:sample_start
            here = cap.sample_start if cap.global_index is None else cap.global_index
            before = prev.sample_start if prev.global_index is None else prev.global_index
            data: dict[str, Any] = {"reason": "capture", "capture": k,
                                    "sample_start": cap.sample_start, "global_index": here,
                                    "samples_missing": (here - before)
                                    - (cap.sample_start - prev.sample_start)}
            if cap.frequency is not None:
                data["frequency_hz"] = cap.frequency
            events.append((cap.sample_start, 0, Annotation(0, "gap", data)))
        dropped = 0
        for note in info.annotations:
            if note.index >= self._total:
                dropped += 1
            elif note.index >= self.p.offset:
                events.append((note.index, 1, note))
        if dropped:
            log.warning("%s: %d annotation(s) start after the data's last sample; not played",
                        self._meta_path, dropped)
        events.sort(key=lambda e: (e[0], e[1]))
        self._event_index = [e[0] for e in events]
        return events

    def _choose_rate(self, file_rate: float | None) -> float:
        given = self.p.sample_rate
        if file_rate is None:
            if given is None:
                where = f"{self._meta_path} has no core:sample_rate" if self._meta_path else \
                    "a bare file carries none"
                raise ParamError("sample_rate", f"is required: {where} (set sample_rate on the "
                                 f"block or as pipeline.sample_rate)")
            return float(given)
        if given is not None and abs(given - file_rate) > 1e-9 * file_rate:
            log.warning("%s: playing at the recording's core:sample_rate %g; sample_rate %g "
                        "ignored", self._meta_path, file_rate, given)
        return file_rate

    # -- apply many -----------------------------------------------------------------------
    def produce(self) -> bool:
        want = self.p.chunk_size
        out = self.position()
        parts: list[np.ndarray] = []
        notes: list[Annotation] = []
        while want > 0:
            if self._pos >= self._total:
                if not self.p.loop or self._total == 0:
                    break
                self._pos = self.p.offset
                self._loops += 1
                notes.append(Annotation(out, "gap", {"reason": "loop", "loop": self._loops}))
            segment = self._segments[bisect.bisect_right(self._starts, self._pos) - 1]
            take = min(want, segment.first + segment.count - self._pos)
            parts.append(self._samples(segment, self._pos, take))
            lo = bisect.bisect_left(self._event_index, self._pos)
            hi = bisect.bisect_left(self._event_index, self._pos + take)
            notes.extend(note.moved(out + index - self._pos)
                         for index, _, note in self._events[lo:hi])
            self._pos += take
            out += take
            want -= take
        if not parts:
            return False
        samples = parts[0] if len(parts) == 1 else np.concatenate(parts)
        self._read += samples.shape[0]
        self.emit(samples, annotations=notes)
        return True

    def _samples(self, segment: Segment, first: int, count: int) -> np.ndarray:
        fmt: SampleFormat = self._fmt
        a = segment.byte_offset + (first - segment.first) * fmt.sample_bytes
        stored = self._bytes[a:a + count * fmt.sample_bytes].view(fmt.component)
        samples = decode_samples(stored, fmt)
        if fmt.kind == "f":
            bad = ~np.isfinite(samples)
            if bad.any():
                at = first + int(np.argmax(bad))
                raise ValueError(f"{self._data_path}: sample {at} is NaN or infinite; "
                                 f"recordings must hold finite samples (clean the file first)")
        return samples

    def readings(self) -> dict[str, Any]:
        """Samples read, file position (dataset sample index), loops, datatype, truncation.

        ``partial_bytes`` are the bytes of an incomplete last sample that were not read and
        ``shortfall_bytes`` the bytes that sample lacks; both 0 for a whole file.
        ``center_frequency_hz`` (the current capture's ``core:frequency``) appears when known.
        """
        out: dict[str, Any] = {
            "samples_read": self._read,
            "position": self._pos,
            "loops": self._loops,
            "datatype": self._fmt.name,
            "partial_bytes": self._partial,
            "shortfall_bytes": self._shortfall,
            "path": self.p.path,
        }
        k = bisect.bisect_right(self._capture_starts, max(self._pos - 1, 0)) - 1
        if k >= 0 and self._captures[k].frequency is not None:
            out["center_frequency_hz"] = self._captures[k].frequency
        return out
