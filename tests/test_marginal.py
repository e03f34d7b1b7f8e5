"""Checks of the GP's integration over its hyperparameters (windowfinder.models.marginal).

Sources of the expectations:
- Hessian: the definition (second derivatives), by central second differences of the log posterior's
  value alone, against the central differences of its analytic gradient the module uses; and a
  quadratic whose Hessian is known in closed form.
- Sampling importance resampling: on a posterior known in closed form, the log of a Gamma(a, b)
  variable, whose mean is ``digamma(a) - log(b)`` and variance ``trigamma(a)`` (Abramowitz & Stegun
  1964, *Handbook of Mathematical Functions*, 6.3 and 6.4, with the Gamma's log-moments; the Gamma
  density in log space is ``a t - b e^t`` up to a constant), next to an independent normal.
- Mixture predictive: scikit-learn's ``GaussianProcessRegressor`` at each component's hyperparameters
  (held fixed), combined by the moments of a mixture, ``E = sum w m``, ``Var = sum w (s^2 + m^2) - E^2``
  (the law of total variance); leave-one-out and conditioning by brute-force refits.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import digamma, polygamma
from scipy.stats import qmc
from sklearn.gaussian_process import GaussianProcessRegressor

from windowfinder.models.gp import JITTER, NOISE_PRIOR, GPModel
from windowfinder.models.likelihood import MarginalLikelihood
from windowfinder.models.marginal import log_posterior_hessian, sample_hyperparameters


def _data(n=24, seed=5):
    X = qmc.Halton(2, scramble=True, seed=seed).random(n)
    y = np.sin(5 * X[:, 0]) + 2 * X[:, 1] ** 2 + 0.15 * np.random.default_rng(seed).standard_normal(n)
    return X, y


@pytest.fixture(scope="module")
def marginal():
    X, y = _data()
    m = GPModel(n_restarts=2, random_state=0, hyperparameters="marginal").fit(X, y)
    assert len(m.components_) > 3     # a real mixture, not the mode alone
    return m, X, y


def _component_gps(model, X, z):
    """One scikit-learn GP per mixture component, its kernel at the component's hyperparameters."""
    ys = (z - model.y_mean_) / model.y_scale_
    return [GaussianProcessRegressor(kernel=model.gp_.kernel_.clone_with_theta(c.theta), alpha=JITTER,
                                     optimizer=None, normalize_y=False).fit(X, ys)
            for c in model.components_]


def _mix(means, variances, w):
    means, variances, w = np.asarray(means), np.asarray(variances), np.asarray(w)[:, None]
    mean = (w * means).sum(axis=0)
    return mean, (w * (variances + means ** 2)).sum(axis=0) - mean ** 2


def test_hessian_equals_second_differences_of_the_value():
    A = np.array([[3.0, 0.4, -0.2], [0.4, 1.5, 0.1], [-0.2, 0.1, 0.7]])
    quadratic = lambda t: (-0.5 * t @ A @ t, -A @ t)   # noqa: E731
    np.testing.assert_allclose(log_posterior_hessian(quadratic, np.array([0.3, -1.0, 2.0])), A, atol=1e-7)

    X, y = _data(16)
    f = MarginalLikelihood(X, (y - y.mean()) / y.std(), 2.5, True, JITTER, NOISE_PRIOR, (3.0, 6.0))
    theta = np.array([0.1, -1.0, -0.7, -2.0, -3.0])
    H = log_posterior_hessian(f, theta)
    h, p = 1e-3, theta.size
    brute = np.empty((p, p))
    for i in range(p):
        for j in range(p):
            ei, ej = np.eye(p)[i] * h, np.eye(p)[j] * h
            brute[i, j] = -(f(theta + ei + ej)[0] - f(theta + ei - ej)[0] - f(theta - ei + ej)[0]
                            + f(theta - ei - ej)[0]) / (4 * h * h)
    np.testing.assert_allclose(H, brute, rtol=2e-3, atol=2e-3)


def test_resampled_draws_have_the_moments_of_a_known_posterior():
    a, b, mean2, sd2 = 3.0, 2.0, 1.0, 0.5

    def log_post(t):   # log of a Gamma(a, b) variable (skewed), and an independent normal
        value = a * t[0] - b * np.exp(t[0]) - 0.5 * ((t[1] - mean2) / sd2) ** 2
        return value, np.array([a - b * np.exp(t[0]), -(t[1] - mean2) / sd2 ** 2])

    mode = np.array([np.log(a / b), mean2])
    bounds = np.array([[-8.0, 5.0], [-4.0, 6.0]])
    thetas, w, ess = sample_hyperparameters(log_post, mode, bounds, n_samples=4000, seed=3, pool=2 ** 15)
    assert w.sum() == pytest.approx(1.0) and ess > 1000
    mean = w @ thetas
    var = w @ (thetas - mean) ** 2
    # tolerances: 4 Monte Carlo standard errors with the pool's effective size
    tol_mean = 4 * np.sqrt(np.array([polygamma(1, a), sd2 ** 2]) / ess)
    assert abs(mean[0] - (digamma(a) - np.log(b))) < tol_mean[0]
    assert abs(mean[1] - mean2) < tol_mean[1]
    assert var[0] == pytest.approx(polygamma(1, a), rel=0.1)
    assert var[1] == pytest.approx(sd2 ** 2, rel=0.1)


