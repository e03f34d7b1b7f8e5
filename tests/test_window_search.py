"""Guarantees of the window search: nested in confidence, no zero-width range, the worst point inside the
guard band, one volume definition, the shrink line, and the pymoo alternative.

Sources used below:
- Elementary geometry: the largest axis-aligned rectangle inside a disc of radius r is the inscribed
  square, side r*sqrt(2), area 2 r^2; the largest box inside the quadrant {x >= a, y >= b} of the unit
  square is [a, 1] x [b, 1].
- The logistic P = 1 / (1 + exp(-k m)) (scipy.special.expit) satisfies P >= c exactly when m >= ln(c / (1 - c)) / k (closed
  form), so a steep logistic of a margin m is an indicator-like probability with a known feasible set.
- Brute force: probabilities on fine grids; the lowest measured margin over runs by direct search.
- Nesting: a box whose lowest probability is >= c' is feasible at every c <= c' (definition).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.special import expit

from benchmarks.window_search import simulated_study
from windowfinder.answers import build_window, feasibility_of
from windowfinder.answers.window import LADDER, find_window, volume_text
from windowfinder.answers.windowchange import shrink_note
from windowfinder.export.files import window_table, write_window


def logistic(m, k):
    return expit(k * m)


def disc_fn(centre, r, k):
    return lambda X: logistic(r ** 2 - ((X - centre) ** 2).sum(axis=1), k)


def r_eff(r, k, c):  # closed form: P >= c inside the disc of radius sqrt(r^2 - ln(c/(1-c))/k)
    return np.sqrt(r ** 2 - np.log(c / (1 - c)) / k)


def grid_snap(step):
    """Inward rounding to a coded grid of ``step`` (None when a range is narrower than one step)."""
    def snap(lower, upper):
        a = np.ceil(lower / step - 1e-9) * step
        b = np.floor(upper / step + 1e-9) * step
        return None if np.any(b - a < step * (1 - 1e-9)) else (a, b)
    return snap


def grid_in(lower, upper, n=121):
    axes = [np.linspace(lo, hi, n) for lo, hi in zip(lower, upper)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(lower))


# ---------------------------------------------------------------- property: nested, no zero width
@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cx=st.floats(0.3, 0.7), cy=st.floats(0.3, 0.7), r=st.floats(0.15, 0.4),
       k=st.sampled_from([50.0, 300.0]), pair=st.sampled_from([(0.95, 0.9), (0.9, 0.8), (0.99, 0.85)]),
       step=st.sampled_from([None, 0.05]))
def test_volume_never_grows_with_confidence_and_no_zero_width(cx, cy, r, k, pair, step):
    prob = disc_fn(np.array([cx, cy]), r, k)
    snap = grid_snap(step) if step else None
    high, low = (find_window(prob, 2, c, seed=0, nested=True, snap=snap, n_candidates=2048) for c in pair)
    # nesting: the window at the lower confidence is never smaller (pair levels are on the ladder), nor
    # smaller than the single-level search at that confidence
    assert low.volume >= high.volume - 1e-12
    single = find_window(prob, 2, pair[1], seed=0, snap=snap, n_candidates=2048)
    assert low.volume >= single.volume - 1e-12
    for res, c in ((high, pair[0]), (low, pair[1])):
        if res.found:
            width = res.upper - res.lower
            assert np.all(width >= (step or 0) * (1 - 1e-9)) and np.all(width > 0)
            # geometry: inside the disc where P >= c, so at most the inscribed square 2 r_eff^2
            assert res.volume <= 2 * r_eff(r, k, c) ** 2 * (1 + 1e-6)
            assert res.min_probability >= c


def test_lower_confidence_off_the_ladder_is_no_smaller_than_any_level_above():
    prob = disc_fn(np.array([0.45, 0.55]), 0.3, 300.0)
    v = {c: find_window(prob, 2, c, seed=3, nested=True).volume for c in (0.83, 0.85, 0.9, 0.95)}
    assert 0.85 in LADDER and 0.9 in LADDER and 0.95 in LADDER
    assert v[0.83] >= v[0.85] >= v[0.9] >= v[0.95] > 0


# ------------------------------------------------------------------- brute force / closed forms
def test_disc_window_near_inscribed_square_with_grid():
    r, k, c = 0.35, 1000.0, 0.95
    res = find_window(disc_fn(np.array([0.5, 0.5]), r, k), 2, c, nested=True, snap=grid_snap(0.01))
    assert res.found
    best = 2 * r_eff(r, k, c) ** 2           # elementary geometry: square inscribed in the disc
    assert 0.85 * best <= res.volume <= best * (1 + 1e-6)
    # every stated bound lies on the 0.01 grid
    np.testing.assert_allclose(np.round(res.lower / 0.01), res.lower / 0.01, atol=1e-6)
    np.testing.assert_allclose(np.round(res.upper / 0.01), res.upper / 0.01, atol=1e-6)


@pytest.mark.parametrize("method", ["faces", "pymoo"])
def test_quadrant_window_is_the_quadrant(method):
    a, b, k, c = 0.3, 0.45, 2000.0, 0.9
    def prob(X):
        return logistic(np.minimum(X[:, 0] - a, X[:, 1] - b), k)
    res = find_window(prob, 2, c, seed=1, method=method)
    edge = np.log(c / (1 - c)) / k            # closed form: P >= c for margin >= ln(c/(1-c))/k
    truth = (1 - a - edge) * (1 - b - edge)   # geometry: largest box in the quadrant
    assert res.found and res.min_probability >= c
    assert res.volume <= truth * (1 + 1e-6)
    assert res.volume >= (0.97 if method == "faces" else 0.8) * truth
    assert prob(grid_in(res.guard_lower, res.guard_upper)).min() >= c   # brute force over the box


def test_slab_narrower_than_one_step_gives_no_window_with_reason():
    def prob(X):  # feasible only for |x0 - 0.5| < 0.03 (closed form), every x1
        return logistic(0.03 - np.abs(X[:, 0] - 0.5), 3000.0)
    res = find_window(prob, 2, 0.9, nested=True, snap=grid_snap(0.1))
    assert not res.found and "narrower than one step" in res.message
    wide = find_window(prob, 2, 0.9, nested=True, snap=grid_snap(0.01))
    assert wide.found and np.all(wide.upper - wide.lower >= 0.01 - 1e-9)
    assert wide.upper[0] - wide.lower[0] <= 0.06 + 1e-9


def test_worst_point_lies_inside_the_reported_guard_band():
    prob = disc_fn(np.array([0.52, 0.47]), 0.33, 400.0)
    t = np.array([0.03, 0.015])
    res = find_window(prob, 2, 0.9, tolerance=t, nested=True, snap=grid_snap(0.02), seed=2)
    assert res.found
    assert np.all(res.worst_point >= res.guard_lower - 1e-12)
    assert np.all(res.worst_point <= res.guard_upper + 1e-12)
    np.testing.assert_allclose(res.guard_lower, np.clip(res.lower - t, 0, 1))
    assert prob(res.worst_point[None])[0] == pytest.approx(res.min_probability)
    # brute force: no grid point of the guard band is below the reported minimum
    assert prob(grid_in(res.guard_lower, res.guard_upper, 201)).min() >= res.min_probability - 1e-9


# ------------------------------------------------------------ a study: one volume, shrink line
@pytest.fixture(scope="module")
def reactor(tmp_path_factory):
    """The bundled reactor case with 20 noise-free simulated runs (a demo scenario of our own)."""
    d = tmp_path_factory.mktemp("reactor_search")
    study = simulated_study(d, 20, 5)
    return d, study, study.fit()


def test_one_volume_in_json_message_markdown_table_and_campaign_log(reactor):
    from windowfinder.campaign.progress import ModelProgress

    d, study, fit = reactor
    spec = study.spec
    win = build_window(spec, fit, 0.8)
    assert win.found
    # definition: product of the stated ranges' widths over the factor spans (guard band not counted)
    share = np.prod([(f["high"] - f["low"]) / s for f, s in zip(win.factors, spec.spans)])
    assert win.volume_share == pytest.approx(share, rel=1e-9)
    for f in win.factors:  # every range at least one step wide, on the step grid
        step = spec.factor(f["name"]).step
        assert f["high"] - f["low"] >= step * (1 - 1e-9)
        assert f["low"] / step == pytest.approx(round(f["low"] / step), abs=1e-6)
    text = volume_text(win.volume_share)
    paths = write_window(d / "out", win, spec.name)
    assert json.loads(paths[0].read_text())["volume_share"] == pytest.approx(win.volume_share)
    assert text in win.message and text in paths[1].read_text() and text in window_table(win)
    # the campaign log's figure is the same search at the study's confidence
    tracker = ModelProgress()
    tracker.fit_ = fit
    logged = tracker.window_volume(study)
    assert logged == pytest.approx(build_window(spec, fit).volume_share, rel=1e-12)


def test_shrink_line_names_ratio_limit_and_lowest_margin_run(reactor):
    d, study, fit = reactor
    spec = study.spec
    feas = feasibility_of(spec, fit)
    done = study.runs.done()
    line = shrink_note(spec, feas, 0.5, (np.zeros(spec.d), np.ones(spec.d)), 0.1, done)
    assert line.startswith("window shrank 5x (50 % of the studied factor space -> 10 % of")
    binding = next(r for r in spec.limited if f" {r.name} " in f" {line} ")
    # brute force: the run with the lowest measured margin on that limit (whole cube = near everything)
    margins = binding.margin(done[binding.name].to_numpy(float))
    assert f"{done['run'].iloc[int(np.argmin(margins))]} (" in line
    assert shrink_note(spec, feas, 0.1, (np.zeros(spec.d), np.ones(spec.d)), 0.2, done) is None


def test_refit_against_previous_window_json(reactor, tmp_path):
    from windowfinder.answers.windowchange import previous_note

    d, study, fit = reactor
    spec = study.spec
    win = build_window(spec, fit, 0.8)
    feas = feasibility_of(spec, fit)
    old = {"found": True, "confidence": 0.8, "mean_only": False, "set_point": None, "volume_share": 0.5,
           "factors": [{"name": f.name, "guard_low": f.low, "guard_high": f.high} for f in spec.factors]}
    path = tmp_path / "window.json"
    path.write_text(json.dumps(old))
    line = previous_note(spec, feas, path, win, study.runs.done())
    # ratio = 0.5 / volume_share (definition of the line)
    assert line.startswith(f"window shrank {0.5 / win.volume_share:.3g}x (50 % of the studied")
    assert "lowest-margin run there" in line
    path.write_text(json.dumps({**old, "confidence": 0.9}))   # another confidence: no comparison
    assert previous_note(spec, feas, path, win, study.runs.done()) is None
    path.write_text("{broken")
    assert previous_note(spec, feas, path, win, study.runs.done()) is None


# ---------------------------------------------------------------- guard band clipped at the bounds
CLIP_STUDY = """\
[study]
name = "clip"
seed = 1
confidence = 0.9

