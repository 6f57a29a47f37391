"""The wire frame: how a chunk, an end of stream or a heartbeat travels as a ZeroMQ message.

A message is one ZeroMQ multipart message of one to three parts:

====  ==========================================================================================
part  content
====  ==========================================================================================
0     the header, :data:`HEADER_SIZE` bytes, packed little-endian with :data:`HEADER_FORMAT`
1     DATA only: the raw sample buffer, ``count * itemsize`` bytes, little-endian
2     DATA only, present when flag bit 0 is set: the annotations as UTF-8 JSON, a list of
      ``{"index": int, "label": str, "data": {...}}`` objects
====  ==========================================================================================

Header fields, in order (``<4sBBBBQqdQ``, 40 bytes, every field naturally aligned):

=========  =====  =========================================================================
field      type   meaning
=========  =====  =========================================================================
magic      4s     :data:`MAGIC`, marks a phasefree frame
version    u8     :data:`VERSION` (1)
kind       u8     :class:`MessageKind`: DATA, END (end of stream), HEARTBEAT or SESSION
dtype      u8     :class:`DtypeCode` of the samples (0 for END, HEARTBEAT and SESSION)
flags      u8     bit 0: annotations part present; bit 1: samples held in the sending process
                  (see below); the other bits are reserved and must be 0
seq        u64    sequence number on the link, so a gap is visible
start      i64    DATA: index of the first sample; END: index one past the last sample;
                  SESSION: the sender's session id, in [1, 2**63)
rate       f64    DATA: sample rate in samples/s, finite and > 0; 0.0 otherwise
count      u64    DATA: number of samples in part 1; 0 otherwise
=========  =====  =========================================================================

A SESSION message opens each run of a sender on a link between processes: its ``start`` is a
random id drawn when the sender starts, so a receiver can tell a restarted sender (whose
sequence numbers and sample indices begin again at 0) from a gap in a running one.

Between two threads of one process a DATA message may be its header alone: with flag bit 1
set, the chunk itself stays in memory and the link hands it to the receiving thread beside
the message (:func:`encode_held`, :func:`decode_held`, which checks the header and the chunk
against each other; the receiver gets the sender's annotations as they are, the samples as a
read-only view). This saves libzmq's zero-copy release of a large buffer (a wake-up of pyzmq's
collector thread per message), the cost of a multipart message, and decoding what was never
encoded. A message with bit 1 set that arrives
from a socket alone (from another process or host) is rejected as ``"flags"``.

Nothing read from a socket is unpickled or evaluated: the header is unpacked with
:mod:`struct`, the samples are viewed with :func:`numpy.frombuffer` and the annotations are
parsed by :mod:`json` with strict checks. :func:`decode` checks every field and raises only
:class:`FrameError`, whose ``reason`` names the failed check, for any malformed input.

Zero copy
---------
:func:`encode` returns the sample array itself as part 1, so
``socket.send_multipart(parts, copy=False)`` hands its memory to ZeroMQ without a copy, and
``socket.recv_multipart(copy=False)`` followed by :func:`decode` gives a read-only array over
the received frame's memory. Two caveats from the pyzmq documentation: pyzmq copies any frame
smaller than ``zmq.COPY_THRESHOLD`` (64 KiB) even when ``copy=False`` is asked, and a buffer
sent without copying must not be modified until ZeroMQ has finished with it (a message tracker
tells when). Chunks are immutable in phasefree, so a sent array is never written again.
"""

from __future__ import annotations

import enum
import json
import math
import struct
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np
import zmq

from stream.chunk import Annotation, Chunk

__all__ = [
    "HEADER_FORMAT",
    "HEADER_SIZE",
    "MAGIC",
    "MAX_ANNOTATION_BYTES",
    "MAX_LABEL_LENGTH",
    "MAX_SAMPLES",
    "VERSION",
    "DtypeCode",
    "FrameError",
    "Message",
    "MessageKind",
    "decode",
    "decode_held",
    "encode",
    "encode_end",
    "encode_heartbeat",
    "encode_held",
    "encode_session",
    "is_held",
]

