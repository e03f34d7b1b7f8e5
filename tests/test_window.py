"""Checks of windowfinder.answers.window.

Sources used below:
- Elementary geometry: the largest axis-aligned square inscribed in a disc of radius r has its corners
  on the circle, side r*sqrt(2) and area 2 r^2; a box symmetric about a point s inside the disc is
  limited by its corner farthest from the centre.
- The logistic P = 1 / (1 + exp(-k m)) satisfies P >= c exactly when m >= ln(c / (1 - c)) / k
  (closed form), so a steep logistic of the disc margin m = r^2 - |x - c|^2 is an indicator-like
  probability with a known feasible disc.
- scipy.stats.norm (Virtanen et al. 2020, "SciPy 1.0") for the 1-D threshold: P = Phi((x0 - x) / s) >= c
  exactly when x <= x0 - s * Phi^-1(c).
- Brute force: probabilities on fine grids (the lowest inside a guard box, the highest in the cube).
- RFC 8259: JSON has no NaN, so to_dict must serialise with allow_nan=False.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.stats import norm, qmc

from windowfinder.errors import InputError
from benchmarks.window_search import dips as dips_field
from windowfinder.answers.window import find_window

R, CENTRE, STEEP = 0.35, np.array([0.5, 0.5]), 1000.0


def disc(X):
    """Steep logistic of the disc margin r^2 - |x - c|^2."""
    return 1.0 / (1.0 + np.exp(-STEEP * (R ** 2 - ((X - CENTRE) ** 2).sum(axis=1))))


def corners(lower, upper):  # of a 2-D box
    return np.array([[a, b] for a in (lower[0], upper[0]) for b in (lower[1], upper[1])])


def grid_in(lower, upper, n=201):
    axes = [np.linspace(lo, hi, n) for lo, hi in zip(lower, upper)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(lower))


def test_disc_window_is_inside_and_near_the_inscribed_square():
    res = find_window(disc, 2, 0.95, seed=1)
    assert res.found
    # geometry: every corner of the (guard) box lies inside the disc
    assert np.all(np.linalg.norm(corners(res.guard_lower, res.guard_upper) - CENTRE, axis=1) <= R)
    # geometry: the inscribed square has area 2 r^2
    assert res.volume >= 0.8 * 2 * R ** 2
    assert res.volume == pytest.approx(np.prod(res.upper - res.lower))
    assert res.min_probability >= 0.95


def test_disc_window_from_a_real_gp_model():
    surrogate = pytest.importorskip("windowfinder.models")
    from windowfinder.answers.feasibility import Feasibility

    X = qmc.Sobol(2, scramble=True, seed=3).random(64)[:48]
    margin = R ** 2 - ((X - CENTRE) ** 2).sum(axis=1)  # noise-free runs of the margin
    gp = surrogate.GPModel(n_restarts=2, random_state=0).fit(X, margin)
    feas = Feasibility([("margin", 0.0, None)], surrogate.Surrogates({"margin": gp}), X)
    res = find_window(feas.joint, 2, 0.95, seed=0)
    assert res.found
    # geometry, as above: inside the disc, at least 80 % of the inscribed square's area 2 r^2
    assert np.all(np.linalg.norm(corners(res.guard_lower, res.guard_upper) - CENTRE, axis=1) <= R)
    assert res.volume >= 0.8 * 2 * R ** 2


def smooth_prob(seed, d=2, dips=3):
    """P = Phi(g), g = 2.5 minus Gaussian dips at random places (a smooth field with holes)."""
    return dips_field(seed, d, dips)


@pytest.mark.parametrize("seed, d", [(0, 2), (1, 2), (2, 2), (3, 2), (4, 2), (10, 3)])
def test_reported_minimum_is_never_above_the_grid_minimum(seed, d):
    prob = smooth_prob(seed, d, dips=3 if d == 2 else 4)
    tol = np.r_[0.02, np.zeros(d - 1)] if seed % 2 else None
    res = find_window(prob, d, 0.9, tolerance=tol, seed=seed)
    assert res.found
    # brute force: the lowest probability on a grid over the guard box (201^2 or 61^3 points)
    grid_min = prob(grid_in(res.guard_lower, res.guard_upper, 201 if d == 2 else 61)).min()
    assert res.min_probability <= grid_min + 1e-9
    assert res.min_probability >= 0.9 and grid_min >= 0.9
    assert prob(res.worst_point[None])[0] == pytest.approx(res.min_probability)


def test_set_point_window_is_symmetric_and_near_the_best_symmetric_box():
    s, t = np.array([0.42, 0.55]), np.array([0.02, 0.04])
    res = find_window(disc, 2, 0.95, tolerance=t, set_point=s)
    assert res.found
    np.testing.assert_allclose(res.lower + res.upper, 2 * s, atol=1e-12)
    np.testing.assert_allclose(res.guard_upper - res.upper, t, atol=1e-12)
    # geometry + closed form: the guard box's far corner must satisfy |a + h + t| <= r_eff, with
    # r_eff^2 = r^2 - ln(19)/k for P >= 0.95; the best symmetric box by brute force over h1
    r_eff = np.sqrt(R ** 2 - np.log(0.95 / 0.05) / STEEP)
    a = np.abs(s - CENTRE) + t
    h1 = np.linspace(0, r_eff - a[0], 100001)
    h2 = np.sqrt(np.maximum(r_eff ** 2 - (a[0] + h1) ** 2, 0)) - a[1]
    best = np.max(4 * h1 * np.maximum(h2, 0))
    assert res.volume <= best * (1 + 1e-6)
    assert res.volume >= 0.9 * best


def test_tolerance_puts_the_guard_edge_on_a_1d_threshold():
    x0, s, t = 0.7, 0.02, 0.05
    threshold = x0 - s * norm.ppf(0.95)  # scipy.stats.norm: P >= 0.95 exactly below this

    def prob(X):
        return norm.cdf((x0 - X[:, 0]) / s)
    res = find_window(prob, 1, 0.95, tolerance=[t])
    assert res.found and res.lower[0] == 0.0
    assert abs(res.upper[0] + t - threshold) <= 1e-3
    assert res.upper[0] + t <= threshold + 1e-12
    plain = find_window(prob, 1, 0.95)
    assert abs(plain.upper[0] - threshold) <= 1e-3


def test_not_found_reports_the_best_probability():
    peak = np.array([0.3137, 0.6071])

    def prob(X):
        return 0.8 * np.exp(-5 * ((X - peak) ** 2).sum(axis=1))
    res = find_window(prob, 2, 0.95)
    assert not res.found
    # brute force: maximum on a 401 x 401 grid of the unit square
    grid_max = prob(grid_in(np.zeros(2), np.ones(2), 401)).max()
    assert abs(res.best_probability - grid_max) <= 1e-3
    assert res.message.startswith("no region reaches P >= 0.95; the best found is P = 0.8 at (0.31")
    # RFC 8259: no NaN in JSON
    out = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert out["found"] is False and out["lower"] == [None, None]


def test_same_seed_same_window_and_bad_input():
    # project rule (seeded everything): same inputs and seed give the same window
    a, b = find_window(disc, 2, 0.9, seed=5), find_window(disc, 2, 0.9, seed=5)
    np.testing.assert_array_equal(a.lower, b.lower)
    np.testing.assert_array_equal(a.upper, b.upper)
    assert list(a.to_frame().columns) == ["lower", "upper", "guard_lower", "guard_upper", "tolerance"]
    # project error contract (docs/architecture.md): bad input raises InputError
    with pytest.raises(InputError):
        find_window(disc, 2, 0.95, tolerance=[-0.1, 0.0])
    with pytest.raises(InputError):
        find_window(disc, 2, 0.95, set_point=[0.5, 1.2])
