"""Tests of the per-block time profile (stream/profile.py)."""

import pytest

from stream.profile import block_shares, format_profile

SUMMARY = {
    "seconds": 2.0,
    "blocks": {
        "src": {"kind": "sim", "busy_s": 0.5},
        "dec": {"kind": "decimate", "busy_s": 1.0},
        "ber": {"kind": "ber", "busy_s": 0.5},
        "det": {"kind": "energy_detect", "busy_s": 0.0},
    },
}


def test_shares_are_sorted_and_sum_to_one():
    rows = block_shares(SUMMARY)
    assert [r[0] for r in rows] == ["dec", "src", "ber", "det"]  # ties keep pipeline order
    assert [r[3] for r in rows] == pytest.approx([0.5, 0.25, 0.25, 0.0])
    assert sum(r[3] for r in rows) == pytest.approx(1.0)


def test_table_shows_percentages_of_busy_time_and_of_the_run():
    text = format_profile(SUMMARY)
    assert "2.000 s busy in blocks over 2.000 s" in text
    dec = next(line for line in text.splitlines() if line.strip().startswith("dec"))
    assert "50.0%" in dec  # share of the busy time
    assert dec.rstrip().endswith("50.0%")  # 1.0 s of a 2.0 s run


def test_nothing_busy_gives_zero_shares():
    idle = {"seconds": 0.0, "blocks": {"a": {"kind": "gain", "busy_s": 0.0}}}
    assert block_shares(idle)[0][3] == 0.0
    assert "0.0%" in format_profile(idle)