[[factor]]
name = "a"
unit = "bar"
low = 0.0
high = 10.0
tolerance = 0.5

[[factor]]
name = "b"
unit = "degC"
low = 0.0
high = 10.0
tolerance = 0.5

[[response]]
name = "y"
min = 3.0
max = 7.0
"""


def test_guard_band_clipped_at_a_study_bound_is_said_in_json_and_markdown(tmp_path):
    # closed form: y = b (noise-free) with 3 <= y <= 7 and tolerance 0.5 gives the window a in [0, 10]
    # (y does not depend on a), b in [3.5, 6.5]; a's guard band 0 - 0.5 .. 10 + 0.5 lies past both study
    # bounds and is clipped, b's (3 .. 7) is not
    from windowfinder.study import Study

    (tmp_path / "study.toml").write_text(CLIP_STUDY)
    study = Study.load(tmp_path)
    study.add_runs(study.design("space-filling", runs=16, seed=4))
    study.record_results(pd.DataFrame({"run": study.runs.frame["run"], "status": "done",
                                       "y": study.runs.X()[:, 1]}))
    study = Study.load(tmp_path)
    win = build_window(study.spec, study.fit())
    assert win.found
    a, b = win.factors
    assert (a["low"], a["high"]) == (0.0, 10.0)
    assert b["low"] == pytest.approx(3.5, abs=0.05) and b["high"] == pytest.approx(6.5, abs=0.05)
    notes = [c for c in win.cautions if "clipped at the study bound" in c]
    assert len(notes) == 1 and notes[0].startswith("The guard band for a is clipped")
    assert "low 0 and high 10 bar" in notes[0] and "not asked about settings beyond it" in notes[0]
    paths = write_window(tmp_path / "out", win, study.spec.name)   # schema-checked by conftest
    assert notes[0] in json.loads(paths[0].read_text())["cautions"]
    assert "The guard band for a is clipped at the study bound" in paths[1].read_text()
