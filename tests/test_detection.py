"""Values below a detection limit (``<10`` cells, or 0 with ``detection_limit``) as censored observations."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from windowfinder.errors import InputError
from windowfinder.inputs.runs import read_runs, write_runs
from windowfinder.inputs.spec import StudySpec

from conftest import STUDY, snapshot

DL_STUDY = STUDY.replace('kind = "safety"', 'kind = "safety"\ndetection_limit = 5.0')


def _study(tmp_path, text, runs):
    d = tmp_path / "s"
    d.mkdir()
    (d / "study.toml").write_text(text)
    (d / "runs.csv").write_text(runs)
    return d


def test_below_cells_and_zero_with_detection_limit_are_censored_and_round_trip(tmp_path):
    d = _study(tmp_path, DL_STUDY, "run,temperature,time,yield,exotherm,status,note\n"
                                   "R1,50,60,<70,0,done,\nR2,60,90,82,30,done,\nR3,70,90,0.5e2,3,done,\n")
    spec = StudySpec.from_toml(d / "study.toml")
    t = read_runs(d / "runs.csv", spec)
    np.testing.assert_array_equal(t.below("yield"), [70.0, np.nan, np.nan])
    np.testing.assert_array_equal(t.below("exotherm"), [5.0, np.nan, np.nan])   # 0 with a limit of 5
    assert np.isnan(t.frame.loc[0, "yield"]) and t.frame.loc[2, "exotherm"] == 3.0   # 3 is a measurement
    write_runs(d / "copy.csv", spec, t.frame)
    assert (d / "copy.csv").read_text().splitlines()[1] == "R1,50,60,<70,<5,done,"
    t2 = read_runs(d / "copy.csv", spec)
    np.testing.assert_array_equal(t2.below("exotherm"), t.below("exotherm"))


@pytest.mark.parametrize("cell, message", [("<", "'yield' is empty"), ("<abc", "not a number"),
                                           ("<inf", "not finite")])
def test_bad_below_cell_is_one_clear_line(tmp_path, cell, message):
    d = _study(tmp_path, STUDY, f"run,temperature,time,yield,exotherm\nR1,50,60,{cell},20\n")
    before = snapshot(d)
    run = subprocess.run([sys.executable, "-m", "windowfinder", "check", str(d)], capture_output=True,
                         text=True)
    assert run.returncode == 2 and message in run.stderr and "line 2 (run R1)" in run.stderr
    assert "Traceback" not in run.stderr and snapshot(d) == before


def test_below_a_log_floor_and_bad_detection_limits_are_refused(tmp_path):
    text = STUDY.replace('kind = "safety"', 'kind = "safety"\ntransform = "log"')
    d = _study(tmp_path, text, "run,temperature,time,yield,exotherm\nR1,50,60,80,<0\n")
    with pytest.raises(InputError, match="nothing lies below 0"):
        read_runs(d / "runs.csv", StudySpec.from_toml(d / "study.toml"))
    for dl, msg in (("0", "must be above 0"), ("-1", "must be above 0"), ("'x'", "detection_limit")):
        (d / "study.toml").write_text(STUDY.replace('kind = "safety"', f'kind = "safety"\ndetection_limit = {dl}'))
        with pytest.raises(InputError, match=msg):
            StudySpec.from_toml(d / "study.toml")


def test_truncated_mean_below_matches_numerical_integration():
    # E[Z | Z < c] for Z ~ N(mu, s^2), by quadrature of z phi(z) over (-inf, c) / Phi(c) (scipy.integrate)
    from windowfinder.models.censored import truncated_mean

    for mu, s, c in ((0.0, 1.0, 0.5), (3.0, 0.4, 2.0), (-1.0, 2.0, -4.0)):
        pdf = stats.norm(mu, s).pdf
        num = integrate.quad(lambda z: z * pdf(z), -np.inf, c)[0] / integrate.quad(pdf, -np.inf, c)[0]
        assert truncated_mean(mu, s, c, "below") == pytest.approx(num, rel=1e-7, abs=1e-9)


def test_values_below_detection_enter_the_model_as_censored(tmp_path):
    """Simulated impurity (own scenario) with a detection limit: censored runs pull the model below it."""
    from windowfinder.study import Study

    rng = np.random.default_rng(4)
    u = rng.random((24, 2))
    impurity = 2.0 + 10.0 * u[:, 0] + 0.2 * rng.standard_normal(24)          # reads 2..12 %
    cells = [f"<{5:g}" if v < 5.0 else f"{v:.3f}" for v in impurity]
    below = impurity < 5.0
    assert 3 <= below.sum() <= 12
    text = STUDY.replace('kind = "safety"', 'kind = "safety"\ndetection_limit = 5.0')
    frame = pd.DataFrame({"run": [f"R{i:02d}" for i in range(24)], "temperature": 40 + 50 * u[:, 0],
                          "time": 30 + 150 * u[:, 1], "yield": 80 + 5 * u[:, 1], "exotherm": cells,
                          "status": "done", "note": ""})
    d = tmp_path / "s"
    d.mkdir()
    (d / "study.toml").write_text(text)
    (d / "runs.csv").write_text(frame.to_csv(index=False))
    study = Study.load(d)
    fit = study.fit(n_restarts=1)
    m = fit.surrogates.models["exotherm"]
    X = study.runs.X_coded(study.runs.completed())
    mean = m.transform_.inverse(m.predict(X[below], return_std=False))
    assert (mean < 5.0 + 0.3).all()        # the model keeps the censored runs below the limit
    assert any("censored" in w for w in fit.warnings)
    # the imputed values are the truncated means below the limit under the final model's predictive
    imputed = m.censored_[1]
    assert (imputed < 5.0).all()


def test_mixed_sides_and_bounds_impute_on_their_own_side():
    # one censored set with per-run bounds and sides: each imputed value is the truncated-normal mean on
    # its own side of its own bound (Schmee & Hahn 1979), so it lies beyond that bound
    from windowfinder.models.censored import fit_censored
    from windowfinder.models.gp import GPModel

    rng = np.random.default_rng(0)
    X = rng.random((16, 1))
    y = 10 * X[:, 0] + 0.1 * rng.standard_normal(16)
    Xc = np.array([[0.05], [0.95], [0.5]])
    bounds, sides = np.array([1.0, 9.0, 4.0]), np.array(["below", "above", "below"], dtype=object)
    m = fit_censored(GPModel(n_restarts=0), X, y, Xc, bounds, sides)
    imputed = m.censored_[1]
    assert imputed[0] < 1.0 and imputed[1] > 9.0 and imputed[2] < 4.0
    assert "1 above" in m.note_ and "2 below" in m.note_
    with pytest.raises(InputError, match="censoring side 'left'"):
        fit_censored(GPModel(n_restarts=0), X, y, Xc, bounds, np.array(["below", "left", "below"], object))
