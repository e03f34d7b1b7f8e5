"""Checks of windowfinder.nextruns.suggestions and windowfinder.answers.hypervolume.

Sources used below:
- Zitzler & Thiele (1998), "Multiobjective optimization using evolutionary algorithms - a comparative
  case study", PPSN V: hypervolume = volume of the union of the boxes [p, r] (brute force by coordinate
  compression here).
- pymoo (Blank & Deb 2020, IEEE Access 8) pymoo.indicators.hv.HV as the reference hypervolume library.
- Emmerich, Giannakoglou & Naujoks (2006), IEEE Trans. Evol. Comput. 10(4), and Emmerich, Deutz &
  Klinkenberg (2011), IEEE CEC: expected hypervolume improvement of independent Gaussian goals,
  EHVI = integral over the undominated region of P(Y <= u) du, which factorises per cell into
  integrals of the normal distribution function, int Phi((u - mu)/s) du = s * (t Phi(t) + phi(t)).
- Ginsbourger, Le Riche & Carraro (2010), "Kriging is well-suited to parallelize optimization":
  kriging believer = GP conditioned on its own mean at the pick, hyperparameters fixed; scikit-learn
  GaussianProcessRegressor(optimizer=None) refitted on the augmented data as the reference.
- Bryan et al. (2005), NIPS 18, and Gotovos et al. (2013), IJCAI: active level-set estimation samples
  near the boundary; the boundary here is the analytic root of a sine.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pymoo.indicators.hv import HV
from scipy.stats import norm
from sklearn.gaussian_process import GaussianProcessRegressor

from windowfinder.inputs.designs import sobol
from windowfinder.errors import InputError
from windowfinder.answers.feasibility import Feasibility
from windowfinder.answers.hypervolume import expected_improvement, hypervolume, improvement
from windowfinder.nextruns import Acquisition, Suggestions, suggest
from windowfinder.models.gp import JITTER, GPModel
from windowfinder.models.surrogates import Surrogates
from windowfinder.models.transform import Transform


# ----------------------------------------------------------------------------- independent helpers
def union_volume(points, ref):
    """Volume of the union of boxes [p, ref] by coordinate compression (brute force, any m)."""
    points = np.asarray(points, float).reshape(-1, len(ref))
    points = points[np.all(points < ref, axis=1)]
    if len(points) == 0:
        return 0.0
    axes = [np.unique(np.append(points[:, j], ref[j])) for j in range(len(ref))]
    total = 0.0
    for cell in itertools.product(*[range(len(a) - 1) for a in axes]):
        lower = np.array([axes[j][c] for j, c in enumerate(cell)])
        if np.any(np.all(points <= lower, axis=1)):
            total += np.prod([axes[j][c + 1] - axes[j][c] for j, c in enumerate(cell)])
    return total


def closed_form_ehvi_2d(mu, sd, front, ref):
    """EHVI of Y ~ N(mu, diag(sd^2)) (two goals): sum over undominated grid cells of
    int_cell P(Y1 <= u1) P(Y2 <= u2) du (Emmerich et al. 2006; 2011), cells by coordinate compression."""
    def integral(a, b, m, s):   # int_a^b Phi((u - m)/s) du
        G = lambda t: t * norm.cdf(t) + norm.pdf(t) if np.isfinite(t) else (0.0 if t < 0 else np.inf)
        return s * (G((b - m) / s) - G((a - m) / s))
    front = front[np.all(front < ref, axis=1)]
    axes = [np.concatenate([[-np.inf], np.unique(front[:, j]), [ref[j]]]) for j in range(2)]
    total = 0.0
    for i in range(len(axes[0]) - 1):
        for k in range(len(axes[1]) - 1):
            lower = np.array([axes[0][i], axes[1][k]])
            if np.any(np.all(front <= lower, axis=1)):
                continue   # dominated cell
            total += (integral(axes[0][i], axes[0][i + 1], mu[0], sd[0])
                      * integral(axes[1][k], axes[1][k + 1], mu[1], sd[1]))
    return total


def random_front(rng, k, m):
    """k points near the simplex (a mix of dominated and non-dominated ones)."""
    P = rng.random((k, m))
    return P / P.sum(axis=1, keepdims=True) + 0.1 * rng.random((k, m))


# ------------------------------------------------------------------------------- hypervolume
@pytest.mark.parametrize("m", [1, 2, 3])
def test_improvement_matches_box_union_and_pymoo(m):
    rng = np.random.default_rng(m)
    for _ in range(5):
        front = random_front(rng, 6, m)
        ref = np.full(m, 1.2)
        Y = rng.random((25, m)) * 1.3
        got = improvement(Y, front, ref)
        # brute force (Zitzler & Thiele 1998 definition) and pymoo as the reference library
        brute = [union_volume(np.vstack([front, y]), ref) - union_volume(front, ref) for y in Y]
        np.testing.assert_allclose(got, brute, atol=1e-12)
        if m >= 2:
            base = HV(ref_point=ref)(front[np.all(front < ref, axis=1)])
            lib = [HV(ref_point=ref)(np.vstack([front, y])[np.all(np.vstack([front, y]) < ref, axis=1)])
                   - base if np.all(y < ref) else 0.0 for y in Y]
            np.testing.assert_allclose(got, lib, atol=1e-12)
    assert np.all(got >= 0) and np.any(got > 0)


def test_hypervolume_matches_box_union():
    # Zitzler & Thiele (1998) definition by brute force
    front = random_front(np.random.default_rng(7), 8, 3)
    ref = np.array([1.1, 1.2, 1.3])
    assert hypervolume(front, ref) == pytest.approx(union_volume(front, ref), abs=1e-12)
    assert hypervolume(np.empty((0, 3)), ref) == 0.0


def test_mc_ehvi_converges_to_closed_form():
    rng = np.random.default_rng(3)
    front, ref = random_front(rng, 5, 2), np.array([1.2, 1.2])
    for mu, sd in [((0.4, 0.5), (0.2, 0.1)), ((0.9, 0.2), (0.3, 0.3)), ((1.1, 1.0), (0.15, 0.4))]:
        mu, sd = np.array(mu), np.array(sd)
        draws = mu + sd * rng.standard_normal((1, 40000, 2))
        samples = improvement(draws[0], front, ref)
        se = samples.std() / np.sqrt(samples.size)
        exact = closed_form_ehvi_2d(mu, sd, front, ref)   # Emmerich et al. (2006, 2011)
        assert exact > 0
        assert abs(expected_improvement(draws, front, ref)[0] - exact) < 4 * se


class StubModel:
    """A model with a given linear mean and constant sd (identity transform) for the EHVI path."""

    def __init__(self, coef, sd, d=2):
        self.coef, self.sd, self.transform_ = np.asarray(coef, float), float(sd), Transform("none")
        self.X_train_, self.noise_std_ = np.zeros((1, d)), 0.0

    def predict(self, X, return_std=True, noise=False):
        mean = np.asarray(X, float) @ self.coef
        return (mean, np.full(len(mean), self.sd)) if return_std else mean


def test_acquisition_tradeoff_is_ehvi_of_goal_draws():
    # goal a minimised, goal b maximised (-> -b minimised); no limits: P(feasible) = 1
    models = {"a": StubModel([1.0, 0.2], 0.15), "b": StubModel([0.5, 1.0], 0.1)}
    X_runs = sobol(2, 8, 0)
    acq = Acquisition(Surrogates(models), [], [("a", "minimize", None), ("b", "maximize", None)], X_runs)
    F = np.column_stack([X_runs @ models["a"].coef, -(X_runs @ models["b"].coef)])
    span = F.max(axis=0) - F.min(axis=0)
    np.testing.assert_allclose(acq.ref_, F.max(axis=0) + 0.1 * span)   # nadir + 10 % of the range
    for x in [np.array([0.1, 0.9]), np.array([0.5, 0.5])]:
        mu = np.array([x @ models["a"].coef, -(x @ models["b"].coef)])
        exact = closed_form_ehvi_2d(mu, np.array([0.15, 0.1]), F, acq.ref_)   # Emmerich et al. 2006
        draws = improvement(mu + np.array([0.15, 0.1]) * np.random.default_rng(0).standard_normal((20000, 2)),
                            F, acq.ref_)
        # 128 common random numbers: within 4 standard errors of the closed form
        assert abs(acq.tradeoff(x[None])[0] - exact) < 4 * draws.std() / np.sqrt(128)


# ------------------------------------------------------------------------------- kriging believer
def test_kriging_believer_matches_sklearn_refit_and_spreads_the_batch():
    X = sobol(2, 10, 4)
    y = np.sin(4 * X[:, 0]) + X[:, 1] ** 2
    model = GPModel(n_restarts=2, random_state=0, hyperparameters="map").fit(X, y)   # sklearn: fixed kernel
    acq = Acquisition(Surrogates({"y": model}), [("y", None, 0.9)], [], X)
    x1 = np.array([[0.37, 0.81]])
    mu1, sd1 = model.predict(x1, noise=True)
    new = acq.believe(x1[0]).models["y"]
    mu2, sd2 = new.predict(x1, noise=True)
    # reference: scikit-learn refit on the augmented data with the fitted kernel, no optimisation
    ref = GaussianProcessRegressor(kernel=model.gp_.kernel_, alpha=JITTER, optimizer=None)
    zs = (np.append(model.z_train_, mu1) - model.y_mean_) / model.y_scale_
    ref.fit(np.vstack([X, x1]), zs)
    m_ref, s_ref = ref.predict(x1, return_std=True)
    np.testing.assert_allclose(mu2, model.y_mean_ + model.y_scale_ * m_ref, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(sd2, model.y_scale_ * s_ref, rtol=1e-5)
    np.testing.assert_allclose(mu2, mu1, atol=1e-6)    # believing the mean keeps the mean
    assert sd2[0] < sd1[0]                              # and shrinks the spread there
    # with the distance rule switched off, only the believer keeps the second pick away from the first
    s = suggest(Surrogates({"y": model}), [("y", None, 0.9)], [], X, 2, aim="window", seed=1,
                n_candidates=256, min_distance=0.0)
    assert np.linalg.norm(s.X[0] - s.X[1]) > 0.05


# ------------------------------------------------------------------------------- window criterion
def test_window_picks_concentrate_at_analytic_root():
    # f(x) = sin(pi (x - r)) <= 0 on [0, 1] iff x <= r: the boundary is the root r (analytic)
    r = 0.37
    first, every = [], []
    for runs in ([0.0, 0.15, 0.7, 1.0], [0.05, 0.2, 0.65, 0.8, 0.95], [0.1, 0.6, 0.9]):
        X = np.array(runs)[:, None]
        model = GPModel(n_restarts=2, random_state=0).fit(X, np.sin(np.pi * (X[:, 0] - r)))
        s = suggest(Surrogates({"f": model}), [("f", None, 0.0)], [], X, 2, aim="window", seed=0,
                    n_candidates=512)
        assert s.aim == ["window"] * 2
        first.append(abs(s.X[0, 0] - r))
        every.extend(np.abs(s.X[:, 0] - r))
    mean_uniform = (r ** 2 + (1 - r) ** 2) / 2   # E|U - r| for U ~ uniform(0, 1), closed form
    assert np.mean(every) < mean_uniform
    # a uniform point lands within 0.05 of r with probability 0.1; the first pick must, every time
    assert max(first) < 0.05


# ------------------------------------------------------------------------------- batch geometry
def quadratic_response(X, c):
    return ((X - c) ** 2).sum(axis=1)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(d=st.integers(1, 3), levels=st.sampled_from([None, 5, 11]), count=st.integers(1, 3),
       seed=st.integers(0, 1000), aim=st.sampled_from(["balanced", "window", "tradeoff"]))
def test_suggestions_inside_on_grid_and_apart(d, levels, count, seed, aim):
    rng = np.random.default_rng(seed)
    snap = None if levels is None else (lambda U: np.round(U * (levels - 1)) / (levels - 1))
    X = rng.random((6 + 2 * d, d))
    X = X if snap is None else snap(X)   # completed runs were set on the step grid too
    c = rng.random(d)
    Y = {"a": quadratic_response(X, c), "b": X.sum(axis=1)}
    S = Surrogates.fit_arrays(X, Y, n_restarts=0, seed=seed)
    s = suggest(S, [("a", None, float(np.median(Y["a"])))], [("b", "maximize", None)], X, count, aim=aim,
                seed=seed, snap=snap, n_candidates=128)
    md = 0.05 * np.sqrt(d)
    assert s.X.shape == (count, d)
    assert np.all((s.X >= 0) & (s.X <= 1))
    if levels is not None:   # on the step grid
        np.testing.assert_allclose(s.X * (levels - 1), np.round(s.X * (levels - 1)), atol=1e-9)
    for i in range(count):   # brute force: pairwise and to the completed runs
        if s.replicate[i]:
            assert np.min(np.linalg.norm(X - s.X[i], axis=1)) < 1e-12   # a replicate is an exact repeat
            continue
        assert np.min(np.linalg.norm(X - s.X[i], axis=1)) >= md - 1e-12
        for j in range(i):
            assert np.linalg.norm(s.X[j] - s.X[i]) >= md - 1e-12


# ------------------------------------------------------------------------------- closed loop
def test_closed_loop_improves_window_classification():
    def g(X):   # analytic 2-D response, limit g <= 0.7; truth by brute force on a grid
        return np.sin(3 * X[:, 0]) + 1.5 * (X[:, 1] - 0.4) ** 2
    limits = [("g", None, 0.7)]
    grid = np.stack(np.meshgrid(np.linspace(0, 1, 41), np.linspace(0, 1, 41)), axis=-1).reshape(-1, 2)
    truth = g(grid) <= 0.7

    def accuracy(S, X):
        p = Feasibility(limits, S, X, mean_only=True).probabilities(grid)[1]
        return np.mean((p >= 0.5) == truth)

    X = sobol(2, 8, 0)
    S = Surrogates.fit_arrays(X, {"g": g(X)}, n_restarts=2, seed=0)
    start = accuracy(S, X)
    for batch in range(3):
        s = suggest(S, limits, [], X, 2, aim="window", seed=batch, n_candidates=512)
        X = np.vstack([X, s.X])
        S = Surrogates.fit_arrays(X, {"g": g(X)}, n_restarts=2, seed=0)
    assert accuracy(S, X) > start


# ------------------------------------------------------------------------------- contract
def test_aims_degenerate_and_frame():
    # contract of suggest (module docstring), no external source
    X = sobol(2, 8, 2)
    S = Surrogates.fit_arrays(X, {"a": quadratic_response(X, np.array([0.3, 0.6])), "b": X[:, 0]},
                              n_restarts=0)
    only_limits = suggest(S, [("a", None, 0.1)], [], X, 2, aim="tradeoff", n_candidates=128)
    assert only_limits.aim == ["window", "window"]
    only_goals = suggest(S, [], [("b", "maximize", None)], X, 2, aim="window", n_candidates=128)
    assert only_goals.aim == ["tradeoff", "tradeoff"]
    assert only_goals.basis == ["hypervolume gain"] * 2 and np.all(np.isnan(only_goals.edge_score))
    both = suggest(S, [("a", None, 0.1)], [("b", "maximize", None)], X, 3, n_candidates=128)
    assert both.aim[0] != both.aim[1] and both.aim[0] == both.aim[2]
    frame = both.to_frame(["t", "p"], to_natural=lambda U: 10 + 90 * U)
    np.testing.assert_allclose(frame[["t", "p"]].to_numpy(), 10 + 90 * both.X)
    np.testing.assert_allclose(frame["a_predicted"], quadratic_response(both.X, np.array([0.3, 0.6])),
                               atol=0.1)
    assert isinstance(both, Suggestions) and both.advice and both.to_dict()["aim"] == both.aim
    with pytest.raises(InputError):
        suggest(S, [], [], X, 2)
    with pytest.raises(InputError):
        suggest(S, [("a", None, 0.1)], [], X, 0)


class StubFailure:
    """P(works) = 0.49 for x1 > 0.5, else 0.99."""

    def predict_proba(self, X):
        return np.where(np.asarray(X)[:, 0] > 0.5, 0.49, 0.99)


def test_picks_avoid_predicted_failure_region():
    # contract of suggest (module docstring), no external source: no pick where P(works) < 0.5, even
    # where the goal alone is far better (EHVI x P(works) would prefer x1 = 1 here: 70 * 0.49 > 20)
    model = StubModel([100.0, 0.0], 1.0)
    model.condition = lambda X, z: model
    X = sobol(2, 8, 0) * np.array([0.3, 1.0])
    model.X_train_ = X   # the stub stands for a model fitted on these 8 runs (support check)
    s = suggest(Surrogates({"b": model}, StubFailure()), [], [("b", "maximize", None)], X, 2, n_candidates=128)
    assert np.all(s.X[:, 0] <= 0.5)
    assert "avoided" in s.message


def test_window_rules_contract():
    # contract of suggest (docstring), no external source: each rule proposes valid runs; the edge rule's
    # first gain is the misclassification probability of the unconditioned models at that pick
    X = sobol(2, 10, 3)
    S = Surrogates.fit_arrays(X, {"a": quadratic_response(X, np.array([0.4, 0.5]))}, n_restarts=0)
    limits = [("a", None, 0.08)]
    for rule in ("grow", "faces", "edge"):
        s = suggest(S, limits, [], X, 2, aim="window", n_candidates=128, window_rule=rule)
        assert s.X.shape == (2, 2) and np.all((s.X >= 0) & (s.X <= 1))
        if rule == "edge":
            expected = Acquisition(S, limits, [], X, seed=0).window(s.X[:1])[0][0]
            assert s.edge_score[0] == pytest.approx(expected, abs=1e-12)
            assert s.basis == ["edge", "edge"] and np.all(np.isnan(s.gain))
    with pytest.raises(InputError, match="window rule"):
        suggest(S, [("a", None, 0.08)], [], X, 2, aim="window", window_rule="sideways")


def test_polynomial_models_fall_back_to_the_edge_criterion():
    # the window-growth look-ahead needs GP cross-covariances; with a least-squares polynomial the
    # documented fallback (module docstring) is the edge rule: the first gain is the misclassification
    # probability of the unconditioned models at that pick (contract, no external source)
    X = sobol(2, 14, 5)
    S = Surrogates.fit_arrays(X, {"a": quadratic_response(X, np.array([0.4, 0.5]))}, kind="quadratic")
    assert S.models["a"].kind == "quadratic" and S.choices["a"].chosen == "quadratic"
    limits = [("a", None, 0.08)]
    s = suggest(S, limits, [], X, 2, aim="window", n_candidates=128)
    assert s.X.shape == (2, 2) and np.all((s.X >= 0) & (s.X <= 1))
    expected = Acquisition(S, limits, [], X, seed=0).window(s.X[:1])[0][0]
    assert s.edge_score[0] == pytest.approx(expected, abs=1e-12)
    # the edge score is no window gain: next.csv says which score chose the run and leaves gain empty
    frame = s.to_frame(["t", "p"])
    assert list(frame["basis"]) == ["edge", "edge"] and frame["gain"].isna().all()
    np.testing.assert_allclose(frame["edge_score"], s.edge_score)
