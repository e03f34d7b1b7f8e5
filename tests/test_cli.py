"""The command line as a user meets it: verbs, exit codes, one-line errors, files left unchanged."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from windowfinder.cli import main
from conftest import STUDY, snapshot

DATA = Path(__file__).parent / "data"


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_new_check_design_space_filling_one_per_stratum(tmp_path, capsys):
    d = tmp_path / "s"
    assert run(["new", d], capsys)[0] == 0
    assert run(["check", d], capsys)[0] == 0
    code, out, _ = run(["design", d, "--method", "space-filling", "--runs", 12], capsys)
    assert code == 0
    runs = pd.read_csv(d / "runs.csv")
    assert len(runs) == 12 and set(runs["status"]) == {"planned"} and runs["run"].is_unique
    # Latin hypercube property (McKay, Beckman & Conover 1979): one run in each of the 12 equal strata
    # of every factor, also after rounding to the factor's step.
    for name, low, high in (("temperature", 40.0, 90.0), ("time", 30.0, 180.0)):
        u = (runs[name].to_numpy() - low) / (high - low)
        assert ((u >= 0) & (u <= 1)).all()
        strata = np.minimum(np.floor(u * 12), 11).astype(int)
        assert sorted(strata) == list(range(12))
    assert (runs["temperature"] * 2 == np.round(runs["temperature"] * 2)).all()  # step 0.5


def test_new_refuses_to_overwrite(tmp_path, capsys):
    d = tmp_path / "s"
    run(["new", d], capsys)
    before = snapshot(d)
    code, _, err = run(["new", d], capsys)
    assert code == 2 and "already exists" in err and snapshot(d) == before


RUNS_HEADER = "run,temperature,time,yield,exotherm,status,note\n"
BAD_CASES = {
    "misspelt key": (STUDY.replace("high = 90.0", "hihg = 90.0"), None, "hihg"),
    "low above high": (STUDY.replace("low = 40.0", "low = 95.0"), None, "low"),
    "duplicate name": (STUDY.replace('name = "time"', 'name = "yield"'), None, "duplicate"),
    "goal none no limit": (STUDY.replace('max = 50.0\nkind = "safety"', ""), None, "goal"),
    "target without value": (STUDY.replace('"maximize"', '"target"'), None, "target"),
    "min above max": (STUDY.replace("min = 80.0", "min = 80.0\nmax = 10.0"), None, "min"),
    "confidence": (STUDY.replace("0.9", "0"), None, "confidence"),
    "logit no bounds": (STUDY.replace('unit = "K"', 'unit = "K"\ntransform = "logit"'), None, "bounds"),
    "invalid toml": (STUDY.replace("[[factor]]", "[[factor]"), None, "line"),
    "missing factor column": (None, "run,temperature,yield\nR1,50,80\n", "time"),
    "non-numeric cell": (None, RUNS_HEADER + "R1,50,sixty,80,20,done,\n", "sixty"),
    "non-finite cell": (None, RUNS_HEADER + "R1,50,60,nan,20,done,\n", "yield"),
    "duplicate run id": (None, RUNS_HEADER + "R1,50,60,80,20,,\nR1,51,60,80,20,,\n", "R1"),
    "unknown status": (None, RUNS_HEADER + "R1,50,60,80,20,ok,\n", "status"),
    "empty table": (None, "", "empty"),
}


@pytest.mark.parametrize("case", sorted(BAD_CASES))
@pytest.mark.parametrize("verb", ["check", "fit", "window"])
def test_bad_input_exit_2_one_line_nothing_changed(study_dir, capsys, case, verb):
    study, runs, word = BAD_CASES[case]
    if study is not None:
        (study_dir / "study.toml").write_text(study)
    if runs is not None:
        (study_dir / "runs.csv").write_text(runs)
    before = snapshot(study_dir)
    code, out, err = run([verb, study_dir], capsys)
    assert code == 2, (case, out, err)
    lines = err.strip().splitlines()
    assert len(lines) == 1 and word in lines[0] and "Traceback" not in err
    assert snapshot(study_dir) == before


def test_console_script_prints_no_traceback(study_dir):
    (study_dir / "study.toml").write_text(STUDY.replace("high = 90.0", "hgih = 90.0"))
    p = subprocess.run([sys.executable, "-m", "windowfinder", "check", str(study_dir)],
                       capture_output=True, text=True)
    assert p.returncode == 2
    assert p.stderr.strip().count("\n") == 0 and "did you mean 'high'" in p.stderr


@pytest.fixture
def montgomery(tmp_path):
    """Montgomery, DAE 8th ed. (2013) §11.3: the 13-run CCD with three responses (data from memory)."""
    d = tmp_path / "ccd"
    d.mkdir()
    (d / "study.toml").write_text((DATA / "montgomery_study.toml").read_text())
    df = pd.read_csv(DATA / "montgomery_ccd.csv")
    df.insert(0, "run", [f"C{i + 1:02d}" for i in range(len(df))])
    df.to_csv(d / "runs.csv", index=False)
    return d


def published_models(time, temp):
    """Montgomery (2013) §11.3 fitted models in coded units x = (natural - centre) / 5 (from memory)."""
    x1, x2 = (time - 85.0) / 5.0, (temp - 175.0) / 5.0
    yld = 79.94 + 0.995 * x1 + 0.515 * x2 - 1.376 * x1**2 - 1.001 * x2**2 + 0.25 * x1 * x2
    visc = 70.00 - 0.155 * x1 - 0.948 * x2 - 0.69 * x1**2 - 6.69 * x2**2 - 1.25 * x1 * x2
    mw = 3386.2 + 205.1 * x1 + 177.4 * x2
    return yld, visc, mw


def test_textbook_ccd_check_fit_window_testplan(montgomery, capsys):
    assert run(["check", montgomery], capsys)[0] == 0
    assert run(["fit", montgomery], capsys)[0] == 0
    fit = json.loads((montgomery / "out" / "fit.json").read_text())
    q2 = {r["name"] if "name" in r else r["response"]: r["loo_q2"] for r in fit["responses"]}
    assert q2["yield"] >= 0.6

    # With 13 runs the models leave much doubt about viscosity between the runs, so no window reaches
    # P >= 0.5 for a new run (best 0.49 with the default model choice, 0.25 with GPs only); the tool
    # must say so (exit 0, found false) and name the best it found.
    code, out, _ = run(["window", montgomery, "--confidence", "0.5"], capsys)
    assert code == 0
    win = json.loads((montgomery / "out" / "window.json").read_text())
    best = win["min_probability"] if win["found"] else win["best_probability"]
    assert 0.0 < best <= 1.0
    conf = 0.5 if win["found"] else round(0.8 * best, 3)
    code, out, _ = run(["window", montgomery, "--confidence", conf], capsys)
    win = json.loads((montgomery / "out" / "window.json").read_text())
    assert code == 0 and win["found"] and win["min_probability"] >= conf
    (t0, t1), (T0, T1) = [(f["low"], f["high"]) for f in win["factors"]]

    # Judged by the published fitted models, not by ours: settings they call feasible (about 4 % of the
    # region, two thin bands) must get clearly higher joint probabilities than the rest.
    from windowfinder import Study
    from windowfinder.answers import feasibility_of

    study = Study.load(montgomery)
    tt, TT = np.meshgrid(np.linspace(77.93, 92.07, 57), np.linspace(167.93, 182.07, 57))
    yld, visc, mw = published_models(tt, TT)
    ok = ((yld >= 78.5) & (visc >= 62) & (visc <= 68) & (mw <= 3400)).ravel()
    _, p = feasibility_of(study.spec, study.fit()).probabilities(
        study.spec.to_coded(np.c_[tt.ravel(), TT.ravel()]))
    assert ok.any() and p[ok].mean() >= 2.5 * p[~ok].mean()

    code, _, _ = run(["testplan", montgomery, "--confidence", conf], capsys)
    assert code == 0
    plan = pd.read_csv(montgomery / "out" / "testplan.csv")
    assert len(plan) == 3 + 4  # centre x3 + 2^2 corners
    assert plan["time"].between(t0 - 1e-9, t1 + 1e-9).all()
    assert plan["temperature"].between(T0 - 1e-9, T1 + 1e-9).all()

    code, _, _ = run(["window", montgomery, "--confidence", "0.95"], capsys)
    assert code == 0  # found or not, this is an answer, not an error


def test_textbook_ccd_model_choice_and_mean_window(montgomery, capsys):
    # Montgomery (2013) §11.3 publishes a quadratic model for yield and viscosity and a first-order one
    # for molecular weight (from memory). model = "auto" (the default) must pick a polynomial wherever
    # one beats the Gaussian process on leave-one-out, and the process-mean window at confidence 0.5
    # must lie where the published models meet every limit.
    code, out, _ = run(["fit", montgomery], capsys)
    assert code == 0
    fit = json.loads((montgomery / "out" / "fit.json").read_text())
    by = {r["response"]: r for r in fit["responses"]}
    for name, r in by.items():
        c = r["choice"]
        assert c["requested"] == "auto" and f"{name}: LOO log density" in out
        best_poly = max(v for k, v in c["scores"].items() if k != "gp")
        assert (c["chosen"] != "gp") == (best_poly > c["scores"]["gp"])
        assert c["scores"][c["chosen"]] == max(c["scores"].values())
        assert bool(r["terms"]) == (c["chosen"] != "gp")
    assert by["yield"]["choice"]["chosen"] == "quadratic"       # beats the GP clearly on this design
    assert [t["term"] for t in by["yield"]["terms"]][:3] == ["1", "time", "temperature"]

    code, out, _ = run(["window", montgomery, "--mean", "--confidence", "0.5"], capsys)
    win = json.loads((montgomery / "out" / "window.json").read_text())
    assert code == 0 and win["found"] and win["min_probability"] >= 0.5
    (t0, t1), (T0, T1) = [(f["low"], f["high"]) for f in win["factors"]]
    tt, TT = np.meshgrid(np.linspace(t0, t1, 15), np.linspace(T0, T1, 15))
    yld, visc, mw = published_models(tt, TT)
    assert ((yld >= 78.5) & (visc >= 62) & (visc <= 68) & (mw <= 3400)).all()

    # the model setting lives in study.toml, so that every verb uses it; --model is refused, exit 2
    code, _, err = run(["fit", montgomery, "--model", "quadratic"], capsys)
    assert code == 2 and "study.toml" in err and err.strip().count("\n") == 0
    toml = (montgomery / "study.toml").read_text().replace('goal = "none"', 'goal = "none"\nmodel = "linear"')
    (montgomery / "study.toml").write_text(toml)
    from windowfinder import Study
    res = Study.load(montgomery).fit()
    assert res.surrogates.models["mw"].kind == "linear"
    assert [t["term"] for t in res.diagnostics[2].terms] == ["1", "time", "temperature"]