#: Marks a phasefree wire frame ("phasefree wire frame"); the project's own choice.
MAGIC = b"PFwf"
#: Version of the frame layout described in this module.
VERSION = 1
#: :mod:`struct` layout of the header: magic, version, kind, dtype, flags, seq, start, rate,
#: count. Little-endian, no padding.
HEADER_FORMAT = "<4sBBBBQqdQ"
#: Size of the header part in bytes.
HEADER_SIZE = struct.calcsize(HEADER_FORMAT)
#: Largest number of samples one DATA message may carry.
MAX_SAMPLES = 2**24
#: Largest size in bytes of the annotations part.
MAX_ANNOTATION_BYTES = 2**20
#: Longest annotation label, in characters.
MAX_LABEL_LENGTH = 64

_HEADER = struct.Struct(HEADER_FORMAT)
_FLAG_ANNOTATIONS = 0x01
_FLAG_HELD = 0x02
_FLAGS_OFFSET = 7  # after magic, version, kind and dtype
_MAX_SEQ = 2**64 - 1
_MAX_START = 2**63 - 1
_ANNOTATION_KEYS = frozenset(("index", "label", "data"))


class MessageKind(enum.IntEnum):
    """What a message carries."""

    DATA = 1
    END = 2
    HEARTBEAT = 3
    SESSION = 4


class DtypeCode(enum.IntEnum):
    """Wire code of a sample type; the samples travel little-endian."""

    COMPLEX64 = 1
    FLOAT32 = 2
    UINT8 = 3
    INT16 = 4
    INT8 = 5
    FLOAT64 = 6

    @property
    def dtype(self) -> np.dtype:
        """The little-endian numpy dtype this code stands for."""
        return _WIRE_DTYPES[self]


_WIRE_DTYPES: dict[DtypeCode, np.dtype] = {
    DtypeCode.COMPLEX64: np.dtype("<c8"),
    DtypeCode.FLOAT32: np.dtype("<f4"),
    DtypeCode.UINT8: np.dtype("u1"),
    DtypeCode.INT16: np.dtype("<i2"),
    DtypeCode.INT8: np.dtype("i1"),
    DtypeCode.FLOAT64: np.dtype("<f8"),
}
_CODE_OF_DTYPE: dict[np.dtype, DtypeCode] = {dt: code for code, dt in _WIRE_DTYPES.items()}
# part types whose len() is their size in bytes, taken as they are
_FLAT_BUFFERS = frozenset((zmq.Frame, bytes))
# plain int -> member lookups: calling an IntEnum on a received value costs more than a frame's
# other checks together
_KIND_OF_VALUE: dict[int, MessageKind] = {int(kind): kind for kind in MessageKind}
_DTYPE_OF_CODE: dict[int, np.dtype] = {int(code): dt for code, dt in _WIRE_DTYPES.items()}


class FrameError(ValueError):
    """A received message that is not a valid phasefree frame.

    Parameters
    ----------
    reason : str
        Short machine-readable name of the failed check, for counting rejections:
        ``"parts"``, ``"truncated"``, ``"oversized"``, ``"magic"``, ``"version"``, ``"type"``,
        ``"dtype"``, ``"flags"``, ``"length"``, ``"rate"``, ``"start"`` or ``"annotations"``.
    message : str
        What was wrong, with the offending value.
    """

    def __init__(self, reason: str, message: str) -> None:
        super().__init__(f"bad frame ({reason}): {message}")
        self.reason = reason


class Message(NamedTuple):
    """One decoded message (an immutable record; a named tuple, which is cheaper to build per
    chunk than a frozen dataclass).

    Parameters
    ----------
    kind : MessageKind
        DATA, END, HEARTBEAT or SESSION.
    seq : int
        Sequence number on the link.
    start : int
        DATA: index of the first sample (equal to ``chunk.start``); END: index one past the
        last sample of the stream; HEARTBEAT: 0; SESSION: the sender's session id.
    chunk : Chunk or None
        The chunk for DATA (``port`` as asked of :func:`decode`), ``None`` otherwise.
    """

    kind: MessageKind
    seq: int
    start: int
    chunk: Chunk | None = None


# ----------------------------------------------------------------------------------------------
# encoding


