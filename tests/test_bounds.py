"""Measured values exactly at a physical bound are kept; Q^2 survives responses near 1e-300.

Expectations:
* logit ``z = log((y - a) / (b - y))`` and log ``z = log(y - a)`` (definitions) at the documented moved
  value: half the smallest distance of another measurement to that bound, else 0.1 % of the span
  (docs/methods.md, common practice, no source).
* Q^2 = 1 - PRESS / SS_tot is unchanged when every response is multiplied by one constant (both sums
  scale by its square; definition, Rasmussen & Williams 2006 §5.4.2 for the LOO predictions), and the
  GP works on standardised outputs, so 1e-300 * f must give the Q^2 of f.
"""

from __future__ import annotations

import numpy as np
import pytest

from windowfinder.errors import InputError
from windowfinder.inputs.designs import maximin_latin_hypercube
from windowfinder.models.diagnostics import diagnose
from windowfinder.models.gp import GPModel
from windowfinder.models.transform import Transform
from windowfinder.study import Study

STUDY = """\
[study]
name = "bounds"
seed = 2

[[factor]]
name = "a"
low = 0.0
high = 1.0

[[factor]]
name = "b"
low = 0.0
high = 1.0

[[response]]
name = "yield"
unit = "%"
goal = "maximize"
min = 50.0
transform = "logit"
bounds = [0, 100]

[[response]]
name = "impurity"
goal = "minimize"
max = 2.0
transform = "log"
"""


def test_logit_and_log_values_at_bounds_are_moved_inside_by_the_documented_offset():
    z, moved = Transform("logit", (0, 100)).measured([0.0, 2.0, 50.0, 97.0, 100.0])
    # 0 -> 1 (half of 2, the nearest other value's distance to 0); 100 -> 98.5 (half of 100 - 97)
    expect = [np.log(1 / 99), np.log(2 / 98), 0.0, np.log(97 / 3), np.log(98.5 / 1.5)]
    np.testing.assert_allclose(z, expect, rtol=1e-12)
    assert moved.tolist() == [True, False, False, False, True]
    z, moved = Transform("log").measured([0.0, 0.4, 1.0])
    np.testing.assert_allclose(z, np.log([0.2, 0.4, 1.0]), rtol=1e-12)
    z, _ = Transform("logit", (0, 100)).measured([100.0, 100.0])   # none off the bound: 0.1 % of 100
    np.testing.assert_allclose(z, np.log(99.9 / 0.1), rtol=1e-12)
    with pytest.raises(InputError, match="outside"):       # beyond a bound is still an input error
        Transform("logit", (0, 100)).measured([50.0, 100.5])


def test_bound_values_kept_in_the_table_and_fit_warns_naming_the_runs(tmp_path):
    (tmp_path / "study.toml").write_text(STUDY)
    U = maximin_latin_hypercube(2, 8, seed=1)
    yields = [0.0, 20.0, 45.0, 60.0, 75.0, 90.0, 98.0, 100.0]
    impurity = [0.0, 0.3, 0.5, 0.8, 1.0, 1.5, 2.5, 3.0]
    rows = [f"R{i + 1},{u[0]:.4f},{u[1]:.4f},{y},{m},done," for i, (u, y, m) in
            enumerate(zip(U, yields, impurity))]
    (tmp_path / "runs.csv").write_text("run,a,b,yield,impurity,status,note\n" + "\n".join(rows) + "\n")
    study = Study.load(tmp_path)
    assert study.runs.frame["yield"].tolist() == yields           # nothing dropped or altered
    fit = study.fit(n_restarts=1)
    lines = [w for w in fit.warnings if "physical bound" in w]
    assert any(w.startswith("yield: 2 value(s)") and "R1, R8" in w for w in lines), fit.warnings
    assert any(w.startswith("impurity: 1 value(s)") and "(runs R1)" in w for w in lines), fit.warnings
    z = fit.surrogates.models["yield"].z_train_
    assert z[0] == pytest.approx(np.log(10 / 90)) and z[7] == pytest.approx(np.log(99 / 1))
    assert fit.surrogates.models["impurity"].z_train_[0] == pytest.approx(np.log(0.15))
    assert all(np.isfinite(d.loo_q2) for d in fit.diagnostics)
    (tmp_path / "runs.csv").write_text((tmp_path / "runs.csv").read_text().replace(",0.0,done", ",-0.1,done"))
    with pytest.raises(InputError, match="beyond the physical bounds"):
        Study.load(tmp_path)


def test_q2_of_tiny_responses_equals_q2_of_the_same_shape():
    X = maximin_latin_hypercube(2, 12, seed=3)
    f = np.sin(3 * X[:, 0]) + X[:, 1] ** 2
    names = dict(factor_names=["a", "b"], factor_spans=[1.0, 1.0])
    ref = diagnose(GPModel(n_restarts=1).fit(X, f), f, **names)
    tiny = diagnose(GPModel(n_restarts=1).fit(X, 1e-300 * f), 1e-300 * f, **names)
    assert np.isfinite(tiny.loo_q2) and tiny.loo_q2 == pytest.approx(ref.loo_q2, abs=1e-6)
    assert tiny.loo_rmse == pytest.approx(1e-300 * ref.loo_rmse, rel=1e-6)
    flat = diagnose(GPModel(n_restarts=1).fit(X, np.full(12, 1e-300)), np.full(12, 1e-300), **names)
    assert np.isnan(flat.loo_q2) and any("cannot be computed" in w for w in flat.warnings)
