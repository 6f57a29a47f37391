"""How a run reports: JSON lines for machines, a live table and a summary for people."""

from __future__ import annotations

import json
import math
from typing import Any, TextIO

__all__ = ["LiveView", "format_summary", "json_line", "plain"]

#: Readings shown in the live table and the summary, in this order, when a block has them.
HEADLINE = ("ber", "ber_low", "ber_high", "bits", "errors", "ebn0_db", "esn0_db", "cfo_hz",
            "packets", "crc_failures", "sync_losses", "eye_opening", "eye_q",
            "samples_written")


def plain(value: Any) -> Any:
    """``value`` with non-finite floats replaced by None, so it is strict JSON."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalars
        return plain(value.item())
    return value


def json_line(record: dict[str, Any]) -> str:
    """One record as one line of strict JSON."""
    return json.dumps(plain(record), separators=(",", ":"), allow_nan=False)


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        if value != 0 and (abs(value) < 1e-3 or abs(value) >= 1e6):
            return f"{value:.3e}"
        return f"{value:.4g}"
    return str(value)


def _rows(status: dict[str, Any]) -> list[str]:
    seconds = status.get("seconds", 0.0) or 1e-9
    lines = [f"{'block':<12} {'kind':<15} {'Msps in':>9} {'Msps out':>9} {'busy':>6}  readings"]
    for bid, b in status["blocks"].items():
        rate_in = b["samples_in"] / seconds / 1e6
        rate_out = b["samples_out"] / seconds / 1e6
        extra = "  ".join(f"{k}={_fmt(b[k])}" for k in HEADLINE if k in b and b[k] is not None)
        lines.append(f"{bid:<12} {b['kind']:<15} {rate_in:>9.3f} {rate_out:>9.3f} "
                     f"{100 * b['busy']:>5.1f}%  {extra}")
    troubled = [f"  {label}: dropped {s['dropped']}, gaps {s['gaps']}, rejected {s['rejected']}"
                for label, s in status.get("links", {}).items()
                if s["dropped"] or s["gaps"] or s["rejected"]]
    if troubled:
        lines.append("links with losses:")
        lines.extend(troubled)
    return lines


def format_summary(summary: dict[str, Any]) -> str:
    """A readable end-of-run summary."""
    head = (f"{summary.get('pipeline', 'pipeline')}: {summary['reason']} after "
            f"{summary['seconds']:.1f} s")
    lines = [head, *_rows(summary)]
    if "error" in summary:
        e = summary["error"]
        lines.append(f"error in block {e['block']!r}: {e['type']}: {e['message']}")
    return "\n".join(lines)


def _ber_text(value: float) -> str:
    return "0" if value == 0 else f"{value:.2e}"


def _measured(status: dict[str, Any], name: str) -> dict[str, Any] | None:
    """The first block that measured reading ``name`` (a source, which never receives samples,
    reports its settings, not measurements)."""
    for b in status["blocks"].values():
        if b.get("samples_in") and isinstance(b.get(name), (int, float)):
            return b
    return None


def _headline(status: dict[str, Any]) -> str:
    """BER with its interval, Eb/N0 estimate, packets and the host's load, in one line."""
    parts = []
    meter = _measured(status, "ber")
    if meter is not None:
        low, high = meter.get("ber_low"), meter.get("ber_high")
        interval = (f" [{_ber_text(low)}, {_ber_text(high)}]"
                    if isinstance(low, (int, float)) and isinstance(high, (int, float)) else "")
        parts.append(f"BER {_ber_text(meter['ber'])}{interval} over {meter.get('bits', 0)} bits")
    snr = _measured(status, "ebn0_db")
    if snr is not None:
        parts.append(f"Eb/N0 {snr['ebn0_db']:.1f} dB (estimate)")
    framer = _measured(status, "packets")
    if framer is not None:
        crc = framer.get("crc_failures")
        parts.append(f"packets {framer['packets']}"
                     + (f", {crc} CRC failures" if isinstance(crc, int) else ""))
    host = status.get("host") or {}
    if "load_1m" in host:
        parts.append(f"load {host['load_1m']:.2f}")
    if host.get("temperatures_c"):
        parts.append(f"{max(host['temperatures_c'].values()):.0f} °C")
    if any(v for k, v in (host.get("slowdown") or {}).items()
           if k in ("under_voltage", "slowed", "frequency_capped")):
        parts.append("board slowed")
    return "  |  ".join(parts)


class LiveView:
    """A block table redrawn in place on a terminal (ANSI cursor movement)."""

    def __init__(self, out: TextIO) -> None:
        self.out = out
        self.height = 0

    def draw(self, status: dict[str, Any]) -> None:
        """Replace the previous table with one for ``status``."""
        lines = [f"{status.get('pipeline', 'pipeline')}  {status['seconds']:.0f} s  "
                 "(Ctrl-C stops)"]
        headline = _headline(status)
        if headline:
            lines.append(headline)
        lines.extend(_rows(status))
        if self.height:
            self.out.write(f"\x1b[{self.height}F")
        self.out.write("".join(f"\x1b[2K{line}\n" for line in lines))
        self.out.write("\x1b[J")
        self.out.flush()
        self.height = len(lines)

    def clear(self) -> None:
        """Remove the table (before the summary is printed)."""
        if self.height:
            self.out.write(f"\x1b[{self.height}F\x1b[J")
            self.out.flush()
            self.height = 0