def encode(chunk: Chunk, seq: int) -> list[bytes | memoryview | np.ndarray]:
    """Turn a chunk into the parts of one DATA message.

    Parameters
    ----------
    chunk : Chunk
        The chunk to send: one-dimensional samples of a dtype listed in :class:`DtypeCode`,
        ``start >= 0``, finite ``rate > 0``, at most :data:`MAX_SAMPLES` samples.
    seq : int
        Sequence number, ``0 <= seq < 2**64``.

    Returns
    -------
    list
        ``[header, samples]`` or ``[header, samples, annotations_json]``, ready for
        ``socket.send_multipart(parts, copy=False)``. ``samples`` is the chunk's own array
        (no copy) unless it had to be made contiguous or little-endian.

    Raises
    ------
    ValueError
        If a field cannot be represented in a valid frame; the message names the field.
    TypeError
        If an annotation's ``data`` is not JSON-serialisable.

    Notes
    -----
    The array is handed to ZeroMQ without copying; it must not be modified afterwards
    (chunks are immutable, so this holds). pyzmq copies frames under ``zmq.COPY_THRESHOLD``
    (64 KiB) anyway.
    """
    header, samples, annotations = _data_parts(chunk, seq, 0)
    return [header, samples, annotations] if annotations else [header, samples]


def encode_held(chunk: Chunk, seq: int) -> tuple[bytes, Chunk]:
    """Turn a chunk into a DATA message whose chunk stays in this process (flag bit 1).

    Parameters
    ----------
    chunk : Chunk
        As for :func:`encode`.
    seq : int
        Sequence number, ``0 <= seq < 2**64``.

    Returns
    -------
    header : bytes
        The one part to send: the header :func:`encode` would give, with flag bit 1.
    held : Chunk
        The chunk to hand to the receiving thread (its samples contiguous and little-endian,
        as on the wire), which checks it against the header with :func:`decode_held`.

    Raises
    ------
    ValueError, TypeError
        As for :func:`encode`: a chunk that could not travel to another process does not
        travel between threads either (its annotations are encoded to check them).
    """
    header, samples, _ = _data_parts(chunk, seq, _FLAG_HELD)
    if samples is not chunk.samples:
        chunk = Chunk(samples, chunk.start, chunk.rate, chunk.annotations)
    return header, chunk


def _data_parts(chunk: Chunk, seq: int, flags: int) -> tuple[bytes, np.ndarray, bytes]:
    """The header, wire-form samples and annotations JSON (empty if none) of a DATA message."""
    samples = chunk.samples
    if samples.ndim != 1:
        raise ValueError(f"chunk samples must be one-dimensional (got shape {samples.shape})")
    code = _CODE_OF_DTYPE.get(samples.dtype)
    if code is None or not samples.flags.c_contiguous:
        code, samples = _wire_form(samples)
    if samples.shape[0] > MAX_SAMPLES:
        raise ValueError(
            f"chunk holds {samples.shape[0]} samples, more than MAX_SAMPLES={MAX_SAMPLES}"
        )
    rate = float(chunk.rate)
    if not 0.0 < rate < math.inf:  # also false for NaN
        raise ValueError(f"chunk rate must be finite and > 0 (got {chunk.rate})")
    _check_start(chunk.start)
    if chunk.annotations:
        flags |= _FLAG_ANNOTATIONS
    header = _pack(MessageKind.DATA, seq, chunk.start, code=code, flags=flags, rate=rate,
                   count=samples.shape[0])
    annotations = _encode_annotations(chunk.annotations) if chunk.annotations else b""
    return header, samples, annotations


def _wire_form(samples: np.ndarray) -> tuple[DtypeCode, np.ndarray]:
    """The wire code of ``samples`` and the samples made contiguous and little-endian."""
    wire_dtype = samples.dtype.newbyteorder("<")
    code = _CODE_OF_DTYPE.get(wire_dtype)
    if code is None:
        names = ", ".join(dt.name for dt in _WIRE_DTYPES.values())
        raise ValueError(f"chunk dtype must be one of {names} (got {samples.dtype})")
    return code, np.ascontiguousarray(samples, dtype=wire_dtype)


def encode_end(seq: int, start: int) -> list[bytes]:
    """Build the END (end of stream) message.

    Parameters
    ----------
    seq : int
        Sequence number, ``0 <= seq < 2**64``.
    start : int
        Index one past the last sample sent on the stream, ``>= 0``.

    Returns
    -------
    list of bytes
        The single header part.
    """
    _check_start(start)
    return [_pack(MessageKind.END, seq, start)]


def encode_heartbeat(seq: int) -> list[bytes]:
    """Build a HEARTBEAT message, which tells the peer the link is alive.

    Parameters
    ----------
    seq : int
        Sequence number, ``0 <= seq < 2**64``.

    Returns
    -------
    list of bytes
        The single header part.
    """
    return [_pack(MessageKind.HEARTBEAT, seq, 0)]


