"""Meters: blocks that measure the stream they receive and report readings."""

from __future__ import annotations

from typing import Any

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
    )

    def setup(self, inputs: dict[str, StreamSpec]) -> dict[str, StreamSpec]:
        p = self.p
        self._config = BertConfig(pattern=p.pattern, acquire_bits=p.acquire_bits,
                                  window_bits=p.window_bits, loss_threshold=p.loss_threshold,
                                  framing=p.framing)
        self._state = None
        return {}

    def process(self, chunk: Chunk) -> None:
        gaps = [a.index for a in chunk.annotations if a.label == "gap"]
        packets = []
        if self._config.framing == "packets":
            for note in chunk.annotations:
                if note.label != "packet":
                    continue
                length = note.data.get("payload_bits") if isinstance(note.data, dict) else None
                if isinstance(length, bool) or not isinstance(length, int) or length < 0:
                    raise ValueError(f"packet annotation at index {note.index} needs an integer "
                                     f"payload_bits >= 0 (got {length!r})")
                packets.append((note.index, length))
        self._state = bert_update(chunk.samples, chunk.start, self._config, self._state,
                                  packets=packets, gaps=gaps)

    def finish(self) -> None:
        self._state = bert_finish(self._config, self._state)

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
