"""Checks of windowfinder.nextruns.windowgain (expected window growth from one more run).

Sources used below:
- Rasmussen & Williams (2006), *Gaussian Processes for Machine Learning*, eqs. 2.24-2.26: posterior
  covariance ``k(A, B) - k(A, X) K^-1 k(X, B)``; scikit-learn's GaussianProcessRegressor
  (``predict(..., return_cov=True)``) as the reference implementation.
- Chevalier, Bect, Ginsbourger, Vazquez, Picheny & Richet (2014), Technometrics 56, §2-3: one run
  ahead, the posterior mean at ``z`` moves by ``k_n(z, x) / sqrt(k_n(x, x) + tau^2) * eps`` with
  ``eps ~ N(0, 1)`` and the variance falls by the square of that coefficient, whatever the outcome;
  checked against a brute-force refit with the run added (hyperparameters fixed).
- Closed form: in one factor with one upper limit, a reference setting is confirmed after the run iff
  ``eps`` lies below (or above, for a negative coefficient) a bound, so the expected advance of a
  face is a sum over its layers of normal probabilities of intervals of ``eps``.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import norm

from windowfinder.inputs.designs import sobol
from windowfinder.models.gp import GPModel
from windowfinder.nextruns.windowgain import N_LAYERS, WindowGain


def fitted(d=2, n=12, seed=0):
    X = sobol(d, n, seed)
    y = np.sin(3 * X[:, 0]) + X.sum(axis=1) ** 2 + 0.05 * np.random.default_rng(seed).standard_normal(n)
    # plug-in hyperparameters: the checks below are of the GP at a fixed kernel (scikit-learn, the refit
    # with hyperparameters fixed); the mixture's cross-covariance is checked in tests/test_marginal.py
    return GPModel(n_restarts=1, random_state=0, hyperparameters="map").fit(X, y), X


def test_cross_covariance_matches_sklearn_posterior_covariance():
    model, _ = fitted()
    A, B = sobol(2, 7, 3), sobol(2, 5, 4)
    cov = model.gp_.predict(np.vstack([A, B]), return_cov=True)[1] * model.y_scale_ ** 2
    np.testing.assert_allclose(model.cross_covariance(A, B), cov[:7, 7:], rtol=1e-7, atol=1e-10)
    # the diagonal is the posterior variance without run-to-run noise
    np.testing.assert_allclose(np.diag(model.cross_covariance(A, A)),
                               model.predict(A, return_std=True, noise=False)[1] ** 2, rtol=1e-7)


def test_one_run_ahead_update_matches_refit():
    model, _ = fitted()
    x, Z = np.array([[0.42, 0.61]]), sobol(2, 16, 9)
    mu, sd = model.predict(Z, return_std=True, noise=False)
    mu_x, sd_x = model.predict(x, return_std=True, noise=False)
    scale = np.sqrt(sd_x[0] ** 2 + model.noise_std_ ** 2)
    s = model.cross_covariance(Z, x)[:, 0] / scale
    for e in (-1.3, 0.4):
        new = model.condition(x, mu_x + scale * e)
        mu_new, sd_new = new.predict(Z, return_std=True, noise=False)
        np.testing.assert_allclose(mu_new, mu + s * e, atol=1e-6)
        np.testing.assert_allclose(sd_new ** 2, sd ** 2 - s ** 2, atol=1e-6)


def test_face_advance_matches_closed_form_in_one_factor():
    X = np.array([0.0, 0.1, 0.25, 0.9, 1.0])[:, None]
    y = np.sin(5.0 * X[:, 0]) + 0.05 * np.random.default_rng(1).standard_normal(5)
    model = GPModel(n_restarts=1, random_state=0).fit(X, y)
    hi, c = 0.9, 0.9
    gain = WindowGain(1, c, box=(np.array([0.0]), np.array([0.15])), tolerance=np.zeros(1), n_draws=20000,
                      seed=2)
    assert len(gain.area_) == 1          # the face at 0 lies on the edge of the space: left out
    candidates = np.array([[0.2], [0.3], [0.95]])
    got = gain({"y": model}, [("y", -np.inf, hi)], lambda U: np.ones(len(U)), candidates)

    # closed form: confirmed iff mu + s eps <= hi - q sqrt(sd_new^2 + tau^2), q = Phi^-1(c)
    q, tau2 = norm.ppf(c), model.noise_std_ ** 2
    Z = gain.Z_.reshape(N_LAYERS, -1, 1)[:, 0, :]          # one setting per layer in one factor
    mu, sd = model.predict(Z, return_std=True, noise=False)
    now = np.cumprod(mu + q * np.sqrt(sd ** 2 + tau2) <= hi).sum() * gain.step_[0]
    for cand, value in zip(candidates, got):
        sd_x = model.predict(cand[None], return_std=True, noise=False)[1][0]
        s = model.cross_covariance(Z, cand[None])[:, 0] / np.sqrt(sd_x ** 2 + tau2)
        room = hi - q * np.sqrt(np.maximum(sd ** 2 - s ** 2, 0.0) + tau2) - mu
        # layer l confirmed iff s_l eps <= room_l: eps below room/s (s > 0) or above it (s < 0); the
        # leading layers 1..l are all confirmed on the intersection of those half-lines
        ratio = room / s
        upper = np.minimum.accumulate(np.where(s > 0, ratio, np.inf))
        lower = np.maximum.accumulate(np.where(s < 0, ratio, -np.inf))
        p_lead = np.maximum(norm.cdf(upper) - norm.cdf(lower), 0.0)
        expected = gain.step_[0] * p_lead.sum() - now
        # Monte Carlo error: the advance lies in [0, N_LAYERS * step], so its sd is at most half that
        assert abs(value - expected) < 4 * gain.step_[0] * N_LAYERS * 0.5 / np.sqrt(20000) + 1e-9
    # here a run just beyond the face is worth more than one farther out, and one at the far end nothing
    assert got[0] > got[1] + 0.005 and abs(got[2]) < 1e-9