def encode_session(seq: int, session: int) -> list[bytes]:
    """Build a SESSION message, which opens a sender's run on a link between processes.

    Parameters
    ----------
    seq : int
        Sequence number, ``0 <= seq < 2**64`` (0 for a sender that has just started).
    session : int
        The sender's session id, ``1 <= session < 2**63``, drawn at random when it starts.

    Returns
    -------
    list of bytes
        The single header part.
    """
    if not 1 <= session <= _MAX_START:
        raise ValueError(f"session must be in [1, 2**63) (got {session})")
    return [_pack(MessageKind.SESSION, seq, session)]


def _check_start(start: int) -> None:
    if not 0 <= start <= _MAX_START:
        raise ValueError(f"start must be in [0, 2**63) (got {start})")


def _pack(kind: MessageKind, seq: int, start: int, *, code: int = 0, flags: int = 0,
          rate: float = 0.0, count: int = 0) -> bytes:
    if not 0 <= seq <= _MAX_SEQ:
        raise ValueError(f"seq must be in [0, 2**64) (got {seq})")
    return _HEADER.pack(MAGIC, VERSION, kind, code, flags, seq, start, rate, count)


def _encode_annotations(annotations: Sequence[Annotation]) -> bytes:
    records = []
    for position, ann in enumerate(annotations):
        data = dict(ann.data) if isinstance(ann.data, Mapping) else ann.data
        problem = _annotation_problem(ann.index, ann.label, data)
        if problem:
            raise ValueError(f"annotation {position}: {problem}")
        records.append({"index": ann.index, "label": ann.label, "data": data})
    text = json.dumps(records, allow_nan=False, ensure_ascii=False, separators=(",", ":"))
    payload = text.encode("utf-8")
    if len(payload) > MAX_ANNOTATION_BYTES:
        raise ValueError(
            f"annotations take {len(payload)} bytes of JSON, "
            f"more than MAX_ANNOTATION_BYTES={MAX_ANNOTATION_BYTES}"
        )
    return payload


def _annotation_problem(index: object, label: object, data: object) -> str | None:
    """Say what is wrong with one annotation's fields, or return None if they are valid."""
    if isinstance(index, bool) or not isinstance(index, int) or not 0 <= index <= _MAX_START:
        return f"index must be an int in [0, 2**63) (got {index!r})"
    if not isinstance(label, str) or not 0 < len(label) <= MAX_LABEL_LENGTH:
        return f"label must be a str of 1..{MAX_LABEL_LENGTH} characters (got {label!r:.80})"
    if not isinstance(data, dict):
        return f"data must be an object (got {type(data).__name__})"
    return None


# ----------------------------------------------------------------------------------------------
# decoding


def decode(parts: Sequence[zmq.Frame | bytes | memoryview], port: str | None = None,
           ) -> Message:
    """Check and decode the parts of one received message.

    Parameters
    ----------
    parts : sequence of zmq.Frame, bytes or memoryview
        The message as returned by ``socket.recv_multipart(copy=False)`` (frames) or
        ``copy=True`` (bytes).
    port : str or None
        The input port to name on a DATA message's chunk (``Chunk.port``).

    Returns
    -------
    Message
        The decoded message. For DATA, ``chunk.samples`` is a read-only array over the
        received buffer (no copy), which it keeps alive.

    Raises
    ------
    FrameError
        For any malformed input whatsoever; ``reason`` names the failed check.

    Notes
    -----
    Sizes are checked against :data:`MAX_SAMPLES` and :data:`MAX_ANNOTATION_BYTES` before
    anything is parsed, so a hostile header cannot make the receiver allocate.
    """
    views = _as_buffers(parts)
    if len(views) > 3:
        raise FrameError("parts", f"a message has 1 to 3 parts (got {len(views)})")
    magic, version, kind, code, flags, seq, start, rate, count = _unpack_header(views[0])
    if magic != MAGIC:
        raise FrameError("magic", f"magic must be {MAGIC!r} (got {magic!r})")
    if version != VERSION:
        raise FrameError("version", f"version must be {VERSION} (got {version})")
    message_kind = _KIND_OF_VALUE.get(kind)
    if message_kind is None:
        raise FrameError("type", f"unknown message type {kind}")
    if flags & ~(_FLAG_ANNOTATIONS | _FLAG_HELD):
        raise FrameError("flags", f"reserved flag bits set (flags 0x{flags:02x})")
    if start < 0:
        raise FrameError("start", f"start index must be >= 0 (got {start})")
    if message_kind is MessageKind.DATA:
        if flags & _FLAG_HELD:
            raise FrameError("flags", _HELD_FROM_OUTSIDE)
        chunk = _decode_data(views, code, flags, start, rate, count, port)
        return Message(message_kind, seq, start, chunk)
    _check_control(views, message_kind, code, flags, start, rate, count)
    return Message(message_kind, seq, start)


