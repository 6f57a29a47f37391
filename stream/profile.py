"""Where a run spent its time: each block's share of the busy time, from the summary."""

from __future__ import annotations

from typing import Any

__all__ = ["block_shares", "format_profile"]


def block_shares(summary: dict[str, Any]) -> list[tuple[str, str, float, float]]:
    """Each block's busy time and its share of all blocks' busy time, largest first.

    Parameters
    ----------
    summary : dict
        A status or summary record (``Runner.summary``): ``blocks`` maps ids to records with
        ``kind`` and ``busy_s``.

    Returns
    -------
    list of (block_id, kind, busy_s, share)
        ``share`` is a fraction of the summed busy time (0 for every block when none was
        busy); ties keep the pipeline's block order.
    """
    rows = [(bid, str(b.get("kind", "")), float(b.get("busy_s") or 0.0))
            for bid, b in summary.get("blocks", {}).items()]
    total = sum(busy for _, _, busy in rows)
    shares = [(bid, kind, busy, busy / total if total > 0 else 0.0) for bid, kind, busy in rows]
    return sorted(shares, key=lambda row: -row[2])


def format_profile(summary: dict[str, Any]) -> str:
    """A table of each block's share of the busy time, largest first.

    The busy time of a block is the time its own code ran (``process``, ``produce`` and
    ``finish``); the runtime's time between blocks is not in it, so the shares say which
    block to make faster, and ``busy`` against the run's length says how close each block is
    to being the bottleneck.
    """
    seconds = float(summary.get("seconds") or 0.0)
    rows = block_shares(summary)
    total = sum(busy for _, _, busy, _ in rows)
    lines = [f"profile: {total:.3f} s busy in blocks over {seconds:.3f} s of running",
             f"  {'block':<12} {'kind':<15} {'busy s':>9} {'share':>7} {'of run':>7}"]
    for bid, kind, busy, share in rows:
        of_run = busy / seconds if seconds > 0 else 0.0
        lines.append(f"  {bid:<12} {kind:<15} {busy:>9.3f} {100 * share:>6.1f}% "
                     f"{100 * of_run:>6.1f}%")
    return "\n".join(lines)
