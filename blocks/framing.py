"""Framing blocks: the framer that finds packets in detected bits, and the packet log sink.

The framer looks for the sync word (allowing ``max_bit_errors`` wrong bits), reads the length
byte, payload and CRC (format in ``blocks/_packets.py``), and puts every packet's payload bits
on port ``payload`` with a ``"packet"`` annotation at its first bit. Packets whose CRC fails are
passed on marked ``crc_ok: false`` (so a BER meter can still count their bit errors) and
counted; they are never presented as good. A discontinuity in the input (a ``start`` jump or a
``"gap"`` annotation) drops the packet in flight.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from blocks._packets import DEFAULT_SYNC_WORD, FoundPacket, FramerState, find_packets
from blocks.detectors import split_at_gaps
from stream.block import Block, Port, StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from stream.params import Param

__all__ = ["Framer", "PacketLog"]

#: Fields of a packet annotation that the packet log writes, in order.
LOG_FIELDS = ("packet", "start", "time_s", "crc_ok", "length", "payload_hex", "sync_errors")


class Framer(Block):
    """Find packets by their sync word, check their CRC and pass on their payload bits."""

    kind = "framer"
    inputs = (Port("in", "uint8", "detected bits"),)
    outputs = (Port("payload", "uint8", "payload bits of every packet, one annotation each"),)
    params = (
        Param("max_bit_errors", int, 2, unit="bits", low=0, high=8,
              doc="most sync-word bits that may be received wrong"),
        Param("sync_word", int, DEFAULT_SYNC_WORD, low=0, high=(1 << 32) - 1,
              doc="32-bit sync word, sent MSB first"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        self._rate = inputs["in"].rate
        if not self._rate > 0:
            raise ParamError("in", f"input rate must be > 0 (got {self._rate!r})")
        self._state: FramerState | None = None
        self._expected: int | None = None
        self._packets = 0
        self._crc_failures = 0
        self._dropped = 0
        self._sync_errors = 0
        self._last: FoundPacket | None = None
        return {"payload": StreamSpec("uint8", self._rate)}

    def process(self, chunk: Chunk) -> None:
        for bits, start, gap in split_at_gaps(chunk, self._expected):
            if gap:
                self._flush()
            found, self._state = find_packets(bits, start, self.p.max_bit_errors,
                                              self.p.sync_word, self._state)
            self._send(found)
        self._expected = chunk.stop

    def finish(self) -> None:
        self._flush()

    def _flush(self) -> None:
        """Search what is held as if the stream ended here, then start afresh."""
        if self._state is None:
            return
        self._dropped += int(self._state.in_flight)
        found, _ = find_packets(np.zeros(0, np.uint8), self._state.next_index,
                                self.p.max_bit_errors, self.p.sync_word, self._state, final=True)
        self._send(found)
        self._state = None

    def _send(self, found: list[FoundPacket]) -> None:
        if not found:
            return
        at = self.position("payload")
        notes = []
        for packet in found:
            self._packets += 1
            self._crc_failures += int(not packet.crc_ok)
            self._sync_errors += packet.sync_errors
            self._last = packet
            notes.append(Annotation(at, "packet", {
                "packet": self._packets,
                "start": packet.start,
                "time_s": packet.start / self._rate,
                "payload_start": packet.payload_start,
                "payload_bits": 8 * packet.length,
                "crc_ok": packet.crc_ok,
                "length": packet.length,
                "payload_hex": packet.payload.hex(),
                "sync_errors": packet.sync_errors,
                "crc_received": packet.crc_received,
                "crc_computed": packet.crc_computed,
            }))
            at += 8 * packet.length
        payload = b"".join(p.payload for p in found)
        self.emit(np.unpackbits(np.frombuffer(payload, dtype=np.uint8)), port="payload",
                  annotations=notes)

    def readings(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "packets": self._packets,
            "crc_failures": self._crc_failures,
            "packets_dropped": self._dropped,
            "sync_errors_mean": self._sync_errors / self._packets if self._packets else None,
        }
        if self._last is not None:
            out.update(last_length=self._last.length, last_crc_ok=int(self._last.crc_ok),
                       last_sync_errors=self._last.sync_errors)
        return out


class PacketLog(Block):
    """Write each packet from a framer as one JSON line (to a file, or stdout for "-")."""

    kind = "packets"
    inputs = (Port("in", "uint8", "a framer's payload port"),)
    params = (
        Param("path", str, "-", doc='output file of JSON lines, or "-" for standard output'),
        Param("append", bool, False, doc="add to an existing file instead of replacing it"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        if self.p.path != "-":
            folder = Path(self.p.path).parent
            if not folder.is_dir():
                raise ParamError("path", f"folder does not exist (got {self.p.path!r})")
        self._out: TextIO | None = None
        self._lines = 0
        return {}

    def _stream(self) -> TextIO:
        if self._out is None:
            if self.p.path == "-":
                self._out = sys.stdout
            else:
                # Line buffered: every line reaches the file whole, so an interrupted run
                # leaves only complete lines.
                self._out = open(self.p.path, "a" if self.p.append else "w",  # noqa: SIM115
                                 buffering=1, encoding="utf-8")
        return self._out

    def process(self, chunk: Chunk) -> None:
        for note in chunk.annotations:
            if note.label != "packet":
                continue
            record = {key: note.data.get(key) for key in LOG_FIELDS}
            self._stream().write(json.dumps(record, separators=(",", ":")) + "\n")
            self._lines += 1

    def finish(self) -> None:
        out = self._stream()
        out.flush()
        if out is not sys.stdout:
            out.close()

    def readings(self) -> dict[str, Any]:
        return {"packets_written": self._lines, "path": self.p.path}
