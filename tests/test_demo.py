"""The demo's summary: both windows by one measure, their ratio, and honest lines when there is none.

Expectation by hand: the ratio is after / start of the two exported ``volume_share`` values (the share
of the factor space each window's ranges span, DESIGN.md ``window.json``), recomputed here from the
ranges and the factor spans.
"""

from __future__ import annotations

import pytest

from windowfinder.demo import ratio_line, volume

SPANS = {"a": 10.0, "b": 4.0}


def window(ranges, found=True):
    factors = [{"name": n, "unit": "", "low": lo, "high": hi} for n, (lo, hi) in ranges.items()]
    share = 1.0
    for n, (lo, hi) in ranges.items():
        share *= (hi - lo) / SPANS[n]
    return {"found": found, "confidence": 0.95, "min_probability": 0.96, "factors": factors,
            "volume_share": share if found else 0.0}


def test_ratio_is_after_over_start_of_the_exported_shares():
    start, after = window({"a": (1.0, 2.0), "b": (0.0, 1.0)}), window({"a": (1.0, 4.0), "b": (0.0, 2.0)})
    assert volume(start) == pytest.approx(0.1 * 0.25) and volume(after) == pytest.approx(0.3 * 0.5)
    assert "ratio after / start = 6 (the window after the loop is larger)" in ratio_line(start, after)
    assert "= 0.167 (the window after the loop is smaller)" in ratio_line(after, start)


def test_no_ratio_from_a_zero_volume_or_missing_start():
    flat = window({"a": (2.0, 2.0), "b": (0.0, 1.0)})
    grown = window({"a": (1.0, 4.0), "b": (0.0, 2.0)})
    line = ratio_line(flat, grown)
    assert "none" in line and "single setting of a" in line and "=" not in line
    none = window({"a": (0, 0), "b": (0, 0)}, found=False)
    assert "no window at the start" in ratio_line(none, grown)
    assert "still has none" in ratio_line(none, none)
