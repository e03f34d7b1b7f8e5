"""Checks of windowfinder.models.gp against closed forms, textbook examples and scikit-learn.

Sources used below:
- Rasmussen & Williams (2006), Gaussian Processes for Machine Learning, §2.2 (posterior) and §5.4.2
  (closed-form leave-one-out, eqs. 5.10-5.12).
- Montgomery (2013), Design and Analysis of Experiments, 8th ed., §10.5-10.7 (regression prediction
  variance, PRESS) and §11.3 (central composite design of a chemical process: time, temperature ->
  yield, viscosity, molecular weight). Data and published coefficients written down from memory.
- scikit-learn GaussianProcessRegressor as the reference implementation.
- Branin-Hoo function: Dixon & Szego (1978), Towards Global Optimisation 2 (standard test function).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import qmc
from sklearn.gaussian_process import GaussianProcessRegressor

from windowfinder.errors import InputError
from windowfinder.models.gp import JITTER, GPModel
from windowfinder.models.failure import FailureModel
from windowfinder.models.quadratic import QuadraticModel, feature_names
from windowfinder.models.surrogates import Surrogates
from windowfinder.models.transform import Transform

DATA = Path(__file__).parent / "data" / "montgomery_ccd.csv"


def branin(U):
    """Branin-Hoo on x1 in [-5, 10], x2 in [0, 15] (Dixon & Szego 1978), from unit-cube inputs."""
    x1, x2 = -5.0 + 15.0 * U[:, 0], 15.0 * U[:, 1]
    b, c, t = 5.1 / (4 * np.pi ** 2), 5 / np.pi, 1 / (8 * np.pi)
    return (x2 - b * x1 ** 2 + c * x1 - 6) ** 2 + 10 * (1 - t) * np.cos(x1) + 10


@pytest.fixture(scope="module")
def branin_data():
    X = qmc.LatinHypercube(d=2, seed=1).random(15)
    # measurement noise added so the noise term is not at its bound (seeded)
    y = branin(X) + np.random.default_rng(2).normal(0.0, 3.0, 15)
    return X, y


@pytest.fixture(scope="module")
def branin_gp(branin_data):
    # the plug-in GP (hyperparameters at their mode), which scikit-learn computes at a fixed kernel; the
    # default mixture over the hyperparameters is checked in tests/test_marginal.py
    return GPModel(n_restarts=5, random_state=0, hyperparameters="map").fit(*branin_data)


@pytest.fixture(scope="module")
def ccd():
    """Montgomery (2013) §11.3 central composite design, coded -> [0, 1] (u = (x + 1) / 2)."""
    d = pd.read_csv(DATA)
    x = np.column_stack([(d["time"] - 85.0) / 5.0, (d["temperature"] - 175.0) / 5.0])
    return (x + 1.0) / 2.0, d


def reference_gp(model, X, z):
    """scikit-learn GP with the model's fitted kernel held fixed, on the model's standardisation."""
    ref = GaussianProcessRegressor(kernel=model.gp_.kernel_, optimizer=None, alpha=JITTER, normalize_y=False)
    return ref.fit(X, (z - model.y_mean_) / model.y_scale_)


# 1. Rasmussen & Williams (2006) §5.4.2: closed-form LOO equals explicit refits at fixed hyperparameters.
def test_gp_loo_equals_explicit_refit(branin_gp, branin_data):
    X, y = branin_data
    m = branin_gp
    mu, sd = m.loo()
    for i in range(len(y)):
        keep = np.arange(len(y)) != i
        ref = reference_gp(m, X[keep], y[keep])
        r_mu, r_sd = ref.predict(X[i:i + 1], return_std=True)  # sklearn's sd includes the white noise
        assert (mu[i] - m.y_mean_) / m.y_scale_ == pytest.approx(r_mu[0], abs=1e-6)
        assert sd[i] / m.y_scale_ == pytest.approx(r_sd[0], abs=1e-6)
    assert m.noise_std_ > 0.1  # the data carry noise sd 3; the check above includes it


# 2. Reference library: predictions equal scikit-learn's GaussianProcessRegressor with the same kernel.
@pytest.mark.parametrize("transform,bounds", [("none", None), ("log", (-10.0, None))])
def test_gp_predict_equals_sklearn(branin_data, transform, bounds):
    X, y = branin_data
    m = GPModel(transform=transform, bounds=bounds, n_restarts=2, random_state=3, hyperparameters="map").fit(X, y)
    z = np.log(y + 10.0) if transform == "log" else y  # log with lower offset -10 (noisy Branin > -10)
    ref = reference_gp(m, X, z)
    Xt = qmc.Halton(d=2, seed=4).random(20)
    r_mu, r_sd = ref.predict(Xt, return_std=True)
    mu, sd_noise = m.predict(Xt, noise=True)
    _, sd_f = m.predict(Xt, noise=False)
    np.testing.assert_allclose(mu, m.y_mean_ + m.y_scale_ * r_mu, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(sd_noise, m.y_scale_ * r_sd, rtol=1e-7)
    # latent-function variance = sklearn's variance minus the fitted white-noise level (R&W 2006 §2.2)
    f_var = r_sd ** 2 - m.gp_.kernel_.k2.noise_level
    np.testing.assert_allclose(sd_f, m.y_scale_ * np.sqrt(np.maximum(f_var, 0)), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(m.predict(Xt, return_std=False), mu)
    assert m.length_scales_.shape == (2,)
    assert m.noise_std_ == pytest.approx(m.y_scale_ * np.sqrt(m.gp_.kernel_.k2.noise_level))


# 3. Montgomery (2013) §11.3, published coefficients (from memory), coded +-1 units.
def test_quadratic_reproduces_montgomery_ccd(ccd):
    U, d = ccd
    assert feature_names(2) == ["1", "x1", "x2", "x1*x2", "x1^2", "x2^2"]
    published = {  # intercept, x1, x2, x1x2, x1^2, x2^2 (from memory)
        "yield": [79.94, 0.995, 0.515, 0.25, -1.376, -1.001],
        "viscosity": [70.00, -0.155, -0.948, -1.25, -0.69, -6.69],
    }
    for name, coef in published.items():
        m = QuadraticModel(coding="pm1").fit(U, d[name].to_numpy())
        np.testing.assert_allclose(m.coef_, coef, atol=0.01, err_msg=name)
    # first-order model of molecular weight: 3386.2 + 205.1 x1 + 177.4 x2 (from memory)
    mw = QuadraticModel(degree=1).fit(U, d["mw"].to_numpy())
    np.testing.assert_allclose(mw.coef_, [3386.2, 205.1, 177.4], atol=0.1)


def test_quadratic_coding_changes_coefficients_not_predictions(ccd):
    # x = 2u - 1 turns b1 x into 2 b1 u: the linear coefficient in [0, 1] units is twice as large
    U, d = ccd
    pm = QuadraticModel(coding="pm1").fit(U, d["yield"].to_numpy())
    un = QuadraticModel(coding="unit").fit(U, d["yield"].to_numpy())
    Xt = qmc.Halton(d=2, seed=0).random(7)
    np.testing.assert_allclose(pm.predict(Xt, noise=True), un.predict(Xt, noise=True), rtol=1e-9)
    np.testing.assert_allclose(un.coef_[4:], 4 * pm.coef_[4:], rtol=1e-9)  # squares: (2u)^2


def _textbook_matrix(U):
    x = 2 * U - 1  # Montgomery's coding, built independently of the package
    x1, x2 = x[:, 0], x[:, 1]
    return np.column_stack([np.ones(len(x)), x1, x2, x1 * x2, x1 ** 2, x2 ** 2])


# 4. Montgomery (2013) §10.5-10.6: Var(y0_hat) = s^2 x0'(X'X)^-1 x0; §10.7: PRESS residuals e_i / (1 - h_ii).
def test_quadratic_variance_and_press_match_textbook(ccd):
    U, d = ccd
    y = d["yield"].to_numpy()
    m = QuadraticModel().fit(U, y)
    F = _textbook_matrix(U)
    beta, *_ = np.linalg.lstsq(F, y, rcond=None)
    n, p = F.shape
    s2 = np.sum((y - F @ beta) ** 2) / (n - p)
    Xt = qmc.Halton(d=2, seed=5).random(9)
    F0 = _textbook_matrix(Xt)
    v = s2 * np.array([f @ np.linalg.inv(F.T @ F) @ f for f in F0])
    mu, sd = m.predict(Xt)
    np.testing.assert_allclose(mu, F0 @ beta, rtol=1e-10)
    np.testing.assert_allclose(sd, np.sqrt(v), rtol=1e-8)
    np.testing.assert_allclose(m.predict(Xt, noise=True)[1], np.sqrt(v + s2), rtol=1e-8)
    # leave-one-out by explicit refits on n - 1 runs
    loo_mu, loo_sd = m.loo()
    for i in range(n):
        keep = np.arange(n) != i
        b_i, *_ = np.linalg.lstsq(F[keep], y[keep], rcond=None)
        s2_i = np.sum((y[keep] - F[keep] @ b_i) ** 2) / (n - 1 - p)
        var_i = s2_i * (1 + F[i] @ np.linalg.inv(F[keep].T @ F[keep]) @ F[i])
        assert loo_mu[i] == pytest.approx(F[i] @ b_i, abs=1e-9)
        assert loo_sd[i] == pytest.approx(np.sqrt(var_i), rel=1e-8)


def test_quadratic_refuses_too_few_or_unseparable_runs():
    # 2 factors: 6 coefficients + 1 for the noise estimate = 7 runs needed (Montgomery 2013, §10.2)
    X = qmc.Halton(d=2, seed=0).random(6)
    with pytest.raises(InputError, match="at least 7 runs"):
        QuadraticModel().fit(X, np.arange(6.0))
    # 2^2 factorial + 3 centre runs: pure quadratic terms are aliased (Montgomery 2013, §6.8)
    X = np.array([[0, 0], [0, 1], [1, 0], [1, 1], [.5, .5], [.5, .5], [.5, .5]], float)
    with pytest.raises(InputError, match="3 levels"):
        QuadraticModel().fit(X, np.arange(7.0))


# 5. Rule of thumb (common practice, no source): a usable model has LOO Q^2 >= 0.6. Montgomery yield data.
def test_gp_loo_q2_on_montgomery_yield(ccd):
    U, d = ccd
    y = d["yield"].to_numpy()
    m = GPModel(n_restarts=5, random_state=0).fit(U, y)
    mu, _ = m.loo()
    q2 = 1 - np.sum((y - mu) ** 2) / np.sum((y - y.mean()) ** 2)
    assert q2 >= 0.6  # measured 0.81 with seed 0
    assert m.X_train_.shape[0] == 13  # the 5 replicated centre runs are all kept


# 6. Transforms: exact inverses (definitions of log and logit) and intervals inside physical bounds.
@settings(max_examples=60, deadline=None)
@given(st.floats(0.001, 99.999), st.floats(-15, 15))  # |z| > 15 hits double-precision limits
def test_transform_round_trip(y, z):
    for t in (Transform("logit", (0, 100)), Transform("log"), Transform("none")):
        assert t.inverse(t.forward(y)) == pytest.approx(y, rel=1e-9)
    lg = Transform("logit", (0, 100))
    assert lg.forward(lg.inverse(z)) == pytest.approx(z, abs=1e-5)
    assert Transform("log", (-10, None)).forward(y) == pytest.approx(np.log(y + 10))


def test_transform_limits_and_errors():
    t = Transform("logit", (0, 100))
    assert t.forward_limit(None) is None
    assert t.forward_limit(100) == np.inf and t.forward_limit(-1) == -np.inf
    assert t.forward_limit(50) == pytest.approx(0.0)
    assert Transform("none", (0, 1)).forward_limit(5.0) == 5.0
    with pytest.raises(InputError, match="bounds"):
        Transform("logit")
    with pytest.raises(InputError, match="outside"):
        t.forward([50, 100])
    with pytest.raises(InputError, match="unknown"):
        Transform("sqrt")


def test_logit_interval_stays_inside_bounds(ccd):
    U, d = ccd
    bounds = (0.0, 80.5)  # upper bound just above the largest yield (80.3) to stress the interval
    m = GPModel(transform="logit", bounds=bounds, n_restarts=2).fit(U, d["yield"].to_numpy())
    Xt = np.vstack([qmc.Halton(d=2, seed=6).random(50), [[-2.0, -2.0], [3.0, 3.0]]])  # incl. far outside
    med, lo, hi = m.predict_interval(Xt, level=0.999)
    assert np.all(lo > bounds[0]) and np.all(hi < bounds[1])
    assert np.all(lo <= med) and np.all(med <= hi)
    mu, sd = m.predict(Xt, noise=True)
    np.testing.assert_allclose(med, 80.5 / (1 + np.exp(-mu)), rtol=1e-12)  # inverse logit of the mean


# 7. Failure model: GP classification (R&W 2006 §3.4); constant fallback is Laplace's rule of succession
# (k + 1) / (n + 2) (Laplace 1814; from memory).
def test_failure_model_boundary_and_fallback():
    x = np.linspace(0, 1, 30).reshape(-1, 1)
    works = x[:, 0] <= 0.7
    p = FailureModel(random_state=0).fit(x, works).predict_proba([[0.2], [0.95]])
    assert p[0] > 0.8 and p[1] < 0.3
    all_work = FailureModel().fit(x, np.ones(30, bool))
    np.testing.assert_allclose(all_work.predict_proba([[0.1], [0.9]]), 31 / 32)
    assert FailureModel().fit(x, np.zeros(30, bool)).predict_proba([[0.5]])[0] == pytest.approx(1 / 32)


# 8. Conditioning equals a scikit-learn fit with the fixed kernel on the augmented data (R&W 2006 §2.2).
def test_condition_equals_fixed_kernel_refit(branin_gp, branin_data):
    X, y = branin_data
    m = branin_gp
    X_new, z_new = np.array([[0.5, 0.5], [0.9, 0.1]]), np.array([20.0, 5.0])
    c = m.condition(X_new, z_new)
    ref = reference_gp(m, np.vstack([X, X_new]), np.concatenate([y, z_new]))
    Xt = qmc.Halton(d=2, seed=7).random(15)
    r_mu, r_sd = ref.predict(Xt, return_std=True)
    mu, sd = c.predict(Xt, noise=True)
    np.testing.assert_allclose(mu, m.y_mean_ + m.y_scale_ * r_mu, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(sd, m.y_scale_ * r_sd, rtol=1e-6)
    assert c.X_train_.shape[0] == 17 and m.X_train_.shape[0] == 15  # original left unchanged
    np.testing.assert_allclose(c.length_scales_, m.length_scales_)


def test_quadratic_condition_equals_refit(ccd):
    # least squares has no hyperparameters: conditioning is a refit on the augmented data
    U, d = ccd
    y = d["viscosity"].to_numpy()
    m = QuadraticModel().fit(U, y)
    c = m.condition([[0.2, 0.8]], 65.0)
    direct = QuadraticModel().fit(np.vstack([U, [[0.2, 0.8]]]), np.append(y, 65.0))
    np.testing.assert_allclose(c.coef_, direct.coef_, rtol=1e-10)
    assert c.s2_ == pytest.approx(direct.s2_)


def test_constant_response_is_flagged():
    # a constant response has sd 0: scale set to 1, prediction is the constant exactly (alpha = 0)
    X = qmc.Halton(d=2, seed=0).random(8)
    m = GPModel(n_restarts=1).fit(X, np.full(8, 4.2))
    assert m.warning_ and m.y_scale_ == 1.0
    np.testing.assert_allclose(m.predict([[0.3, 0.3]], return_std=False), 4.2)


def test_surrogates_fit_arrays_drops_missing_and_failed(ccd):
    U, d = ccd
    visc = d["viscosity"].to_numpy().astype(float)
    visc[[1, 2]] = np.nan
    works = np.ones(13, bool)
    works[[0, 1]] = False
    s = Surrogates.fit_arrays(U, {"yield": d["yield"].to_numpy(), "viscosity": visc},
                              {"yield": ("logit", (0, 100))}, works=works, kind="quadratic")
    assert s.models["yield"].X_train_.shape[0] == 11
    assert s.models["viscosity"].X_train_.shape[0] == 10  # rows 0, 1 failed, row 2 not measured
    assert s.models["yield"].transform_.kind == "logit" and s.failure is not None
    assert set(s.predict(U[:2])) == {"yield", "viscosity"}
    ok = Surrogates.fit_arrays(U, {"yield": d["yield"].to_numpy()}, kind="quadratic")
    assert ok.failure is None and np.all(ok.p_works(U) == 1.0)
    with pytest.raises(InputError, match="response viscosity"):
        Surrogates.fit_arrays(U[:8], {"viscosity": visc[:8]}, kind="quadratic")
