"""Checks of windowfinder.models.diagnostics against brute-force leave-one-out refits.

Sources:
- Q^2 = 1 - PRESS / SS_tot with PRESS the sum of squared leave-one-out prediction errors
  (Allen 1974, "The relationship between variable selection and data augmentation and a method for
  prediction", Technometrics 16; Montgomery 2013, Design and Analysis of Experiments, 8th ed., §10.7).
- Gaussian-process leave-one-out at fixed hyperparameters: Rasmussen & Williams (2006), Gaussian
  Processes for Machine Learning, §5.4.2; brute force with scikit-learn GaussianProcessRegressor.
- Data: Montgomery (2013) §11.3 central composite design (tests/data/montgomery_ccd.csv, from memory).
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn.gaussian_process import GaussianProcessRegressor

from windowfinder.models.diagnostics import ModelDiagnostics, diagnose, diagnose_all, summary_frame
from windowfinder.errors import InputError
from windowfinder.models.gp import JITTER, LENGTH_SCALE_BOUNDS, GPModel
from windowfinder.models.quadratic import QuadraticModel
from windowfinder.models.surrogates import Surrogates

DATA = Path(__file__).parent / "data" / "montgomery_ccd.csv"
FACTORS, SPANS = ["time", "temperature"], [10.0, 10.0]  # coded [0, 1] = 80..90 min, 170..180 degF


@pytest.fixture(scope="module")
def ccd():
    d = pd.read_csv(DATA)
    U = np.column_stack([(d["time"] - 80.0) / 10.0, (d["temperature"] - 170.0) / 10.0])
    return U, d


def brute_gp_loo(m, U):
    """Refit on n - 1 runs with the fitted kernel fixed (R&W 2006 §5.4.2); latent mean and sd incl. noise."""
    ys = (m.z_train_ - m.y_mean_) / m.y_scale_
    mu, sd = [], []
    for i in range(len(ys)):
        keep = np.arange(len(ys)) != i
        ref = GaussianProcessRegressor(kernel=m.gp_.kernel_, optimizer=None, alpha=JITTER)
        r_mu, r_sd = ref.fit(U[keep], ys[keep]).predict(U[i:i + 1], return_std=True)
        mu.append(m.y_mean_ + m.y_scale_ * r_mu[0])
        sd.append(m.y_scale_ * r_sd[0])
    return np.array(mu), np.array(sd)


def brute_quadratic_loo(U, y):
    """Refit the textbook second-order model on n - 1 runs (Montgomery 2013 §10.6-10.7)."""
    x = 2 * U - 1
    F = np.column_stack([np.ones(len(y)), x, x[:, 0] * x[:, 1], x ** 2])
    n, p = F.shape
    mu, sd = [], []
    for i in range(n):
        keep = np.arange(n) != i
        b, *_ = np.linalg.lstsq(F[keep], y[keep], rcond=None)
        s2 = np.sum((y[keep] - F[keep] @ b) ** 2) / (n - 1 - p)
        mu.append(F[i] @ b)
        sd.append(np.sqrt(s2 * (1 + F[i] @ np.linalg.inv(F[keep].T @ F[keep]) @ F[i])))
    return np.array(mu), np.array(sd), n - 1 - p


def q2_and_coverage(y, mu, sd, q):
    press = np.sum((y - mu) ** 2)
    q2 = 1 - press / np.sum((y - y.mean()) ** 2)
    inside = sum(1 for yi, mi, si in zip(y, mu, sd) if mi - q * si <= yi <= mi + q * si)  # count one by one
    return q2, np.sqrt(press / len(y)), inside / len(y)


# Q^2 (Allen 1974 / Montgomery 2013 §10.7) and 95% coverage against brute-force GP refits.
@pytest.mark.parametrize("response", ["yield", "viscosity"])
def test_gp_q2_and_coverage_brute_force(ccd, response):
    U, d = ccd
    y = d[response].to_numpy(float)
    # plug-in hyperparameters: the brute force refits at one fixed kernel (the mixture: test_marginal.py)
    m = GPModel(n_restarts=3, random_state=1, hyperparameters="map").fit(U, y)
    diag = diagnose(m, y, response, FACTORS, SPANS)
    mu, sd = brute_gp_loo(m, U)
    q2, rmse, cov = q2_and_coverage(y, mu, sd, stats.norm.ppf(0.975))
    assert diag.loo_q2 == pytest.approx(q2, abs=1e-8)
    assert diag.loo_rmse == pytest.approx(rmse, rel=1e-8)
    assert diag.loo_rmse_natural == pytest.approx(rmse, rel=1e-8)   # no transform: the same scale
    assert diag.coverage95 == pytest.approx(cov)
    assert diag.n == 13 and diag.model == "gp"
    assert diag.length_scales == pytest.approx(dict(zip(FACTORS, m.length_scales_ * 10.0)))
    assert diag.noise_sd == pytest.approx(m.noise_std_)  # no transform: latent = natural units


# Same for least squares: Student t with n - p - 1 degrees of freedom for a left-out run (Montgomery §10.6).
def test_quadratic_q2_and_coverage_brute_force(ccd):
    U, d = ccd
    y = d["viscosity"].to_numpy(float)
    diag = diagnose(QuadraticModel().fit(U, y), y, "viscosity", FACTORS, SPANS)
    mu, sd, df = brute_quadratic_loo(U, y)
    q2, rmse, cov = q2_and_coverage(y, mu, sd, stats.t.ppf(0.975, df))
    assert diag.loo_q2 == pytest.approx(q2, abs=1e-9)
    assert diag.loo_rmse == pytest.approx(rmse, rel=1e-9)
    assert diag.coverage95 == pytest.approx(cov)
    assert diag.length_scales == {} and diag.model == "quadratic"
    # measured 0.44 < 0.5: the Q^2 rule (common practice, no source) must speak up
    assert q2 < 0.5 and any("explains little" in w for w in diag.warnings)


# Transformed response: Q^2 and RMSE on the model's (logit) scale, by hand from brute-force refits
# (Allen 1974 PRESS on z = logit(y / 100)); the natural-unit RMSE of the inverse-transformed LOO medians
# beside them.
def test_logit_q2_on_the_model_scale_rmse_in_natural_units(ccd):
    U, d = ccd
    y = d["yield"].to_numpy(float)
    m = GPModel(transform="logit", bounds=(0, 100), n_restarts=2, hyperparameters="map").fit(U, y)
    diag = diagnose(m, y, "yield", FACTORS, SPANS)
    mu, sd = brute_gp_loo(m, U)
    z = np.log(y / (100 - y))
    assert diag.loo_q2 == pytest.approx(1 - np.sum((z - mu) ** 2) / np.sum((z - z.mean()) ** 2), abs=1e-8)
    assert diag.loo_rmse == pytest.approx(np.sqrt(np.mean((z - mu) ** 2)), rel=1e-7)
    assert diag.scale == "logit"
    median = 100 / (1 + np.exp(-mu))
    assert diag.loo_rmse_natural == pytest.approx(np.sqrt(np.mean((y - median) ** 2)), rel=1e-7)
    np.testing.assert_allclose(diag.loo_median, median, rtol=1e-9)
    # noise sd: latent sd times the slope of the inverse transform (central difference) at the mean
    z_bar, h = np.mean(m.z_train_), 1e-5
    slope = (100 / (1 + np.exp(-(z_bar + h))) - 100 / (1 + np.exp(-(z_bar - h)))) / (2 * h)
    assert diag.noise_sd == pytest.approx(m.noise_std_ * slope, rel=1e-6)


def test_narrow_intervals_are_flagged(ccd):
    # intervals shrunk 100-fold: brute-force count of runs inside, and the coverage rule
    # (95% intervals should hold at least 80% of >= 10 runs; common practice, no source)
    U, d = ccd
    y = d["yield"].to_numpy(float)
    m = copy.copy(GPModel(n_restarts=1).fit(U, y))
    mu, sd = m.loo()
    m.loo = lambda: (mu, sd / 100)
    diag = diagnose(m, y, "yield", FACTORS, SPANS)
    q = stats.norm.ppf(0.975)
    inside = sum(1 for i in range(13) if abs(y[i] - mu[i]) <= q * sd[i] / 100)
    assert diag.coverage95 == pytest.approx(inside / 13) and inside / 13 < 0.8
    assert any("too narrow" in w for w in diag.warnings)


def test_length_scale_at_bounds_named(ccd):
    # a response of temperature alone (published yield curvature in x2, from memory, with the time terms
    # dropped): time is inactive, and a length scale forced to the lower bound is named for temperature
    U, d = ccd
    x2 = 2 * U[:, 1] - 1
    y = 79.94 + 0.515 * x2 - 1.001 * x2 ** 2 + 0.01 * np.sin(7 * np.arange(len(x2)))
    m = copy.copy(GPModel(n_restarts=2).fit(U, y))
    m.length_scales_ = np.array([LENGTH_SCALE_BOUNDS[1], LENGTH_SCALE_BOUNDS[0]])
    w = " | ".join(diagnose(m, None, "yield", FACTORS, SPANS).warnings)
    assert "factor time looks inactive" in w and "faster along temperature" in w
    # with the real yield data time matters (slope 0.995 per coded unit): no inactive warning
    m = copy.copy(GPModel(n_restarts=1).fit(U, d["yield"].to_numpy(float)))
    m.length_scales_ = np.array([LENGTH_SCALE_BOUNDS[1], LENGTH_SCALE_BOUNDS[1]])
    assert not [x for x in diagnose(m, None, "yield", FACTORS, SPANS).warnings if "inactive" in x]


def test_results_serialise_and_collect(ccd):
    U, d = ccd
    s = Surrogates.fit_arrays(U, {"yield": d["yield"].to_numpy(), "mw": d["mw"].to_numpy()}, n_restarts=1)
    diags = diagnose_all(s, FACTORS, SPANS)
    direct = diagnose(s["mw"], d["mw"].to_numpy(float), "mw", FACTORS, SPANS)
    assert diags[1].loo_q2 == pytest.approx(direct.loo_q2, rel=1e-9)
    back = json.loads(json.dumps([x.to_dict() for x in diags]))
    assert back[0]["response"] == "yield" and len(back[1]["loo_median"]) == 13
    table = summary_frame(diags)
    assert list(table["response"]) == ["yield", "mw"] and "length_scale:time" in table
    assert diags[0].loo_frame()["inside"].mean() == pytest.approx(diags[0].coverage95)
    assert isinstance(diags[0], ModelDiagnostics)
    with pytest.raises(InputError, match="12 measured values"):
        diagnose(s["yield"], d["yield"].to_numpy()[:12], "yield", FACTORS, SPANS)


# A log response spanning two decades: Q^2 on the natural scale is dominated by the largest runs, on the
# model's (log) scale it measures the fit the model was made for. Hand computation of both from the
# closed-form LOO (Allen 1974 PRESS); the "do not trust" warning follows the model-scale value.
def test_log_response_judged_on_its_own_scale():
    rng = np.random.default_rng(3)
    U = rng.random((20, 2))
    z = 1.0 + 3.0 * U[:, 0] + 1.5 * U[:, 1] ** 2 + 0.25 * rng.standard_normal(20)
    y = np.exp(z)
    m = GPModel(transform="log", n_restarts=2).fit(U, y)
    diag = diagnose(m, y, "y", ["a", "b"], [1.0, 1.0])
    mu, _ = m.loo()
    q2_log = 1 - np.sum((z - mu) ** 2) / np.sum((z - z.mean()) ** 2)
    q2_nat = 1 - np.sum((y - np.exp(mu)) ** 2) / np.sum((y - y.mean()) ** 2)
    assert diag.loo_q2 == pytest.approx(q2_log, abs=1e-9) and diag.scale == "log"
    assert diag.loo_rmse_natural == pytest.approx(np.sqrt(np.mean((y - np.exp(mu)) ** 2)), rel=1e-9)
    assert (q2_log >= 0.5) == (not any("explains little" in w for w in diag.warnings))
    assert q2_log > q2_nat   # the natural scale understates this model (what the old check used)


# Spread of the standardised LOO errors: with calibrated predictions they are standard normal, so the sum
# of their squares is chi-square with n degrees of freedom (the band: scipy.stats.chi2, central 99 %); a
# Student-t error (least squares) enters as the normal score with the same tail probability.
def test_loo_spread_flags_too_sure_and_too_timid_models_by_the_chi_square_band(ccd):
    U, d = ccd
    y = d["yield"].to_numpy(float)
    m = GPModel(n_restarts=2, random_state=0).fit(U, y)
    mu, sd = m.loo()
    r = (m.z_train_ - mu) / sd
    spread = float(np.sqrt(np.mean(r ** 2)))
    diag = diagnose(m, y, "yield", FACTORS, SPANS)
    assert diag.loo_spread == pytest.approx(spread, rel=1e-10)
    n = len(y)
    lo, hi = np.sqrt(stats.chi2.ppf([0.005, 0.995], n) / n)
    for target, flagged in ((1.05 * hi, "too sure"), (0.95 * lo, "too timid"), (0.97 * hi, None),
                            (1.03 * lo, None)):
        scaled = copy.copy(m)
        factor = spread / target
        scaled.loo = lambda f=factor: (mu, sd * f)
        notes = " ".join(diagnose(scaled, y, "yield", FACTORS, SPANS).warnings)
        assert ("too sure" in notes) == (flagged == "too sure"), (target, notes)
        assert ("too timid" in notes) == (flagged == "too timid"), (target, notes)
    q = QuadraticModel().fit(U, y)
    qm, qs = q.loo()
    scores = stats.norm.isf(stats.t.sf((q.z_train_ - qm) / qs, q.loo_dof))
    assert diagnose(q, y, "yield", FACTORS, SPANS).loo_spread == pytest.approx(np.sqrt(np.mean(scores ** 2)))
