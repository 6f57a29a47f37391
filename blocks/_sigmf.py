"""SigMF metadata: read a recording's description strictly, and write one that matches its data.

Reading checks every field the reader relies on and names the file and the key of anything
wrong. Writing goes to a temporary file that replaces the metadata in one ``os.replace``, so a
reader (or a crash) never sees half a file, and the metadata only ever describes samples that
are already in the data file.

References
----------
.. [1] The SigMF specification, v1.2 (sections Global, Captures and Annotations objects;
   Non-Conforming Datasets for ``core:dataset``, ``core:header_bytes``, ``core:trailing_bytes``).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from blocks._sampleformat import parse_datatype
from stream.chunk import Annotation

__all__ = [
    "DATA_KEY",
    "DATA_SUFFIX",
    "EXTENSION",
    "META_SUFFIX",
    "RECORDER",
    "SIGMF_VERSION",
    "Capture",
    "Description",
    "MetadataError",
    "Segment",
    "layout",
    "metadata_document",
    "read_metadata",
    "sigmf_paths",
    "write_metadata",
]

#: Specification version written in ``core:version``. Every field written here is a core field
#: of that version (from memory; the tests validate against the ``sigmf`` library's schema).
SIGMF_VERSION = "1.2.0"
#: ``core:recorder`` of recordings made here.
RECORDER = "phasefree"
#: The project's optional SigMF extension: one key holding an annotation's JSON details.
EXTENSION = {"name": "phasefree", "version": "0.1.0", "optional": True}
DATA_KEY = "phasefree:data"

META_SUFFIX = ".sigmf-meta"
DATA_SUFFIX = ".sigmf-data"


class MetadataError(ValueError):
    """A SigMF metadata file that cannot be used; the message names the file and the key."""

    def __init__(self, file: str | Path, key: str, problem: str) -> None:
        super().__init__(f"{file}: {key}: {problem}" if key else f"{file}: {problem}")
        self.file = str(file)
        self.key = key


@dataclass(frozen=True)
class Capture:
    """One capture segment: where it starts in the dataset and what applies from there."""

    sample_start: int
    global_index: int | None = None
    frequency: float | None = None
    header_bytes: int = 0


@dataclass(frozen=True)
class Description:
    """What a metadata file says about its dataset (annotations indexed by dataset sample)."""

    datatype: str
    sample_rate: float | None
    captures: tuple[Capture, ...]
    annotations: tuple[Annotation, ...]
    dataset: str | None
    trailing_bytes: int


@dataclass(frozen=True)
class Segment:
    """A run of whole samples in the data file: dataset indices ``first .. first + count``."""

    first: int
    count: int
    byte_offset: int
    capture: int | None


def sigmf_paths(path: str | Path) -> tuple[Path, Path]:
    """The ``(meta, data)`` pair of a SigMF recording named by either file or by its base."""
    path = Path(path)
    if path.suffix in (META_SUFFIX, DATA_SUFFIX):
        path = path.with_suffix("")
    return path.with_name(path.name + META_SUFFIX), path.with_name(path.name + DATA_SUFFIX)


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not a JSON number")


def _int(obj: dict, key: str, where: str, file: Path, required: bool = False) -> int | None:
    if key not in obj:
        if required:
            raise MetadataError(file, f"{where}{key}", "is required")
        return None
    value = obj[key]
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise MetadataError(file, f"{where}{key}", f"must be an integer >= 0 (got {value!r})")
    return value


def _number(obj: dict, key: str, where: str, file: Path, positive: bool = False) -> float | None:
    if key not in obj:
        return None
    value = obj[key]
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if not ok or (positive and not value > 0):
        rule = "a number > 0" if positive else "a finite number"
        raise MetadataError(file, f"{where}{key}", f"must be {rule} (got {value!r})")
    return float(value)


def _objects(doc: dict, key: str, file: Path) -> list[dict]:
    items = doc.get(key, [])
    if not isinstance(items, list):
        raise MetadataError(file, key, f"must be a list (got {type(items).__name__})")
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            raise MetadataError(file, f"{key}[{i}]", f"must be an object (got {item!r:.40})")
    return items


def _annotation(item: dict, where: str, file: Path) -> Annotation:
    start = _int(item, "core:sample_start", where, file, required=True)
    _int(item, "core:sample_count", where, file)
    label = item.get("core:label", "sigmf")
    if not isinstance(label, str) or not label:
        raise MetadataError(file, f"{where}core:label", f"must be a non-empty string "
                            f"(got {label!r})")
    data = item.get(DATA_KEY)
    if not isinstance(data, dict):
        # a foreign annotation: its other fields, "core:" dropped ("sample_count", "comment")
        data = {(k[5:] if k.startswith("core:") else k): v for k, v in item.items()
                if k not in ("core:sample_start", "core:label")}
    return Annotation(int(start), label, data)


def read_metadata(meta: str | Path) -> Description:
    """Read and check a ``.sigmf-meta`` file.

    Parameters
    ----------
    meta : str or Path
        The metadata file.

    Returns
    -------
    Description
        Captures in file order, annotations sorted by ``core:sample_start``.

    Raises
    ------
    MetadataError
        For unreadable JSON or a missing, mistyped or unsupported field (file and key named).
    OSError
        If the file cannot be read.
    """
    meta = Path(meta)
    try:
        doc = json.loads(meta.read_text(encoding="utf-8"), parse_constant=_reject_constant)
    except (ValueError, UnicodeDecodeError) as err:
        raise MetadataError(meta, "", f"not valid JSON metadata: {err}") from None
    if not isinstance(doc, dict):
        raise MetadataError(meta, "", "must hold a JSON object with global, captures, annotations")
    head = doc.get("global")
    if not isinstance(head, dict):
        raise MetadataError(meta, "global", "is required and must be an object")
    datatype = head.get("core:datatype")
    if datatype is None:
        raise MetadataError(meta, "global.core:datatype", "is required")
    try:
        parse_datatype(datatype)
    except ValueError as err:
        raise MetadataError(meta, "global.core:datatype", str(err)) from None
    channels = _int(head, "core:num_channels", "global.", meta)
    if channels not in (None, 1):
        raise MetadataError(meta, "global.core:num_channels", f"only single-channel recordings "
                            f"are read (got {channels})")
    if head.get("core:metadata_only") is True:
        raise MetadataError(meta, "global.core:metadata_only", "the recording has no samples")
    dataset = head.get("core:dataset")
    if dataset is not None and (not isinstance(dataset, str) or not dataset
                                or Path(dataset).name != dataset):
        raise MetadataError(meta, "global.core:dataset", f"must be a file name in the "
                            f"metadata's folder (got {dataset!r})")
    rate = _number(head, "core:sample_rate", "global.", meta, positive=True)
    trailing = _int(head, "core:trailing_bytes", "global.", meta) or 0
    captures = []
    for i, item in enumerate(_objects(doc, "captures", meta)):
        where = f"captures[{i}]."
        start = _int(item, "core:sample_start", where, meta, required=True)
        if captures and start < captures[-1].sample_start:
            raise MetadataError(meta, f"{where}core:sample_start", f"captures must be sorted by "
                                f"sample_start ({start} after {captures[-1].sample_start})")
        captures.append(Capture(int(start), _int(item, "core:global_index", where, meta),
                                _number(item, "core:frequency", where, meta),
                                _int(item, "core:header_bytes", where, meta) or 0))
    notes = [_annotation(item, f"annotations[{i}].", meta)
             for i, item in enumerate(_objects(doc, "annotations", meta))]
    notes.sort(key=lambda a: a.index)
    return Description(datatype, rate, tuple(captures) or (Capture(0),), tuple(notes), dataset,
                       trailing)


def layout(captures: Sequence[Capture], sample_bytes: int, data_bytes: int,
           trailing_bytes: int = 0) -> tuple[list[Segment], int]:
    """Where each capture's whole samples lie in a data file of ``data_bytes``.

    Parameters
    ----------
    captures : sequence of Capture
        Sorted by ``sample_start``. ``header_bytes`` of a capture precede its samples.
    sample_bytes : int
        Bytes per sample.
    data_bytes : int
        Size of the data file.
    trailing_bytes : int
        Bytes at the end of the file that are not samples.

    Returns
    -------
    segments : list of Segment
        Contiguous in dataset indices from 0; a data file that ends early cuts the segment it
        ends in and drops the later ones. Samples before the first capture form a segment
        with ``capture=None``.
    partial_bytes : int
        Bytes of an incomplete last sample, not read (0 when the file holds whole samples).
    """
    usable = data_bytes - trailing_bytes
    if usable < 0:
        raise ValueError(f"core:trailing_bytes {trailing_bytes} exceeds the data file's "
                         f"{data_bytes} bytes")
    caps = list(captures)
    segments: list[Segment] = []
    if caps[0].sample_start > 0:
        caps.insert(0, Capture(0, header_bytes=0))
        first_real = 1
    else:
        first_real = 0
    headers = 0
    partial = 0
    for k, cap in enumerate(caps):
        headers += cap.header_bytes
        offset = cap.sample_start * sample_bytes + headers
        room = max(0, usable - offset)
        count = room // sample_bytes
        declared = caps[k + 1].sample_start - cap.sample_start if k + 1 < len(caps) else None
        complete = declared is not None and count >= declared
        if complete:
            count = declared
        else:
            partial = room - count * sample_bytes
        index = None if k < first_real else k - first_real
        if count:
            segments.append(Segment(cap.sample_start, count, offset, index))
        if not complete:
            break
    return segments, partial


def metadata_document(datatype: str, sample_rate: float, captures: Sequence[dict[str, Any]],
                      annotations: Sequence[dict[str, Any]], description: str = "",
                      ) -> dict[str, Any]:
    """A SigMF metadata object for a recording made here.

    Parameters
    ----------
    datatype : str
        ``core:datatype``.
    sample_rate : float
        ``core:sample_rate`` in samples/s.
    captures : sequence of dict
        Capture objects, each with ``core:sample_start``.
    annotations : sequence of dict
        Annotation objects; written sorted by ``core:sample_start`` as the specification
        requires (stable, so events at one sample keep their order).
    description : str
        ``core:description`` (omitted when empty).
    """
    head: dict[str, Any] = {
        "core:datatype": datatype,
        "core:sample_rate": sample_rate,
        "core:version": SIGMF_VERSION,
        "core:recorder": RECORDER,
    }
    if description:
        head["core:description"] = description
    ordered = sorted(annotations, key=lambda a: a["core:sample_start"])
    if any(DATA_KEY in a for a in ordered):
        head["core:extensions"] = [dict(EXTENSION)]
    return {"global": head, "captures": list(captures), "annotations": ordered}


def write_metadata(meta: str | Path, doc: dict[str, Any]) -> None:
    """Write ``doc`` to ``meta`` atomically: temporary file, fsync, then ``os.replace``."""
    meta = Path(meta)
    temporary = meta.with_name(meta.name + ".partial")
    text = json.dumps(doc, indent=2, allow_nan=False)
    with open(temporary, "w", encoding="utf-8") as out:
        out.write(text + "\n")
        out.flush()
        os.fsync(out.fileno())
    os.replace(temporary, meta)
