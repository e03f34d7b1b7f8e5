"""Support: degenerate run sets never yield a window, a trade-off or model-guided runs, and say what to run.

Sources of the expectations:
* ``d + 2`` distinct settings: ``d + 1`` fix a plane through the runs, one more is needed to check it
  (common practice, no source).
* Advised design size ``max(10 d - k, d + 2)``: the n = 10 d rule of Loeppky, Sacks & Welch (2009),
  "Choosing the sample size of a computer experiment: a practical guide", Technometrics 51(4).
* Greedy maximin choice (Johnson, Moore & Ylvisaker 1990, "Minimax and maximin distance designs",
  J. Statist. Plann. Inference 26): checked against brute force with scipy.spatial.distance.cdist.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist

from windowfinder import cases
from windowfinder.answers.results import build_window
from windowfinder.answers.tradeofftable import build_tradeoff
from windowfinder.answers.support import judge_support, runs_needed, space_filling_batch
from windowfinder.cli import main
from windowfinder.inputs.designs import maximin_latin_hypercube, sobol
from windowfinder.models.gp import GPModel
from windowfinder.study import Study
from windowfinder.template import create_study

GOOD = {"temperature": 72.0, "time": 121.0, "catalyst": 1.8}  # inside the reactor's true window


def reactor_identical(tmp_path: Path, n: int = 14) -> Path:
    """The issue's case: ``n`` noisy runs of the reactor simulator at one identical, good setting."""
    d = tmp_path / "reactor"
    create_study(d, example="reactor")
    sim = cases.load_simulator("reactor")
    rows = [{"run": f"R{i + 1:03d}", **GOOD, **sim.evaluate(GOOD, seed=i), "status": "done", "note": ""}
            for i in range(n)]
    pd.DataFrame(rows).to_csv(d / "runs.csv", index=False)
    return d


def sum_study(tmp_path: Path, X: np.ndarray, name: str = "sum") -> Path:
    """Factors x0.. in [0, 1], y = sum of the factors, limit y >= 1 (y is about 0 at the origin)."""
    d = tmp_path / name
    d.mkdir()
    factors = "\n".join(f'[[factor]]\nname = "x{j}"\nlow = 0.0\nhigh = 1.0\n' for j in range(X.shape[1]))
    (d / "study.toml").write_text(f'[study]\nname = "s"\nconfidence = 0.95\nseed = 1\n\n{factors}\n'
                                  '[[response]]\nname = "y"\ngoal = "maximize"\nmin = 1.0\n')
    frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(X.shape[1])])
    frame.insert(0, "run", [f"R{i + 1:02d}" for i in range(len(X))])
    frame["y"], frame["status"], frame["note"] = X.sum(axis=1), "done", ""
    frame.to_csv(d / "runs.csv", index=False)
    return d


def cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def reactor_fit(tmp_path_factory):
    study = Study.load(reactor_identical(tmp_path_factory.mktemp("r")))
    return study, study.fit(n_restarts=1)


@pytest.mark.parametrize("mean", [False, True])
def test_identical_runs_give_no_window_and_say_what_to_run(reactor_fit, mean):
    # before this check, --mean claimed the whole box at P = 1 with adiabatic_rise predicted 42.8 K
    # everywhere, while the simulator gives 156 K at the far corner against the 44 K limit
    study, fit = reactor_fit
    win = build_window(study.spec, fit, mean_only=mean)
    assert not win.found and not win.supported and win.factors == []
    assert "14 runs at 1 distinct setting" in win.message and "d + 2 = 5" in win.message
    # n = 10 d (Loeppky et al. 2009) less the one setting already run
    assert win.advice.endswith("--method space-filling --runs 29") and runs_needed(3, 1) == 29
    tr = build_tradeoff(study.spec, fit, mean_only=mean)
    assert not tr.found and not tr.supported and len(tr.frame) == 0 and "1 distinct setting" in tr.message


def test_identical_runs_suggest_a_space_filling_batch(reactor_fit):
    study, fit = reactor_fit
    nxt = study.suggest(3, fit=fit)
    assert list(nxt.frame["aim"]) == ["space-filling"] * 3
    assert nxt.frame["p_joint"].isna().all()          # no probability claimed from these models
    assert "--method space-filling --runs 29" in nxt.advice


