"""Verification plan and verdict: plan inside the window, verdicts from filled plans, safe CSV exports."""

from __future__ import annotations

import pandas as pd
import pytest

from windowfinder.answers import build_window
from windowfinder.cases import case_dir, load_simulator
from windowfinder.cli import main
from windowfinder.errors import InputError
from windowfinder.study import Study
from windowfinder.answers.testplan import build_testplan, verify_plan
from conftest import snapshot


@pytest.fixture(scope="module")
def reactor(tmp_path_factory):
    """The bundled reactor case with 24 noise-free simulated runs (a demo scenario of our own)."""
    d = tmp_path_factory.mktemp("reactor")
    (d / "study.toml").write_text((case_dir("reactor") / "study.toml").read_text())
    study = Study.load(d)
    study.add_runs(study.design("space-filling", runs=24, seed=5))
    sim = load_simulator("reactor")
    truth = sim.truth(study.runs.X())
    res = pd.DataFrame({"run": study.runs.frame["run"], "status": "done"})
    for r in study.spec.response_names:
        res[r] = truth[r]
    study.record_results(res)
    return d


def test_plan_lies_inside_window_with_centre_and_corners(reactor):
    study = Study.load(reactor)
    fit = study.fit()
    win = build_window(study.spec, fit, 0.9)
    assert win.found
    plan = build_testplan(study.spec, fit, win, study.runs.frame["run"]).frame
    assert (plan["point"] == "centre").sum() == 3 and (plan["point"] == "corner").sum() == 2 ** 3
    for f in win.factors:
        assert plan[f["name"]].between(f["low"] - 1e-9, f["high"] + 1e-9).all()
    # every corner of the window box is visited (2^3 distinct corners)
    corners = plan[plan["point"] == "corner"][study.spec.factor_names].round(9).drop_duplicates()
    assert len(corners) == 8
    assert plan["run"].str.startswith("V").all() and plan["run"].is_unique


def fill(plan, study, values):
    filled = plan.copy()
    for r in study.spec.response_names:
        filled[r] = values[r]
    return filled


def test_verdicts_confirmed_and_not_confirmed(reactor):
    study = Study.load(reactor)
    fit = study.fit()
    win = build_window(study.spec, fit, 0.9)
    plan = build_testplan(study.spec, fit, win, study.runs.frame["run"]).frame
    # results exactly at the predicted medians: inside every interval and, inside a window, every limit
    good = fill(plan, study, {r: plan[f"{r}_pred"] for r in study.spec.response_names})
    ver = verify_plan(study.spec, good, study.runs.frame["run"])
    assert ver.confirmed and ver.verdict.startswith("window confirmed")
    assert ver.frame["inside_interval"].all() and ver.frame["meets_limit"].all()
    # one safety result above its limit: not confirmed, and the run is named
    bad = good.copy()
    bad.loc[bad.index[0], "adiabatic_rise"] = 60.0
    ver = verify_plan(study.spec, bad, study.runs.frame["run"])
    assert not ver.confirmed and "NOT confirmed" in ver.verdict and bad["run"].iloc[0] in ver.verdict


def test_verify_cli_appends_runs_and_refuses_a_second_time(reactor, tmp_path, capsys):
    assert main(["testplan", str(reactor), "--confidence", "0.9"]) == 0
    plan = pd.read_csv(reactor / "out" / "testplan.csv")
    study = Study.load(reactor)
    sim = load_simulator("reactor")
    truth = sim.truth(plan[study.spec.factor_names].to_numpy())
    filled = fill(plan, study, truth)
    path = tmp_path / "filled.csv"
    filled.to_csv(path, index=False)
    n0 = len(study.runs)
    assert main(["verify", str(reactor), str(path)]) == 0
    out = capsys.readouterr().out
    assert "window" in out.splitlines()[-2]
    assert len(Study.load(reactor).runs) == n0 + len(plan)
    before = snapshot(reactor)
    assert main(["verify", str(reactor), str(path)]) == 2  # already recorded: refused, nothing changed
    assert snapshot(reactor) == before


def test_exports_neutralise_formula_cells(reactor):
    # OWASP "CSV Injection": a cell starting with = + - @ must not reach a spreadsheet as a formula.
    study = Study.load(reactor)
    frame = study.design("sobol", runs=2, seed=1)
    frame["note"] = ["=HYPERLINK(\"x\")", "@SUM(1)"]
    from windowfinder.export import write_csv

    p = write_csv(reactor / "out" / "probe.csv", frame)
    text = p.read_text()
    assert "'=HYPERLINK" in text and "'@SUM" in text
    assert "\n=" not in text and ",=" not in text and ",@" not in text


def test_testplan_without_window_is_refused(reactor):
    study = Study.load(reactor)
    fit = study.fit()
    import dataclasses

    win = dataclasses.replace(build_window(study.spec, fit, 0.9), found=False, factors=[])
    with pytest.raises(InputError, match="nothing to verify"):
        build_testplan(study.spec, fit, win, study.runs.frame["run"])
