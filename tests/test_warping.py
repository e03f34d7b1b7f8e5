"""The warped Gaussian process (windowfinder.models.warping) against independent expectations.

Sources: the sinh-arcsinh density of Jones & Pewsey (2009), "Sinh-arcsinh distributions", Biometrika
96(4), 761-780, eq. 2 (checked by numerical integration with scipy.integrate.quad); the change of
variables for densities (any probability text; here the log-normal of scipy.stats as the closed form
for a log transform); the warped GP of Snelson, Rasmussen & Ghahramani (2004), "Warped Gaussian
processes", NIPS 16: the identity warp is the plain GP.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

import windowfinder.models.choice as choice
import windowfinder.models.warping as warping
from windowfinder.answers.feasibility import limit_probability
from windowfinder.inputs.spec import MODELS
from windowfinder.models.choice import fit_response, loo_log_density
from windowfinder.models.gp import GPModel
from windowfinder.models.transform import Transform
from windowfinder.models.warping import (WarpedGPModel, WarpedTransform, sinh_arcsinh, sinh_arcsinh_inverse,
                                         sinh_arcsinh_slope)


def _data(n=20, seed=3):
    rng = np.random.default_rng(seed)
    X = rng.random((n, 2))
    y = np.exp(1.5 * X[:, 0] - X[:, 1]) + 0.05 * rng.standard_normal(n) + 1.0
    return X, y


@pytest.mark.parametrize("eps,delta", [(0.0, 1.0), (0.7, 0.5), (-1.0, 2.0), (0.3, 2.83)])
def test_sinh_arcsinh_density_integrates_to_one_and_gives_the_cdf(eps, delta):
    # Jones & Pewsey (2009), eq. 2: X with w(X) ~ N(0, 1) has density w'(x) phi(w(x)); its integral is 1
    # and its integral up to x is Phi(w(x)) (numerical integration, scipy.integrate.quad)
    def density(x):
        return sinh_arcsinh_slope(x, eps, delta) * stats.norm.pdf(sinh_arcsinh(x, eps, delta))

    total, _ = integrate.quad(density, -np.inf, np.inf, limit=200)
    assert total == pytest.approx(1.0, abs=1e-7)
    for x in (-2.0, -0.3, 0.8, 3.0):
        part, _ = integrate.quad(density, -np.inf, x, limit=200)
        assert part == pytest.approx(stats.norm.cdf(sinh_arcsinh(x, eps, delta)), abs=1e-7)
    u = np.linspace(-4, 4, 17)
    np.testing.assert_allclose(sinh_arcsinh_inverse(sinh_arcsinh(u, eps, delta), eps, delta), u, atol=1e-10)


def test_warped_transform_inverse_slope_and_limits():
    t = WarpedTransform(Transform("log"), center=0.4, scale=0.7, epsilon=0.5, delta=1.7)
    y = np.array([0.3, 1.0, 2.5, 9.0])
    z = t.forward(y)
    np.testing.assert_allclose(t.inverse(z), y, rtol=1e-12)
    h = 1e-6   # central differences of the inverse
    np.testing.assert_allclose(t.inverse_slope(z), (t.inverse(z + h) - t.inverse(z - h)) / (2 * h), rtol=1e-6)
    assert np.all(np.diff(z) > 0) and t.forward_limit(None) is None and t.forward_limit(0.0) == -np.inf
    # a limit is a latent threshold: P(Y >= v) = Phi((mu - w(v)) / sd) equals the natural-unit density
    # (change of variables, dz/dy = 1 / inverse_slope) integrated from v up
    mu, sd, v = 0.2, 0.6, 2.0
    p = limit_probability(np.array([mu]), np.array([sd]), t.forward_limit(v), None)[0]
    nat = integrate.quad(lambda s: stats.norm.pdf(t.forward(s), mu, sd) / t.inverse_slope(t.forward(s)),
                         v, np.inf, limit=200)[0]
    assert p == pytest.approx(nat, abs=1e-7)


def test_identity_warp_is_the_plain_gp(monkeypatch):
    # Snelson et al. 2004: with w the identity the warped GP is the GP (grid reduced to the identity)
    monkeypatch.setattr(warping, "EPSILONS", (0.0,))
    monkeypatch.setattr(warping, "DELTAS", (1.0,))
    X, y = _data()
    plain = GPModel(n_restarts=2, random_state=0).fit(X, y)
    warped = WarpedGPModel(n_restarts=2, random_state=0).fit(X, y)
    assert warped.warp_ == (0.0, 1.0)
    P = np.random.default_rng(0).random((7, 2))
    for a, b in zip(plain.predict_interval(P), warped.predict_interval(P)):
        np.testing.assert_allclose(a, b, rtol=1e-6)
    assert loo_log_density(warped) == pytest.approx(loo_log_density(plain), rel=1e-6)


def test_loo_density_in_natural_units_is_the_change_of_variables():
    # log transform: the natural-unit LOO density of a latent normal is the log-normal (scipy.stats)
    X, y = _data()
    m = GPModel(transform="log", n_restarts=1).fit(X, y)
    mu, sd = m.loo()
    ref = np.sum(stats.lognorm.logpdf(y, s=sd, scale=np.exp(mu)))
    assert loo_log_density(m) == pytest.approx(ref, rel=1e-10)
    # warped: the derivative of the natural-unit predictive CDF Phi((w(y) - mu) / sd), by differences
    w = WarpedGPModel(n_restarts=1).fit(X, y)
    mu, sd = w.loo()
    h = 1e-6
    cdf = [stats.norm.cdf((w.transform_.forward(y + s) - mu) / sd) for s in (h, -h)]
    assert loo_log_density(w) == pytest.approx(np.sum(np.log((cdf[0] - cdf[1]) / (2 * h))), rel=1e-5)


def test_fitted_warp_maximises_its_score_and_warped_is_a_model_choice(monkeypatch):
    X, y = _data()
    m, c = fit_response(X, y, "warped", n_restarts=1)
    assert "warped" in MODELS and c.chosen == "warped" and m.warp_ == max(m.warp_scores_, key=m.warp_scores_.get)
    assert len(m.warp_scores_) == len(warping.EPSILONS) * len(warping.DELTAS)
    _, auto = fit_response(X, y, "auto", n_restarts=1)
    assert "warped" not in auto.scores            # an option: auto leaves it out by default
    monkeypatch.setattr(choice, "AUTO_WARPED", True)
    _, auto = fit_response(X, y, "auto", n_restarts=1)
    assert "warped" in auto.scores
    _, few = fit_response(X[:13], y[:13], "auto", n_restarts=1)   # 2 (d + 5) = 14 runs needed in 2 factors
    assert "warped" not in few.scores and any(n.startswith("warped: 13 runs") for n in few.notes)