def test_fewer_runs_than_factors_plus_two_eight_factor_sum(tmp_path, capsys):
    # the case: 8 factors, 5 runs, y = sum of the factors, min = 1 (false: y ~ 0 at the origin)
    X = 0.4 + 0.2 * np.random.default_rng(0).random((5, 8))
    d = sum_study(tmp_path, X)
    for verb in (["window"], ["window", "--mean"], ["tradeoff"], ["tradeoff", "--mean"], ["testplan"]):
        code, out, err = cli([verb[0], d, *verb[1:]], capsys)
        assert code == 0, err
        line = [ln for ln in out.splitlines() if "do not support" in ln]
        assert len(line) == 1 and "5 runs at 5 distinct setting(s); 8 factors need at least d + 2 = 10" \
            in line[0], out
        assert "windowfinder design " + str(d) + " --method space-filling --runs 75" in line[0]
    assert not (d / "out" / "testplan.csv").exists()
    code, out, _ = cli(["suggest", d, "--count", "2"], capsys)
    assert code == 0 and out.count("space-filling") >= 3 and "--runs 75" in out


def test_one_level_per_factor_and_narrow_spread(tmp_path):
    u = np.linspace(0.0, 1.0, 12)
    one_level = Study.load(sum_study(tmp_path, np.column_stack([u, np.full(12, 0.5)]), "one"))
    win = build_window(one_level.spec, one_level.fit(n_restarts=1))
    assert not win.found and "factor 'x1' was held at one level" in win.message
    narrow = Study.load(sum_study(tmp_path, np.column_stack([u, 0.4 + 0.2 * u[::-1]]), "narrow"))
    win = build_window(narrow.spec, narrow.fit(n_restarts=1))
    assert not win.found and "span only 20% of factor 'x1'" in win.message


def test_space_filling_design_is_supported():
    # positive control: 10 d maximin Latin hypercube runs pass every check (so the checks can pass)
    X = maximin_latin_hypercube(3, 30, seed=2)
    m = GPModel(n_restarts=1).fit(X, X.sum(axis=1))
    sup = judge_support({"y": m}, ["y"], ["a", "b", "c"])
    assert sup.supported and sup.reason == "" and sup.checks[0]["distinct"] == 30
    four = GPModel(n_restarts=1).fit(X[:4], X[:4].sum(axis=1))   # 4 < d + 2 = 5
    sup = judge_support({"y": four}, ["y"], ["a", "b", "c"], "plant")
    assert not sup.supported and sup.runs_needed == 26 and "design plant --method" in sup.advice


def test_space_filling_batch_is_greedy_maximin_brute_force():
    runs = np.array([[0.5, 0.5], [0.5, 0.5], [0.2, 0.8]])
    got = space_filling_batch(runs, 4, 2, seed=5, n_candidates=256)
    C, known = sobol(2, 256, 5), runs.copy()
    for x in got:   # each pick maximises the distance to its nearest run or earlier pick (brute force)
        best = cdist(C, known).min(axis=1).max()
        assert cdist(x[None], known).min() == pytest.approx(best, rel=1e-12)
        known = np.vstack([known, x])


def test_extrapolation_flag_is_measured_against_the_box():
    from windowfinder.answers.feasibility import Feasibility

    X = np.random.default_rng(4).random((5, 8))
    m = GPModel(n_restarts=1).fit(X, X.sum(axis=1))
    feas = Feasibility([("y", 1.0, None)], type("S", (), {"models": {"y": m}, "failure": None})(), X)
    D = cdist(X, X) + np.diag(np.full(5, np.inf))
    S = sobol(8, 512, 1)
    nearest = cdist(S, X).min(axis=1)
    # the runs' own spacing rule alone (2 x median spacing = 1.33 here) would flag 0.4 % of the box
    assert np.mean(nearest > 2 * np.median(D.min(axis=1))) < 0.01
    assert feas.extrapolation_distance_ == 0.5     # half a factor's range (common practice, no source)
    fmap = feas.evaluate(S, 0.95)
    np.testing.assert_array_equal(fmap.distance > 0.5, nearest > 0.5)  # brute force (scipy cdist)
    assert fmap.share_untrusted > 0.9


def test_window_far_from_every_run_is_not_claimed(tmp_path):
    # 12 space-filling runs in 8 factors pass the design checks, but y = sum of the factors is 0 at
    # the origin while the model's prior there says 3.9 +- 0.86: a window, if any, must truly meet
    # y >= 1 at its lowest corner (closed form: the sum of the lower ends)
    d = sum_study(tmp_path, maximin_latin_hypercube(8, 12, seed=1))
    study = Study.load(d)
    fit = study.fit(n_restarts=1)
    for mean in (False, True):
        win = build_window(study.spec, fit, mean_only=mean)
        if win.found:
            assert sum(f["guard_low"] for f in win.factors) >= 1.0
        else:
            assert not win.supported and "from every run" in win.message and "--runs 68" in win.advice
