"""``phasefree budget``: required Eb/N0, sensitivity and free-space range of a link.

For the chosen scheme at the given bit rate and target BER it prints the Eb/N0 that theory
requires, the receiver sensitivity that follows from the noise figure, and (given transmit
power and frequency) the free-space range. A table puts every scheme side by side at the same
bit rate, so the cost of dropping the carrier phase loop reads off directly: dB against
coherent BPSK and the matching free-space range ratio.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from blocks._budget import (
    free_space_range_m,
    noise_density_dbm_hz,
    sensitivity_dbm,
)
from blocks._theory import SCHEMES, ebn0_for_ber

__all__ = ["HELP", "add_arguments", "main"]

HELP = "size a link: required Eb/N0, receiver sensitivity and free-space range per scheme"

NOTICE = ("Transmitting needs a licence, or must follow the licence-exempt band rules of the "
          "place where it runs; local regulations and licensed practice come first.")

#: Schemes that need the receiver to track carrier phase.
_COHERENT = frozenset({"bpsk", "coherent-2fsk"})
_REFERENCE = "bpsk"
_LINK_OPTIONS = ("tx_power_dbm", "frequency", "tx_antenna_dbi", "rx_antenna_dbi", "margin_db")


class _BadOption(ValueError):
    """An option value that cannot be used; the message names the option."""


def _hertz(text: str) -> float:
    """Parse a frequency such as ``868e6``, ``868M``, ``433.92 MHz`` or ``2.4G`` into Hz."""
    t = text.strip().replace(" ", "")
    if t.lower().endswith("hz"):
        t = t[:-2]
    scale = {"k": 1e3, "m": 1e6, "g": 1e9}.get(t[-1:].lower(), 1.0)
    if scale != 1.0:
        t = t[:-1]
    try:
        return float(t) * scale
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a frequency: {text!r}") from None


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the command's options on ``parser``."""
    parser.add_argument("--scheme", required=True, choices=SCHEMES,
                        help="modulation and detector (see the table for all of them)")
    parser.add_argument("--bit-rate", required=True, type=float, metavar="BIT_S",
                        help="bit rate in bit/s")
    parser.add_argument("--target-ber", required=True, type=float, metavar="P",
                        help="bit error probability to reach, 0 < P < 0.5")
    parser.add_argument("--noise-figure", required=True, type=float, metavar="DB",
                        help="receiver noise figure in dB (referred to 290 K)")
    parser.add_argument("--loss-db", type=float, default=0.0, metavar="DB",
                        help="implementation loss against theory, dB (default 0)")
    link = parser.add_argument_group("range (free space; needs --tx-power-dbm and --frequency)")
    link.add_argument("--tx-power-dbm", type=float, metavar="DBM",
                      help="transmitter output power, dBm")
    link.add_argument("--frequency", type=_hertz, metavar="HZ",
                      help="carrier frequency in Hz; k, M and G suffixes accepted (868M)")
    link.add_argument("--tx-antenna-dbi", type=float, default=None, metavar="DBI",
                      help="transmit antenna gain, dBi (default 0)")
    link.add_argument("--rx-antenna-dbi", type=float, default=None, metavar="DBI",
                      help="receive antenna gain, dBi (default 0)")
    link.add_argument("--margin-db", type=float, default=None, metavar="DB",
                      help="fade margin kept in reserve, dB (default 0)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def _option(name: str) -> str:
    return "--" + name.replace("_", "-")


def _check(args: argparse.Namespace) -> None:
    """Raise _BadOption for the first unusable option value."""
    def finite(name: str) -> float:
        value = getattr(args, name)
        if not math.isfinite(value):
            raise _BadOption(f"{_option(name)} must be a finite number (got {value!r})")
        return value

    if not finite("bit_rate") > 0:
        raise _BadOption(f"--bit-rate must be > 0 (got {args.bit_rate!r})")
    if not 1e-300 <= finite("target_ber") < 0.5:
        raise _BadOption(f"--target-ber must be in (0, 0.5), at least 1e-300 "
                         f"(got {args.target_ber!r})")
    for name in ("noise_figure", "loss_db"):
        if finite(name) < 0:
            raise _BadOption(f"{_option(name)} must be >= 0 (got {getattr(args, name)!r})")
    given = [n for n in _LINK_OPTIONS if getattr(args, n) is not None]
    if given:
        for needed in ("tx_power_dbm", "frequency"):
            if getattr(args, needed) is None:
                raise _BadOption(f"{_option(given[0])} needs {_option(needed)} "
                                 "(range needs both --tx-power-dbm and --frequency)")
        for name in given:
            finite(name)
        if not args.frequency > 0:
            raise _BadOption(f"--frequency must be > 0 (got {args.frequency!r})")
        if args.margin_db is not None and args.margin_db < 0:
            raise _BadOption(f"--margin-db must be >= 0 (got {args.margin_db!r})")


def _budget(args: argparse.Namespace) -> dict[str, Any]:
    """All figures for every scheme, as a JSON-able dict."""
    has_link = args.tx_power_dbm is not None
    gains = (args.tx_antenna_dbi or 0.0) + (args.rx_antenna_dbi or 0.0)
    margin = args.margin_db or 0.0
    rows: dict[str, dict[str, Any]] = {}
    for scheme in SCHEMES:
        ebn0 = ebn0_for_ber(scheme, args.target_ber)
        sens = sensitivity_dbm(ebn0, args.bit_rate, args.noise_figure, args.loss_db)
        rows[scheme] = {"ebn0_db": ebn0, "sensitivity_dbm": sens,
                        "coherent": scheme in _COHERENT}
    ref = rows[_REFERENCE]["ebn0_db"]
    for row in rows.values():
        row["penalty_db"] = row["ebn0_db"] - ref
        row["range_ratio"] = 10.0 ** (-row["penalty_db"] / 20.0)
        if has_link:
            allowed = args.tx_power_dbm + gains - row["sensitivity_dbm"] - margin
            row["path_loss_db"] = allowed
            row["range_m"] = free_space_range_m(allowed, args.frequency)
    chosen = rows[args.scheme]
    out: dict[str, Any] = {
        "scheme": args.scheme,
        "bit_rate": args.bit_rate,
        "target_ber": args.target_ber,
        "noise_figure_db": args.noise_figure,
        "loss_db": args.loss_db,
        "noise_density_dbm_hz": noise_density_dbm_hz(),
        "ebn0_db": chosen["ebn0_db"],
        "sensitivity_dbm": chosen["sensitivity_dbm"],
        "range_m": chosen.get("range_m"),
        "link": None,
        "schemes": rows,
        "notice": NOTICE,
    }
    if has_link:
        out["link"] = {"tx_power_dbm": args.tx_power_dbm, "frequency_hz": args.frequency,
                       "tx_antenna_dbi": args.tx_antenna_dbi or 0.0,
                       "rx_antenna_dbi": args.rx_antenna_dbi or 0.0, "margin_db": margin}
    return out


def _distance(metres: float) -> str:
    if metres >= 1e5:
        return f"{metres / 1e3:.0f} km"
    if metres >= 1e4:
        return f"{metres / 1e3:.1f} km"
    if metres >= 1e3:
        return f"{metres / 1e3:.2f} km"
    return f"{metres:.0f} m"


def _text(b: dict[str, Any]) -> str:
    lines = [
        f"{b['scheme']} at {b['bit_rate']:g} bit/s, target BER {b['target_ber']:.3g}, "
        f"noise figure {b['noise_figure_db']:.1f} dB, implementation loss {b['loss_db']:.1f} dB",
        f"  required Eb/N0    {b['ebn0_db']:8.2f} dB",
        f"  sensitivity       {b['sensitivity_dbm']:8.2f} dBm   "
        f"(kT0 {b['noise_density_dbm_hz']:.2f} dBm/Hz + NF + 10 log10 R + Eb/N0 + loss)",
    ]
    link = b["link"]
    if link:
        lines += [
            f"  free-space range  {_distance(b['range_m']):>8}       "
            "(line of sight: an upper bound)",
            f"    {link['tx_power_dbm']:g} dBm at {link['frequency_hz'] / 1e6:g} MHz, antennas "
            f"{link['tx_antenna_dbi']:g}/{link['rx_antenna_dbi']:g} dBi, "
            f"margin {link['margin_db']:g} dB"]
    lines += ["", "same bit rate, every scheme (penalty and range ratio against coherent bpsk):",
              f"  {'scheme':<14}{'phase loop':>11}{'Eb/N0 dB':>10}{'sens. dBm':>11}"
              f"{'penalty dB':>12}{'range ratio':>13}" + (f"{'range':>11}" if link else "")]
    for name, row in b["schemes"].items():
        mark = "*" if name == b["scheme"] else " "
        lines.append(
            f"{mark} {name:<14}{'needed' if row['coherent'] else 'none':>11}"
            f"{row['ebn0_db']:>10.2f}{row['sensitivity_dbm']:>11.2f}"
            f"{row['penalty_db']:>12.2f}{row['range_ratio']:>13.2f}"
            + (f"{_distance(row['range_m']):>11}" if link else ""))
    lines += ["", NOTICE]
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    """Run the command; 0 on success, 2 for an unusable option (message on stderr)."""
    try:
        _check(args)
        budget = _budget(args)
    except ValueError as err:  # _BadOption, or a target theory cannot reach
        print(f"phasefree budget: {err}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps(budget, indent=2))
    else:
        print(_text(budget))
    return 0