def test_mixture_predictive_equals_scikit_learn_per_component(marginal):
    m, X, y = marginal
    Xt = qmc.Halton(2, seed=1).random(12)
    w = [c.weight for c in m.components_]
    assert sum(w) == pytest.approx(1.0)
    gps = _component_gps(m, X, m.z_train_)
    out = [g.predict(Xt, return_std=True) for g in gps]     # sklearn's sd includes the white noise
    noise = [c.noise_var for c in m.components_]
    mean, var_new_run = _mix([o[0] for o in out], [o[1] ** 2 for o in out], w)
    _, var_latent = _mix([o[0] for o in out], [o[1] ** 2 - s for o, s in zip(out, noise)], w)
    mu, sd = m.predict(Xt, return_std=True, noise=True)
    np.testing.assert_allclose(mu, m.y_mean_ + m.y_scale_ * mean, rtol=1e-7)
    np.testing.assert_allclose(sd ** 2, m.y_scale_ ** 2 * var_new_run, rtol=1e-6)
    np.testing.assert_allclose(m.predict(Xt, return_std=True, noise=False)[1] ** 2,
                               m.y_scale_ ** 2 * var_latent, rtol=1e-6)
    # the noise part of a new run's variance is the posterior mean noise variance
    assert m.noise_std_ ** 2 == pytest.approx(m.y_scale_ ** 2 * float(np.dot(w, noise)), rel=1e-10)
    # mixture covariance: sum w (C_k + m_k m_k') - m m', diagonal equal to the latent variance
    A, B = Xt[:5], Xt[5:]
    covs = [g.predict(np.vstack([A, B]), return_cov=True) for g in gps]
    second = sum(wk * (c[1][:5, 5:] + np.outer(c[0][:5], c[0][5:])) for wk, c in zip(w, covs))
    expected = second - np.outer(mean[:5], mean[5:])
    np.testing.assert_allclose(m.cross_covariance(A, B), m.y_scale_ ** 2 * expected, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(np.diag(m.cross_covariance(A, A)), m.y_scale_ ** 2 * var_latent[:5], rtol=1e-6)


def test_mixture_loo_and_conditioning_equal_brute_force_refits(marginal):
    m, X, y = marginal
    w = [c.weight for c in m.components_]
    mu, sd = m.loo()
    for i in (0, 7, 23):
        keep = np.arange(len(y)) != i
        gps = _component_gps(m, X[keep], m.z_train_[keep])
        out = [g.predict(X[i:i + 1], return_std=True) for g in gps]
        mean, var = _mix([o[0] for o in out], [o[1] ** 2 for o in out], w)
        assert mu[i] == pytest.approx(m.y_mean_ + m.y_scale_ * mean[0], rel=1e-6)
        assert sd[i] == pytest.approx(m.y_scale_ * np.sqrt(var[0]), rel=1e-5)
    X_new, z_new = np.array([[0.5, 0.5], [0.9, 0.1]]), np.array([2.0, 0.3])
    c = m.condition(X_new, z_new)
    gps = _component_gps(m, np.vstack([X, X_new]), np.concatenate([m.z_train_, z_new]))
    Xt = qmc.Halton(2, seed=2).random(6)
    out = [g.predict(Xt, return_std=True) for g in gps]
    mean, var = _mix([o[0] for o in out], [o[1] ** 2 for o in out], w)
    got_mu, got_sd = c.predict(Xt, return_std=True, noise=True)
    np.testing.assert_allclose(got_mu, m.y_mean_ + m.y_scale_ * mean, rtol=1e-6)
    np.testing.assert_allclose(got_sd ** 2, m.y_scale_ ** 2 * var, rtol=1e-5)


def test_plug_in_and_few_runs_use_the_mode_alone():
    X, y = _data()
    m = GPModel(n_restarts=1, random_state=0).fit(X, y)     # the default: the mode alone
    assert len(m.components_) == 1
    few = GPModel(n_restarts=1, random_state=0, hyperparameters="marginal").fit(X[:9], y[:9])
    assert len(few.components_) == 1                         # 9 runs < 2 x 5 hyperparameters
    # same seed, same draws: a fit is reproducible
    a = GPModel(n_restarts=1, random_state=4, hyperparameters="marginal").fit(X, y)
    b = GPModel(n_restarts=1, random_state=4, hyperparameters="marginal").fit(X, y)
    np.testing.assert_array_equal(a.predict(X[:3], return_std=True)[1], b.predict(X[:3], return_std=True)[1])
