"""Calibration checks of the response models' probabilities against data with a known law.

Source of the expectation: when the responses are draws from a Gaussian-process prior plus independent
Gaussian noise, the posterior predictive distribution of a new run is exact (Rasmussen & Williams 2006,
*Gaussian Processes for Machine Learning*, §2.2, eqs. 2.22-2.24), so its central 80 % interval holds a
new run with probability 0.8 and P(new run <= limit) is a calibrated probability. The models here fit
their own hyperparameters and integrate over them (windowfinder.models.marginal), so the check is of
the whole fit, not of the formula alone. Tolerances:
3 standard errors of the mean over independent draws (the test points of one draw are correlated).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm
from sklearn.gaussian_process.kernels import Matern

from windowfinder.answers.feasibility import limit_probability
from windowfinder.models.gp import GPModel

N_DRAWS, N_RUNS, N_TEST, D = 30, 30, 40, 2
LENGTH, NOISE_SD = 0.35, 0.2   # prior draws: unit variance Matern 5/2, noise sd 0.2


def _draws(seed=11):
    rng = np.random.default_rng(seed)
    kernel = Matern(length_scale=LENGTH, nu=2.5)
    for _ in range(N_DRAWS):
        X = rng.random((N_RUNS + N_TEST, D))
        K = kernel(X) + 1e-10 * np.eye(len(X))
        f = np.linalg.cholesky(K) @ rng.standard_normal(len(X))
        y = f + NOISE_SD * rng.standard_normal(len(X))
        yield X[:N_RUNS], y[:N_RUNS], X[N_RUNS:], y[N_RUNS:]


def _predictions(hyperparameters):
    out = []
    for X, y, Xt, yt in _draws():
        m = GPModel(n_restarts=3, random_state=0, hyperparameters=hyperparameters).fit(X, y)
        mu, sd = m.predict(Xt, return_std=True, noise=True)
        out.append((mu, sd, yt))
    return out


@pytest.fixture(scope="module")
def predictions():
    return _predictions(None)   # the default: hyperparameters at their posterior mode


@pytest.fixture(scope="module")
def marginal_predictions():
    return _predictions("marginal")


def _mean_and_tolerance(values):
    v = np.asarray(values, float)
    return v.mean(), 3.0 * v.std(ddof=1) / np.sqrt(len(v))


def _check_80_percent(predictions):
    q = norm.ppf(0.9)
    per_draw = [np.mean(np.abs(yt - mu) <= q * sd) for mu, sd, yt in predictions]
    mean, tol = _mean_and_tolerance(per_draw)
    assert tol < 0.08   # the check can tell 0.8 from a timid 0.9 or an overconfident 0.7
    assert abs(mean - 0.8) <= tol, (mean, tol)


@pytest.mark.xfail(strict=True, reason=(
    "known miss of the default, measured: 80 % intervals for a new run cover 0.73 +- 0.06 (3 s.e.) on "
    "these 30 draws; fitted noise sd median 0.71x the true one; the plug-in (type-II MAP) "
    "hyperparameters are overconfident at 30 runs. The mixture over the hyperparameters "
    "(hyperparameters='marginal', next test) covers 0.80, but is not the default: on the calibration "
    "benchmark it cost window volume without better calibration (docs/benchmarks.md)"))
def test_new_run_80_percent_intervals_cover_80_percent(predictions):
    _check_80_percent(predictions)


# Measured: 0.80 +- 0.05 (3 s.e.), fitted noise sd (root of the posterior mean variance) 0.90x the true.
def test_marginal_80_percent_intervals_cover_80_percent(marginal_predictions):
    _check_80_percent(marginal_predictions)


def test_limit_probability_is_calibrated(predictions):
    # a one-sided limit at each draw's 60th percentile of the runs: claimed P(meets) binned, the share
    # of new runs that truly meet it per bin must match the bin's mean claim (reliability diagram;
    # Murphy & Winkler 1977), pooled over draws, 3 binomial standard errors or 0.05
    claims, met = [], []
    for mu, sd, yt in predictions:
        limit = np.quantile(mu, 0.6)
        claims.append(limit_probability(mu, sd, hi=limit))
        met.append(yt <= limit)
    claims, met = np.concatenate(claims), np.concatenate(met)
    for lo, hi in ((0.0, 0.2), (0.2, 0.5), (0.5, 0.8), (0.8, 1.0 + 1e-9)):
        sel = (claims >= lo) & (claims < hi)
        assert sel.sum() >= 50
        p = claims[sel].mean()
        tol = max(3.0 * np.sqrt(p * (1 - p) / sel.sum()), 0.05)
        assert abs(met[sel].mean() - p) <= tol, (lo, hi, met[sel].mean(), p, tol)