_HELD_FROM_OUTSIDE = ("samples held in a sending thread's memory (flag bit 1) travel only "
                      "beside messages inside one process")


def decode_held(header: bytes, held: Chunk, port: str | None = None) -> Message:
    """Check the header of a DATA message against the chunk handed over beside it.

    Parameters
    ----------
    header : bytes
        The message as received: a header with flag bit 1 (:func:`encode_held`).
    held : Chunk
        The chunk the sending thread handed over for this message.
    port : str or None
        The input port to name on the chunk (``Chunk.port``).

    Returns
    -------
    Message
        The DATA message; ``chunk.samples`` is a read-only view of the held array (no copy).

    Raises
    ------
    FrameError
        If the header is malformed, not a held DATA header, or describes another chunk
        (dtype, sample count, start, rate or annotations); ``reason`` names the check.

    Notes
    -----
    The header was built by :func:`encode_held` in this process from this very chunk, which
    was checked then: what is checked here is that the two still belong together (a message
    and a parcel taken out of order would be caught), at the cost of one unpacking.
    """
    magic, version, kind, code, flags, seq, start, rate, count = _unpack_header(header)
    if magic != MAGIC:
        raise FrameError("magic", f"magic must be {MAGIC!r} (got {magic!r})")
    if version != VERSION:
        raise FrameError("version", f"version must be {VERSION} (got {version})")
    if kind != MessageKind.DATA or flags & ~_FLAG_ANNOTATIONS != _FLAG_HELD:
        raise FrameError("flags", f"not a held DATA header (type {kind}, flags 0x{flags:02x})")
    samples = held.samples
    if _DTYPE_OF_CODE.get(code) != samples.dtype or count != samples.shape[0]:
        raise FrameError("length", f"the header describes {count} samples of dtype code {code}, "
                                   f"the chunk beside it {samples.shape[0]} {samples.dtype}")
    if start != held.start or rate != held.rate \
            or bool(flags & _FLAG_ANNOTATIONS) != bool(held.annotations):
        raise FrameError("start", "the header describes another chunk than the one beside it")
    view = samples.view()
    view.setflags(write=False)
    return Message(MessageKind.DATA, seq, start, Chunk(view, start, rate, held.annotations, port))


def is_held(header: bytes) -> bool:
    """Whether a message's first part is a phasefree header with flag bit 1 (samples held).

    Parameters
    ----------
    header : bytes
        The first part of a received message.

    Returns
    -------
    bool
        True if its other parts wait in the sending thread's hand-over queue.
    """
    return (len(header) == HEADER_SIZE and header[:4] == MAGIC
            and bool(header[_FLAGS_OFFSET] & _FLAG_HELD))


def _as_buffers(parts: Sequence[Any]) -> list[bytes | zmq.Frame | memoryview]:
    """The parts as flat byte buffers whose ``len`` is their size in bytes.

    Received frames and bytes are already that, and are passed through untouched (a
    memoryview per frame would cost more than the rest of the checks together); anything
    else is viewed as bytes, and must be contiguous.
    """
    try:
        views = [p if p.__class__ in _FLAT_BUFFERS else memoryview(p).cast("B")
                 for p in parts]
    except (TypeError, ValueError, AttributeError) as exc:
        raise FrameError("parts", f"every part must be a contiguous byte buffer ({exc})") from None
    if not views:
        raise FrameError("parts", "a message has 1 to 3 parts (got 0)")
    return views


def _unpack_header(view: bytes | zmq.Frame | memoryview) -> tuple:
    if len(view) < HEADER_SIZE:
        raise FrameError("truncated", f"header is {len(view)} bytes, needs {HEADER_SIZE}")
    if len(view) > HEADER_SIZE:
        raise FrameError("length", f"header is {len(view)} bytes, must be {HEADER_SIZE}")
    return _HEADER.unpack(view.bytes if isinstance(view, zmq.Frame) else view)


