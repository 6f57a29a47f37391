"""Meters: blocks that measure the stream they receive and report readings."""

from __future__ import annotations

import itertools
from collections import deque
from typing import Any

import numpy as np

from blocks._bert import (
    FRAMINGS,
    BertConfig,
    BertState,
    bert_finish,
    bert_update,
    clopper_pearson,
)
from blocks._prbs import PRBS_NAMES
from stream.block import Block, Port, StreamSpec
from stream.chunk import Chunk
from stream.params import Param

__all__ = ["BitErrorMeter"]


class BitErrorMeter(Block):
    """Count bit errors against an ITU-T O.150 PRBS, acquiring and re-acquiring sync itself."""

    kind = "ber"
    _state: BertState | None = None  # None until the first chunk (the kernel's start)
    inputs = (Port("in", "uint8", "hard bits carrying the test pattern (or packet payloads)"),)
    params = (
        Param("pattern", str, "prbs15", choices=PRBS_NAMES,
              doc="test pattern (ITU-T O.150; the simulator's packet payloads use prbs9)"),
        Param("framing", str, "stream", choices=FRAMINGS,
              doc="stream: one continuous pattern; packets: payloads announced by "
                  "'packet' annotations, consecutive segments of one pattern"),
        Param("acquire_bits", int, 64, unit="bits", low=8, high=4096,
              doc="consecutive recurrence checks that must pass to lock (false lock on "
                  "random data: 2^-acquire_bits; lower it for very noisy links)"),
        Param("window_bits", int, 512, unit="bits", low=16, high=1 << 20,
              doc="window over which loss of sync is judged (stream framing)"),
        Param("loss_threshold", float, 0.2, low=0, high=0.5, low_open=True, high_open=True,
              doc="error fraction in a window (or packet) above which sync is lost"),
        Param("confidence", float, 0.95, low=0, high=1, low_open=True, high_open=True,
              doc="two-sided level of the Clopper-Pearson interval ber_low .. ber_high"),
        Param("history_interval_bits", int, 10_000, unit="bits", low=64, high=1 << 30,
              doc="input bits per point of the BER history (views)"),
        Param("history_points", int, 600, low=2, high=100_000,
              doc="points the BER history keeps (the oldest are dropped)"),
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        p = self.p
        self._config = BertConfig(pattern=p.pattern, acquire_bits=p.acquire_bits,
                                  window_bits=p.window_bits, loss_threshold=p.loss_threshold,
                                  framing=p.framing)
        self._state = None
        self._rate = inputs["in"].rate
        self._history: deque[tuple[float, ...]] = deque(maxlen=p.history_points)
        self._last_point = (0, 0)
        self._point_before = (0, 0)
        return {}

    def process(self, chunk: Chunk) -> None:
        """Count the chunk, cut where the input reaches a multiple of the history interval.

        The cuts are at absolute bit indices, so the history does not depend on chunking.
        """
        step = self.p.history_interval_bits
        edges = [chunk.start, *range((chunk.start // step + 1) * step, chunk.stop, step),
                 chunk.stop]
        for a, b in itertools.pairwise(edges):
            last = b == chunk.stop
            notes = tuple(n for n in chunk.annotations if a <= n.index and (last or n.index < b))
            self._count(chunk.samples[a - chunk.start:b - chunk.start], a, notes)
            if b % step == 0:
                self._add_point(b)

    def _count(self, bits: np.ndarray, start: int, annotations: tuple) -> None:
        gaps = [a.index for a in annotations if a.label == "gap"]
        packets = []
        if self._config.framing == "packets":
            for note in annotations:
                if note.label != "packet":
                    continue
                length = note.data.get("payload_bits") if isinstance(note.data, dict) else None
                if isinstance(length, bool) or not isinstance(length, int) or length < 0:
                    raise ValueError(f"packet annotation at index {note.index} needs an integer "
                                     f"payload_bits >= 0 (got {length!r})")
                packets.append((note.index, length))
        self._state = bert_update(bits, start, self._config, self._state,
                                  packets=packets, gaps=gaps)

    def _add_point(self, position: int) -> None:
        """Record the bits and errors counted since the previous point, with their interval."""
        s = self._state or BertState()
        bits, errors = s.bits - self._last_point[0], s.errors - self._last_point[1]
        self._point_before, self._last_point = self._last_point, (s.bits, s.errors)
        low, high = clopper_pearson(errors, bits, self.p.confidence)
        self._history.append((position / self._rate, s.bits, s.errors,
                              errors / bits if bits else 0.0, low, high))

    def finish(self) -> None:
        self._state = bert_finish(self._config, self._state)
        s = self._state or BertState()
        if (s.bits, s.errors) == self._last_point and not (
                s.position % self.p.history_interval_bits):
            return
        if self._history and self._history[-1][0] == s.position / self._rate:
            # the last point is at the end of the stream: it takes the final judgement
            self._history.pop()
            self._last_point = self._point_before
        self._add_point(s.position)

    def views(self) -> dict[str, Any]:
        """The BER history: one point per ``history_interval_bits`` input bits.

        ``history`` holds equal-length lists: ``t_s`` (stream time of the point, input bits
        over bit rate), ``bits`` and ``errors`` (counted so far), and ``ber``, ``ber_low``,
        ``ber_high``: the ratio over the bits counted since the previous point and its
        Clopper-Pearson interval (0 and 0 .. 1 where none were counted).
        """
        columns = ("t_s", "bits", "errors", "ber", "ber_low", "ber_high")
        rows = list(zip(*self._history, strict=True)) or [()] * len(columns)
        history: dict[str, Any] = {name: list(col) for name, col in zip(columns, rows,
                                                                         strict=True)}
        for name in ("bits", "errors"):
            history[name] = [int(v) for v in history[name]]
        history["interval_bits"] = self.p.history_interval_bits
        return {"history": history}

    def readings(self) -> dict[str, Any]:
        """``bits``, ``errors``, ``ber`` with its interval, sync and gap counters.

        With no bits counted yet, ``ber`` is 0 and the interval is the uninformative 0 .. 1.
        """
        s = self._state or BertState()
        low, high = clopper_pearson(s.errors, s.bits, self.p.confidence)
        out: dict[str, Any] = {
            "bits": s.bits,
            "errors": s.errors,
            "ber": s.errors / s.bits if s.bits else 0.0,
            "ber_low": low,
            "ber_high": high,
            "sync_losses": s.sync_losses,
            "locked": int(s.locked),
            "inverted": int(s.inverted),
            "gaps": s.gaps,
            "pattern": self.p.pattern,
        }
        if self.p.framing == "packets":
            out["packets"] = s.packets
            out["errored_packets"] = s.errored_packets
        return out
