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


def test_the_measure_the_demo_reads_is_the_exported_ranges_share(tmp_path):
    """The demo reads ``volume_share`` from window.json; it must be the product over factors of the
    exported range over the factor's span (recomputed here from the ranges and study.toml)."""
    import numpy as np

    from windowfinder.answers.results import build_window
    from windowfinder.study import Study
    from windowfinder.template import create_study

    create_study(tmp_path / "t", example="tempering")
    study = Study.load(tmp_path / "t")
    win = build_window(study.spec, study.fit()).to_dict()
    assert win["found"]  # the tempering example's 12 runs give a window (0.025 of the space today)
    spans = {f.name: f.high - f.low for f in study.spec.factors}
    expected = np.prod([(f["high"] - f["low"]) / spans[f["name"]] for f in win["factors"]])
    assert volume(win) == pytest.approx(expected, rel=1e-12, abs=1e-15)
