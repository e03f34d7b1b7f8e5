"""A new user's trial of a study with a three-level categorical factor and a linear constraint: what
fit.json, the template, record, testplan, the campaign log and the report say about it.

The scenario (torch brazing of copper to steel) is our own demo: temperature 560-620 degC, dwell
10-120 s, three fluxes, the heat input ``temperature + 0.5 dwell <= 650``. The joint strength is a
closed-form quadratic of our own (``strength``, below), with a per-flux offset.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from windowfinder.study import Study

import test_categorical_usage as categorical_usage

FLUXES = ("fluoroaluminate", "chloride", "caesium")

STUDY = """\
[study]
name = "torch brazing"
seed = 3
confidence = 0.9

[[factor]]
name = "temperature"
unit = "degC"
low = 560.0
high = 620.0
step = 1
tolerance = 3

[[factor]]
name = "dwell"
unit = "s"
low = 10.0
high = 120.0
step = 1
tolerance = 4

[[factor]]
name = "flux"
levels = ["fluoroaluminate", "chloride", "caesium"]

[[constraint]]
name = "heat"
terms = { temperature = 1.0, dwell = 0.5 }
max = 650.0

[[response]]
name = "strength"
unit = "MPa"
goal = "maximize"
min = 100.0
"""

OFFSET = {"fluoroaluminate": 10.0, "chloride": -15.0, "caesium": 5.0}


def strength(temperature, dwell, flux):
    """Demo truth: quadratic in temperature, linear in dwell, an offset per flux (MPa)."""
    t = (np.asarray(temperature, float) - 560.0) / 60.0
    w = (np.asarray(dwell, float) - 10.0) / 110.0
    return 80.0 + 40.0 * t + 30.0 * w - 30.0 * t * t + np.array([OFFSET[f] for f in flux])


def make_study(folder, runs=30, noise=2.0, text=STUDY):
    """The trial study with ``runs`` space-filling runs of the demo truth plus noise of sd ``noise``."""
    return categorical_usage.make_study(folder, text, runs, noise, "strength", lambda f: strength(
        f["temperature"], f["dwell"], f["flux"]))


@pytest.fixture(scope="module")
def braze(tmp_path_factory):
    return make_study(tmp_path_factory.mktemp("braze") / "s")


_cli = categorical_usage._cli   # (code, stdout, stderr) of one command line


# ------------------------------------------------------------------------------------ fit.json naming
def test_fit_json_names_the_chosen_terms_as_the_term_table_does(braze, capsys):
    code, out, _ = _cli(["fit", braze], capsys)
    assert code == 0
    doc = json.loads((braze / "out" / "fit.json").read_text())
    res = doc["responses"][0]
    table = [t["term"] for t in res["terms"]]
    assert res["choice"]["terms"] == table        # one naming in the file
    assert not any(re.fullmatch(r"x\d+.*", t) for t in res["choice"]["terms"])
    assert any(t.startswith("flux[") for t in table)
    for term in table:                            # and the printed table uses the same names
        assert term in out


# ------------------------------------------------------------------------------------ the template
def test_new_template_says_a_categorical_factor_has_two_or_more_levels(tmp_path, capsys):
    code, _, _ = _cli(["new", tmp_path / "n"], capsys)
    assert code == 0
    text = (tmp_path / "n" / "study.toml").read_text()
    assert "two named levels" not in text
    assert "two or more named levels" in text
    # the commented example, uncommented, is a valid three-level factor
    lines = text.splitlines()
    i = next(k for k, ln in enumerate(lines) if ln.startswith("# [[factor]]"))
    block = [re.sub(r"^# ?", "", ln) for ln in lines[i:i + 3]]
    uncommented = "\n".join(lines[:i] + block + lines[i + 3:])
    (tmp_path / "n" / "study.toml").write_text(uncommented)
    from windowfinder.inputs.spec import StudySpec
    spec = StudySpec.from_toml(tmp_path / "n" / "study.toml")
    assert len(spec.factors[spec.categorical[0]].levels) == 3


# ------------------------------------------------------------------------------------ record
@pytest.fixture()
def planned(tmp_path):
    """The trial study with one planned run R031 at caesium."""
    folder = make_study(tmp_path / "p", runs=12)
    st = Study.load(folder)
    frame = st.design("space-filling", runs=3).iloc[[0]].copy()
    frame["run"], frame["flux"], frame["status"] = "R031", "caesium", "planned"
    st.add_runs(frame)
    return folder


@pytest.mark.parametrize("cell,expect", [
    ("cesium", "'cesium' is not a level of flux; did you mean 'caesium'?"),
    ("caesium ", "space before or after the level name; write 'caesium'"),
])
def test_record_names_a_misspelt_level_as_no_level_of_the_factor(planned, tmp_path, capsys, cell, expect):
    before = (planned / "runs.csv").read_bytes()
    results = tmp_path / "r.csv"
    results.write_text(f"run,flux,strength\nR031,{cell},111\n")
    code, out, err = _cli(["record", planned, results], capsys)
    assert code == 2
    assert expect in err and len(err.strip().splitlines()) == 1
    assert (planned / "runs.csv").read_bytes() == before      # nothing written


# ------------------------------------------------------------------------------------ no window
def test_no_window_message_gives_the_best_point_on_the_step_grid(tmp_path, capsys):
    folder = make_study(tmp_path / "nw", text=STUDY.replace("min = 100.0", "min = 131.0"))
    code, out, _ = _cli(["window", folder], capsys)
    assert code == 0 and out.startswith("no window:")
    doc = json.loads((folder / "out" / "window.json").read_text())
    best = doc["best_point"]
    st = Study.load(folder)
    for name in ("temperature", "dwell"):     # settable: each value is its own rounding to the step
        assert best[name] == float(st.spec.factor(name).round(best[name]))
        assert f"{name} = {best[name]:g}" in out
    # the P shown is the one at those settings (Study.probability, the public per-setting figure)
    p = st.probability([best])
    assert bool(p["allowed"][0])
    assert doc["best_probability"] == pytest.approx(float(p["p_joint"][0]), abs=1e-9)
    assert f"P = {doc['best_probability']:.3f}" in out


# ------------------------------------------------------------------------------------ testplan levels
def _plan_levels(folder):
    import pandas as pd
    return set(pd.read_csv(folder / "out" / "testplan.csv")["flux"])


def test_testplan_level_plans_only_at_that_level(braze, capsys):
    code, out, _ = _cli(["testplan", braze, "--level", "flux=caesium"], capsys)
    assert code == 0 and "at one level combination" in out
    assert _plan_levels(braze) == {"caesium"}
    plan_window = json.loads((braze / "out" / "testplan.window.json").read_text())
    assert [f["levels"] for f in plan_window["factors"] if f["name"] == "flux"] == [["caesium"]]


def test_testplan_follows_the_level_window_fixed_and_refuses_conflicts(braze, capsys):
    assert _cli(["window", braze, "--level", "flux=fluoroaluminate"], capsys)[0] == 0
    code, out, err = _cli(["testplan", braze], capsys)
    assert code == 0 and "planning at flux=fluoroaluminate" in err
    assert _plan_levels(braze) == {"fluoroaluminate"}
    before = (braze / "out" / "testplan.csv").read_bytes()
    code, _, err = _cli(["testplan", braze, "--level", "flux=caesium", "flux=chloride"], capsys)
    assert code == 2 and "disagree" in err and len(err.strip().splitlines()) == 1
    code, _, err = _cli(["testplan", braze, "--level", "flux=cesium"], capsys)
    assert code == 2 and "did you mean 'caesium'?" in err
    assert (braze / "out" / "testplan.csv").read_bytes() == before     # nothing written


# ------------------------------------------------------------------------------------ failed --function runs
def _spatter(settings):
    from windowfinder.cases import RunFailed
    raise RunFailed("spatter, no joint")


def test_guide_says_how_a_function_simulator_reports_a_failed_run_and_it_works_so():
    from pathlib import Path
    from windowfinder.campaign.evaluators import FunctionEvaluator

    guide = (Path(__file__).resolve().parents[1] / "docs" / "guide.md").read_text()
    section = guide[guide.index("### run"):]
    section = section[:section.index("\n### ", 1)]
    assert "RunFailed" in section and "reports a failed run" in section
    responses = ["strength"]
    # each way the guide names, checked on the evaluator the campaign uses
    out = FunctionEvaluator(_spatter, responses)("R1", {"temperature": 580.0})
    assert out.status == "failed" and "spatter, no joint" in out.note
    for ret in ({"strength": None}, {"strength": float("nan")}, {"strength": " "}, [1.0],
                {"strengh": 110.0}, {"strength": "strong"}, {"strength": float("inf")}):
        out = FunctionEvaluator(lambda s, r=ret: r, responses)("R2", {})
        assert out.status == "failed", ret
    out = FunctionEvaluator(lambda s: {"strength": 110.0}, ["strength", "porosity"])("R3", {})
    assert out.status == "done" and "not measured: porosity" in out.note


# ------------------------------------------------------------------------------------ fit: level correlations
def _matern52(r):
    """Matern 5/2 correlation (Rasmussen & Williams 2006, GPML, eq. 4.17)."""
    return (1.0 + np.sqrt(5.0) * r + 5.0 * r ** 2 / 3.0) * np.exp(-np.sqrt(5.0) * r)


def test_fit_shows_the_correlation_of_each_pair_of_three_levels(tmp_path, capsys):
    folder = make_study(tmp_path / "gp", runs=24,
                        text=STUDY.replace("min = 100.0", 'min = 100.0\nmodel = "gp"'))
    code, out, _ = _cli(["fit", folder], capsys)
    assert code == 0
    assert "flux[" not in out.splitlines()[2]          # no per-level length scales under factor units
    ls = json.loads((folder / "out" / "fit.json").read_text())["responses"][0]["length_scales"]
    pairs = [("fluoroaluminate", "chloride"), ("fluoroaluminate", "caesium"), ("chloride", "caesium")]
    for a, b in pairs:   # one-hot columns: tau_ab = m(sqrt(1/l_a^2 + 1/l_b^2)) (Qian, Wu & Wu 2008, §2)
        r = np.sqrt(1.0 / ls[f"flux[{a}]"] ** 2 + 1.0 / ls[f"flux[{b}]"] ** 2)
        assert f"{a}~{b} {_matern52(r):.2f}" in out
    # Gamma(3, 6) length-scale prior (docs/methods.md): mode (3 - 1) / 6 = 1/3
    at_mode = all(abs(ls[f"flux[{v}]"] - 1 / 3) <= 0.02 / 3 for v in FLUXES)
    assert ("the runs did not decide" in out) == at_mode


# ------------------------------------------------------------------------------------ campaign progress
def simulate(settings: dict) -> dict:
    """--function simulator of the demo truth, no noise (importable: the process pool calls it)."""
    return {"strength": float(strength([settings["temperature"]], [settings["dwell"]],
                                       [settings["flux"]])[0])}


def test_campaign_progress_says_what_a_missing_or_zero_volume_means_and_the_start_design(tmp_path):
    from campaign_helpers import random_proposer
    from windowfinder.campaign.loop import default_initial, run_campaign

    folder = make_study(tmp_path / "c", runs=4)
    lines = []
    figures = iter([None, 0.0, 0.0])     # no figure yet, then searched and none found
    run_campaign(folder, function="test_level_trial:simulate", budget=7, batch=1, workers=1,
                 propose=random_proposer, progress=lines.append,
                 metrics={"window volume": lambda st: next(figures), "front hypervolume": lambda st: None})
    text = "\n".join(lines)
    assert "n/a" not in text
    # default initial: 10 per factor (30) capped at half the budget, at least d + 2 = 5
    assert default_initial(3, 7) == 5
    assert text.count("start design: 1 space-filling run(s) first, to 5 completed runs") == 1
    assert "window volume not searched yet" in lines[[i for i, ln in enumerate(lines) if "runs done (" in ln][0]]
    assert "window volume 0 % (searched: no window reaches the confidence yet)" in text
    assert "front hypervolume none yet" in text


# ------------------------------------------------------------------------------------ report maps
def _gid(ax, gid):
    return [a for a in ax.get_children() if a.get_gid() == gid]


def test_maps_draw_the_constraint_and_shade_its_forbidden_side(braze):
    from windowfinder.report.maps import margin_map_figure, probability_map_figure, slice_centre

    st = Study.load(braze)
    fit = st.fit()
    from windowfinder.answers.results import build_window
    win = build_window(st.spec, fit)
    centre = slice_centre(st.spec, win)
    for draw in (probability_map_figure, margin_map_figure):
        fig = draw(st.spec, fit, win, pair=(0, 1))
        ax = fig.axes[0]
        (line,) = _gid(ax, "constraint")
        xy = np.vstack([p.vertices for p in line.get_paths()])
        # closed form of the boundary: temperature + 0.5 dwell = 650 (study.toml)
        np.testing.assert_allclose(xy[:, 0] + 0.5 * xy[:, 1], 650.0, atol=1e-6)
        assert xy[:, 1].min() == pytest.approx(60.0, abs=1.0)    # enters the map at T = 620, dwell 60
        (shade,) = _gid(ax, "forbidden")
        inside = np.vstack([p.vertices for p in shade.get_paths()])
        assert (inside[:, 0] + 0.5 * inside[:, 1] >= 650.0 - 0.6).all()   # only the forbidden side
        labels = [h.get_label() for h in ax.legend_handles_]
        assert any("[[constraint]] heat" in t for t in labels)
        assert "slice point" not in labels          # every numeric factor on the axes, flux fixed
    assert centre.shape == (3,)


def test_report_caption_lists_only_the_factors_off_the_axes(braze, capsys):
    code, _, _ = _cli(["report", braze], capsys)
    assert code == 0
    html = (braze / "out" / "report.html").read_text()
    assert "held at the window centre (temperature" not in html
    assert "held at the middle of their ranges (temperature" not in html
    for level in FLUXES:    # per-level maps: the level is what is held
        assert f"Held: flux = {level}." in html
    assert "temperature + 0.5 dwell &lt;= 650" in html or "temperature + 0.5 dwell <= 650" in html


def test_margin_map_colours_are_the_ones_the_report_names(braze):
    # the report says: inside the limit orange, beyond it purple (sections.maps, margin_map_figure)
    from windowfinder.report.maps import margin_map_figure

    st = Study.load(braze)
    fig = margin_map_figure(st.spec, st.fit(), None, pair=(0, 1))
    cf = next(c for c in fig.axes[0].collections if c.get_array() is not None and c.cmap is not None)
    met, broken = cf.cmap(cf.norm(3.5)), cf.cmap(cf.norm(-3.5))
    assert met[0] > met[2]          # orange: more red than blue
    assert broken[2] > broken[1]    # purple: more blue than green
