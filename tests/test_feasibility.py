"""Checks of windowfinder.answers.feasibility.

Sources used below:
- scipy.stats (Virtanen et al. 2020, Nature Methods 17, "SciPy 1.0") as the reference library for the
  normal distribution function, its upper tail and the log-normal distribution.
- Monte Carlo simulation of independent normal draws (numpy.random.Generator, seeded) as an independent
  check of the joint probability; a simulated proportion has standard error sqrt(p (1 - p) / n).
- scipy.spatial.distance.cdist as the reference for the distance to the nearest run.
- A normal with sd -> 0 is a point mass (elementary), so P(lo <= Y <= hi) becomes the indicator.
Fake models stand in for windowfinder.models.gp (the interface: predict(X, return_std, noise) -> latent
mean and sd, transform_.forward_limit); one check at the end uses a real GPModel.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import lognorm, norm

from windowfinder.errors import InputError
from windowfinder.answers.feasibility import Feasibility, limit_probability


class FakeTransform:
    def __init__(self, g=None):
        self.g = g

    def forward_limit(self, v):
        return None if v is None else float(self.g(v) if self.g else v)


class FakeModel:
    """Latent mean and model sd as functions of X; ``noise=True`` adds a run-to-run noise sd."""

    def __init__(self, mean, sd, noise_sd=0.0, g=None):
        self.mean, self.sd, self.noise_sd = mean, sd, noise_sd
        self.transform_ = FakeTransform(g)

    def predict(self, X, return_std=True, noise=False):
        X = np.atleast_2d(X)
        mu = np.broadcast_to(np.asarray(self.mean(X), float), (len(X),)).copy()
        sd = np.broadcast_to(np.asarray(self.sd(X), float), (len(X),)).copy()
        return mu, np.sqrt(sd ** 2 + self.noise_sd ** 2) if noise else sd


class FakeFailure:
    def __init__(self, p):
        self.p = p

    def predict_proba(self, X):
        return np.full(len(X), self.p)


class FakeSurrogates:
    def __init__(self, models, failure=None):
        self.models, self.failure = models, failure


def const(v):
    return lambda X: np.full(len(X), v)


RUNS = np.array([[a, b] for a in (0.0, 0.25, 0.5) for b in (0.0, 0.25, 0.5)])  # 3x3 grid, spacing 0.25


# ------------------------------------------------------------------------------ limit_probability
def test_two_sided_equals_normal_cdf_difference():
    rng = np.random.default_rng(0)
    mu, sd = rng.normal(0, 2, 200), rng.uniform(0.1, 3, 200)
    lo, hi = -1.0, 1.5
    # reference library: scipy.stats.norm
    expected = norm.cdf((hi - mu) / sd) - norm.cdf((lo - mu) / sd)
    np.testing.assert_allclose(limit_probability(mu, sd, lo, hi), expected, rtol=1e-12, atol=1e-15)


def test_one_sided_limits():
    rng = np.random.default_rng(1)
    mu, sd = rng.normal(0, 2, 100), rng.uniform(0.1, 3, 100)
    # reference library: scipy.stats.norm (sf = upper tail)
    np.testing.assert_allclose(limit_probability(mu, sd, lo=0.7), norm.sf((0.7 - mu) / sd), rtol=1e-12)
    np.testing.assert_allclose(limit_probability(mu, sd, hi=0.7), norm.cdf((0.7 - mu) / sd), rtol=1e-12)
    np.testing.assert_allclose(limit_probability(mu, sd), 1.0)


def test_far_upper_tail_keeps_precision():
    # reference library: scipy.stats.norm.sf; the naive cdf difference would give 0 here
    p = limit_probability(0.0, 1.0, lo=10.0, hi=12.0)
    assert p > 0
    np.testing.assert_allclose(p, norm.sf(10.0) - norm.sf(12.0), rtol=1e-9)


def test_zero_sd_is_an_indicator():
    # elementary: a normal with sd -> 0 is a point mass at mu
    mu = np.array([0.0, 0.5, 1.0, 1.5, 2.0])
    np.testing.assert_array_equal(limit_probability(mu, 0.0, 0.5, 1.5), [0, 1, 1, 1, 0])
    np.testing.assert_array_equal(limit_probability(mu, 0.0, hi=1.0), [1, 1, 1, 0, 0])
    # and the limit sd -> 0 of the scipy value agrees away from the edges
    away = mu[[0, 2, 4]]
    np.testing.assert_allclose(limit_probability(away, 0.0, 0.5, 1.5),
                               norm.cdf((1.5 - away) / 1e-9) - norm.cdf((0.5 - away) / 1e-9))


# ------------------------------------------------------------------------------ Feasibility
def test_each_limit_matches_scipy_with_chunks_and_noise():
    X = np.random.default_rng(2).random((50, 2))
    model = FakeModel(lambda X: 3 * X[:, 0], lambda X: 0.2 + X[:, 1], noise_sd=0.5)
    sur = FakeSurrogates({"yield": model})
    new_run = Feasibility([("yield", 0.5, 2.0)], sur, RUNS, chunk_size=7)
    mean_only = Feasibility([("yield", 0.5, 2.0)], sur, RUNS, mean_only=True)
    mu, sd = 3 * X[:, 0], 0.2 + X[:, 1]
    # reference library: scipy.stats.norm; a new run's sd adds the run-to-run noise in quadrature
    total = np.sqrt(sd ** 2 + 0.25)
    p_new = norm.cdf((2.0 - mu) / total) - norm.cdf((0.5 - mu) / total)
    p_mean = norm.cdf((2.0 - mu) / sd) - norm.cdf((0.5 - mu) / sd)
    p_each, joint = new_run.probabilities(X)
    np.testing.assert_allclose(p_each[:, 0], p_new, rtol=1e-10)
    np.testing.assert_allclose(joint, p_new, rtol=1e-10)
    np.testing.assert_allclose(mean_only.probabilities(X)[1], p_mean, rtol=1e-10)


def test_transformed_limits_match_lognormal():
    # log-scale model: log Y ~ N(mu, s^2), so P(2 <= Y <= 5) is a log-normal probability
    # reference library: scipy.stats.lognorm(s, scale=exp(mu))
    mu, s = 1.2, 0.4
    model = FakeModel(const(mu), const(s), g=np.log)
    feas = Feasibility([("viscosity", 2.0, 5.0)], FakeSurrogates({"viscosity": model}), RUNS,
                       mean_only=True)
    dist = lognorm(s, scale=np.exp(mu))
    np.testing.assert_allclose(feas.probabilities(np.zeros((3, 2)))[1], dist.cdf(5.0) - dist.cdf(2.0),
                               rtol=1e-10)


def test_joint_probability_is_product_confirmed_by_monte_carlo():
    m1 = FakeModel(const(1.0), const(0.6), noise_sd=0.8)
    m2 = FakeModel(const(-0.3), const(1.1))
    sur = FakeSurrogates({"a": m1, "b": m2}, failure=FakeFailure(0.85))
    feas = Feasibility([("a", 0.0, 2.5), ("b", None, 0.4)], sur, RUNS)
    p_each, joint = feas.probabilities(np.full((1, 2), 0.3))
    sd1 = np.hypot(0.6, 0.8)
    # reference library: scipy.stats.norm for each limit
    np.testing.assert_allclose(p_each[0], [norm.cdf((2.5 - 1) / sd1) - norm.cdf(-1 / sd1),
                                           norm.cdf((0.4 + 0.3) / 1.1)], rtol=1e-12)
    # independent check: Monte Carlo with independent normal draws and a Bernoulli(0.85) "works"
    rng, n = np.random.default_rng(11), 100_000
    y1, y2 = rng.normal(1.0, sd1, n), rng.normal(-0.3, 1.1, n)
    works = rng.random(n) < 0.85
    p_mc = np.mean((y1 >= 0) & (y1 <= 2.5) & (y2 <= 0.4) & works)
    se = np.sqrt(p_mc * (1 - p_mc) / n)
    assert abs(joint[0] - p_mc) <= 3 * se


def test_classes_follow_confidence():
    # P = Phi(-mu) for the limit Y <= 0 (sd 1); mu from scipy's inverse so P takes the values below
    p_target = np.array([0.97, 0.5, 0.03, 0.901, 0.099])
    mu = -norm.ppf(p_target)
    X = np.column_stack([np.arange(5) / 4, np.zeros(5)])
    model = FakeModel(lambda X: mu[np.rint(X[:, 0] * 4).astype(int)], const(1.0))
    feas = Feasibility([("y", None, 0.0)], FakeSurrogates({"y": model}), RUNS, mean_only=True)
    fmap = feas.evaluate(X, 0.9)
    np.testing.assert_allclose(fmap.p_joint, p_target, rtol=1e-9)
    # in: P >= 0.9; out: P <= 1 - 0.9; otherwise uncertain
    assert list(fmap.klass) == ["in", "uncertain", "out", "in", "out"]
    assert fmap.p_works is None


def test_extrapolation_flag_uses_distance_to_nearest_run():
    model = FakeModel(const(0.0), const(0.01))
    feas = Feasibility([("y", -1.0, 1.0)], FakeSurrogates({"y": model}), RUNS)
    # the 3x3 grid has nearest-neighbour spacing 0.25 (geometry), so the default threshold is 2 * 0.25
    assert feas.extrapolation_distance_ == pytest.approx(0.5)
    X = np.array([[0.25, 0.25], [0.75, 0.25], [0.9, 0.6], [1.0, 1.0], [0.0, 1.0]])
    fmap = feas.evaluate(X, 0.95)
    # reference library: scipy.spatial.distance.cdist
    nearest = cdist(X, RUNS).min(axis=1)
    np.testing.assert_allclose(fmap.distance, nearest, rtol=1e-12)
    np.testing.assert_array_equal(fmap.untrusted, nearest > 0.5)
    assert fmap.untrusted.tolist() == [False, False, False, True, False]
    assert fmap.reasons[3] == "far from runs" and fmap.reasons[0] == ""
    assert fmap.share_untrusted == pytest.approx(0.2)
    fixed = Feasibility([("y", -1.0, 1.0)], FakeSurrogates({"y": model}), RUNS, extrapolation_distance=0.3)
    assert fixed.evaluate(X, 0.95).untrusted.tolist() == list(nearest > 0.3)


def test_unsure_flag_compares_model_sd_with_limit_scale():
    # documented rule (common practice, no source): flag when the model sd (no run-to-run noise)
    # exceeds spread_ratio * s; s = limit span (two-sided) or max(|limit - median fit|, sd of fits)
    two = FakeModel(const(0.0), lambda X: 2.0 * X[:, 0], noise_sd=5.0)
    one = FakeModel(const(3.0), lambda X: 2.0 * X[:, 1])
    sur = FakeSurrogates({"two": two, "one": one})
    feas = Feasibility([("two", -1.0, 1.0), ("one", None, 5.0)], sur, RUNS, spread_ratio=0.5)
    np.testing.assert_allclose(feas.spread_scale_, [2.0, 2.0])
    X = np.array([[0.2, 0.2], [0.6, 0.2], [0.2, 0.6], [0.6, 0.6]])
    fmap = feas.evaluate(X, 0.95)
    sd_two, sd_one = 2.0 * X[:, 0], 2.0 * X[:, 1]
    np.testing.assert_array_equal(fmap.untrusted, (sd_two > 1.0) | (sd_one > 1.0))
    assert fmap.reasons.tolist() == ["", "unsure: two", "unsure: one", "unsure: two, one"]


def test_results_export():
    model = FakeModel(lambda X: X[:, 0], const(0.3))
    sur = FakeSurrogates({"y": model}, failure=FakeFailure(0.9))
    fmap = Feasibility([("y", 0.2, None)], sur, RUNS).evaluate(np.random.default_rng(3).random((20, 2)), 0.9)
    frame = fmap.to_frame(["temperature", "time"])
    assert list(frame.columns[:4]) == ["temperature", "time", "p_y", "p_works"]
    np.testing.assert_allclose(frame["p_joint"], frame["p_y"] * 0.9, rtol=1e-12)
    # RFC 8259: JSON has no NaN/Infinity, so allow_nan=False must not raise
    summary = json.loads(json.dumps(fmap.to_dict(), allow_nan=False))
    assert sum(summary["counts"].values()) == 20


@pytest.mark.parametrize("limits", [[("nope", 0.0, 1.0)], [("y", None, None)], [("y", 2.0, 1.0)], []])
def test_bad_limits_raise_input_error(limits):
    # project error contract (docs/architecture.md): bad input raises InputError, one line
    with pytest.raises(InputError):
        Feasibility(limits, FakeSurrogates({"y": FakeModel(const(0.0), const(1.0))}), RUNS)


def test_with_a_real_gp_model():
    surrogate = pytest.importorskip("windowfinder.models")
    X = np.linspace(0, 1, 12)[:, None]
    y = np.sin(6 * X[:, 0]) + 0.05 * np.random.default_rng(4).normal(size=12)
    gp = surrogate.GPModel(n_restarts=1, random_state=0).fit(X, y)
    feas = Feasibility([("y", -0.5, 0.5)], surrogate.Surrogates({"y": gp}), X)
    grid = np.linspace(0, 1, 101)[:, None]
    mu, sd = gp.predict(grid, return_std=True, noise=True)
    # reference library: scipy.stats.norm on the model's own predictive moments
    expected = norm.cdf((0.5 - mu) / sd) - norm.cdf((-0.5 - mu) / sd)
    np.testing.assert_allclose(feas.probabilities(grid)[1], expected, rtol=1e-9, atol=1e-12)
