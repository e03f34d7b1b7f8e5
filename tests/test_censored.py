"""Failed runs that name the limit they broke: the runs.csv column, censored values, window message."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from windowfinder.answers.results import build_window
from windowfinder.cases import case_dir, load_simulator
from windowfinder.errors import InputError
from windowfinder.models.censored import fit_censored, truncated_mean
from windowfinder.models.gp import GPModel
from windowfinder.study import Study

from conftest import RUNS


@pytest.mark.parametrize("side", ["above", "below"])
def test_truncated_mean_matches_scipy_truncnorm(side):
    # Reference: scipy.stats.truncnorm (mean of a normal truncated to one side of a bound).
    mu, sd, c = np.array([1.0, -2.0, 0.3]), np.array([0.5, 2.0, 0.1]), 0.4
    a, b = ((c - mu) / sd, np.inf) if side == "above" else (-np.inf, (c - mu) / sd)
    ref = stats.truncnorm.mean(a, b, loc=mu, scale=sd)
    np.testing.assert_allclose(truncated_mean(mu, sd, c, side), ref, rtol=1e-9)


def test_censored_values_lie_beyond_the_bound_and_move_the_model_there():
    # Truth y = 10 x (1-D); runs with x > 0.7 are only known to exceed 7. The imputed values must lie
    # above 7 (definition of the truncated mean), and the model's prediction at x = 0.9 must be above the
    # bound, where dropping those runs leaves it free (contract of censoring; no external source).
    rng = np.random.default_rng(0)
    x = np.linspace(0.0, 1.0, 14)
    y = 10.0 * x + 0.2 * rng.standard_normal(14)
    cens = x > 0.7
    X = x[:, None]
    m = fit_censored(GPModel(n_restarts=1), X[~cens], y[~cens], X[cens], 7.0, "above")
    assert np.all(m.censored_[1] > 7.0)
    assert "censored" in m.note_
    assert float(m.predict(np.array([[0.9]]), return_std=False)[0]) > 7.0


def _with_rows(study_dir, extra):
    (study_dir / "runs.csv").write_text(RUNS.replace("run,temperature,time,yield,exotherm,status,note",
                                                     "run,temperature,time,yield,exotherm,status,failed_limit,note")
                                        .replace(",done,", ",done,,").replace(",failed,tar formed", ",failed,,tar formed")
                                        + extra)


@pytest.mark.parametrize("cell, message", [
    ("exotherm,done", "status is 'done'"),
    ("exothem,failed", "did you mean 'exotherm'"),
    ("exotherm:min,failed", "no min limit"),
])
def test_failed_limit_cell_errors_name_row_and_fix(study_dir, cell, message):
    name, status = cell.split(",")
    _with_rows(study_dir, f"R006,88,175,,,{status},{name},\n")
    before = (study_dir / "runs.csv").read_bytes()
    with pytest.raises(InputError, match=message) as err:
        Study.load(study_dir)
    assert "runs.csv line 7 (run R006)" in str(err.value)
    assert (study_dir / "runs.csv").read_bytes() == before


def test_failed_limit_round_trips_and_leaves_plain_tables_alone(study_dir):
    s = Study.load(study_dir)
    s.record_results(pd.DataFrame([{"run": "R001", "yield": 78.2}]))
    assert "failed_limit" not in (study_dir / "runs.csv").read_text().splitlines()[0]
    _with_rows(study_dir, "R006,88,175,,,failed,exotherm,boiled over\n")
    s = Study.load(study_dir)
    assert s.runs.broken_limits().tolist()[-1] == "exotherm:max"
    s.record_results(pd.DataFrame([{"run": "R001", "yield": 78.3}]))
    again = Study.load(study_dir)
    assert again.runs.broken_limits().tolist()[-1] == "exotherm:max"
    mask, bound, side = again.censored_data()["exotherm"]
    assert mask.tolist() == [False, False, False, False, False, True] and bound == 50.0 and side == "above"


def _reactor(tmp_path, runs=24):
    folder = tmp_path / "reactor"
    folder.mkdir()
    (folder / "study.toml").write_text((case_dir("reactor") / "study.toml").read_text())
    study = Study.load(folder)
    sim = load_simulator("reactor")
    frame = study.design("space-filling", runs=runs, seed=5)
    for i, rec in frame.iterrows():
        frame.loc[i, study.spec.response_names] = pd.Series(
            sim.evaluate({f: rec[f] for f in study.spec.factor_names}, seed=200 + i))
    frame["status"] = "done"
    return folder, frame


def test_runs_that_broke_the_heat_limit_cost_little_window(tmp_path):
    # The failure-model issue: failed runs deep inside a region the heat limit already excludes cut the
    # window 5.7x against deleting those rows. Named as censored values of adiabatic_rise they must cost
    # less than a third of the volume against deleting them (threshold: common practice, no source) and
    # must not create a failure model.
    folder, frame = _reactor(tmp_path)
    hot = frame.sort_values("adiabatic_rise").index[-2:]
    assert (frame.loc[hot, "adiabatic_rise"] > 44.0).all()          # the limit excludes them anyway
    deleted = frame.drop(index=hot)
    Study.load(folder).add_runs(deleted)
    study = Study.load(folder)
    v_deleted = build_window(study.spec, study.fit()).volume_share
    named = frame.loc[hot].copy()
    named[study.spec.response_names] = np.nan
    named["status"], named["failed_limit"] = "failed", "adiabatic_rise"
    study.add_runs(named)
    study = Study.load(folder)
    fit = study.fit()
    assert fit.surrogates.failure is None
    assert any("censored" in w for w in fit.warnings)
    win = build_window(study.spec, fit)
    assert win.found and win.volume_share >= (2.0 / 3.0) * v_deleted


def test_window_message_says_when_the_failure_model_blocks(tmp_path):
    # Contract of build_window: with limits met almost surely everywhere (one response far inside its
    # max) and P(works) held at 0.9 < 0.95 by a stub, no window exists and the message must say that
    # the failure model is what blocks it (closed form: joint = 0.9 * P(limit) < 0.95).
    folder, frame = _reactor(tmp_path, runs=16)
    toml = (folder / "study.toml").read_text()
    toml = toml.replace("max = 44.0", "max = 1000.0").replace("min = 80.0", "min = 0.5").replace(
        "max = 5.0", "max = 99.0")
    (folder / "study.toml").write_text(toml)
    Study.load(folder).add_runs(frame)
    study = Study.load(folder)
    fit = study.fit()

    class Stub:
        def predict_proba(self, X):
            return np.full(np.atleast_2d(X).shape[0], 0.9)

    fit.surrogates.failure = Stub()
    win = build_window(study.spec, fit)
    assert not win.found
    assert "failure model gives P(process works) = 0.900" in win.message