def _decode_data(views: list, code: int, flags: int, start: int, rate: float, count: int,
                 port: str | None) -> Chunk:
    expected_parts = 3 if flags & _FLAG_ANNOTATIONS else 2
    if len(views) != expected_parts:
        raise FrameError(
            "parts",
            f"a DATA message with flags 0x{flags:02x} has {expected_parts} parts "
            f"(got {len(views)})",
        )
    dtype = _DTYPE_OF_CODE.get(code)
    if dtype is None:
        raise FrameError("dtype", f"unknown dtype code {code}")
    if count > MAX_SAMPLES:
        raise FrameError("oversized", f"{count} samples, more than MAX_SAMPLES={MAX_SAMPLES}")
    size = len(views[1])
    if size != count * dtype.itemsize:
        raise FrameError(
            "length",
            f"{count} {dtype.name} samples need {count * dtype.itemsize} bytes "
            f"(got {size})",
        )
    if not 0.0 < rate < math.inf:  # also false for NaN
        raise FrameError("rate", f"rate must be finite and > 0 (got {rate})")
    annotations = _decode_annotations(views[2]) if expected_parts == 3 else ()
    samples = np.frombuffer(views[1], dtype=dtype)
    samples.setflags(write=False)
    return Chunk(samples, start, rate, annotations, port)


def _check_control(views: list, kind: MessageKind, code: int, flags: int,
                   start: int, rate: float, count: int) -> None:
    """Check an END, HEARTBEAT or SESSION message: a lone header with zero data fields."""
    if len(views) != 1:
        raise FrameError("parts", f"a {kind.name} message has 1 part (got {len(views)})")
    if code != 0:
        raise FrameError("dtype", f"a {kind.name} message has dtype code 0 (got {code})")
    if flags != 0:
        raise FrameError("flags", f"a {kind.name} message has no flags (got 0x{flags:02x})")
    if count != 0:
        raise FrameError("length", f"a {kind.name} message has 0 samples (got {count})")
    if rate != 0.0:
        raise FrameError("rate", f"a {kind.name} message has rate 0.0 (got {rate})")
    if kind is MessageKind.HEARTBEAT and start != 0:
        raise FrameError("start", f"a HEARTBEAT message has start 0 (got {start})")
    if kind is MessageKind.SESSION and start == 0:
        raise FrameError("start", "a SESSION message has a session id >= 1 (got 0)")


def _decode_annotations(view: bytes | zmq.Frame | memoryview) -> tuple[Annotation, ...]:
    if len(view) > MAX_ANNOTATION_BYTES:
        raise FrameError(
            "oversized",
            f"annotations part is {len(view)} bytes, more than "
            f"MAX_ANNOTATION_BYTES={MAX_ANNOTATION_BYTES}",
        )
    try:
        records = json.loads(
            (view.bytes if isinstance(view, zmq.Frame) else bytes(view)).decode("utf-8"),
            parse_constant=_reject_constant,
            parse_float=_finite_float,
            object_pairs_hook=_unique_keys,
        )
    except (ValueError, RecursionError) as exc:
        # ValueError covers JSONDecodeError, UnicodeDecodeError and the int-digits limit.
        raise FrameError("annotations", f"annotations are not valid JSON ({exc})") from None
    if not isinstance(records, list):
        raise FrameError("annotations", f"annotations must be a JSON list "
                                        f"(got {type(records).__name__})")
    annotations = []
    for position, record in enumerate(records):
        if not isinstance(record, dict) or record.keys() != _ANNOTATION_KEYS:
            raise FrameError(
                "annotations",
                f"annotation {position} must be an object with exactly the keys "
                f"index, label, data (got {record!r:.80})",
            )
        problem = _annotation_problem(record["index"], record["label"], record["data"])
        if problem:
            raise FrameError("annotations", f"annotation {position}: {problem}")
        annotations.append(Annotation(record["index"], record["label"], record["data"]))
    return tuple(annotations)


def _reject_constant(name: str) -> float:
    raise ValueError(f"{name} is not allowed in annotations")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text[:40]} overflows a float")
    return value


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    obj = dict(pairs)
    if len(obj) != len(pairs):
        raise ValueError("an object has a repeated key")
    return obj
