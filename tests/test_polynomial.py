"""Polynomial models, term selection and the per-response model choice, against closed forms.

Sources used below:
- Montgomery (2013), Design and Analysis of Experiments, 8th ed., §10.2-10.7: least squares, coefficient
  standard errors and t tests (§10.4.1), mean and prediction intervals with Student t on n - p degrees
  of freedom (§10.5-10.6), PRESS (§10.7); §11.3 central composite design (data from memory, as in
  tests/data/montgomery_ccd.csv).
- Cook & Weisberg (1982), Residuals and Influence in Regression, §2.2: the externally studentised
  (deleted) residual is Student t with n - p - 1 degrees of freedom.
- Hurvich & Tsai (1989), Regression and time series model selection in small samples, Biometrika 76,
  297-307: AICc.
- numpy.linalg.lstsq and scipy.stats as reference implementations.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from windowfinder.answers.feasibility import Feasibility, limit_probability
from windowfinder.errors import InputError
from windowfinder.models.choice import EXTRA_PARAMETERS, ModelChoice, fit_response, loo_log_density
from windowfinder.models.polynomial import (PolynomialModel, backward_eliminate, full_terms,
                                            information_criterion)
from windowfinder.models.surrogates import Surrogates

DATA = Path(__file__).parent / "data" / "montgomery_ccd.csv"
REDUCED = [(), (0,), (1,), (1, 1)]  # 1, x1, x2, x2^2


def _matrix(x, terms):
    """Model matrix built independently of the package, from ±1-coded settings."""
    cols = {(): np.ones(len(x)), (0,): x[:, 0], (1,): x[:, 1], (0, 1): x[:, 0] * x[:, 1],
            (0, 0): x[:, 0] ** 2, (1, 1): x[:, 1] ** 2}
    return np.column_stack([cols[t] for t in terms])


@pytest.fixture(scope="module")
def ccd():
    """Montgomery (2013) §11.3 CCD; u in [0, 1] with the factorial runs at 0/1 (axial outside)."""
    d = pd.read_csv(DATA)
    x = np.column_stack([(d["time"] - 85.0) / 5.0, (d["temperature"] - 175.0) / 5.0])
    return (x + 1.0) / 2.0, x, d


# 1. Least squares on a reduced term list = numpy.linalg.lstsq; intervals with Student t (n - p dof).
def test_reduced_polynomial_matches_lstsq_and_t_intervals(ccd):
    U, x, d = ccd
    y = d["viscosity"].to_numpy()
    m = PolynomialModel(terms=REDUCED).fit(U, y)
    F = _matrix(x, REDUCED)
    beta, *_ = np.linalg.lstsq(F, y, rcond=None)
    n, p = F.shape
    s2 = float(np.sum((y - F @ beta) ** 2) / (n - p))
    np.testing.assert_allclose(m.coef_, beta, rtol=1e-10)
    assert m.dof_ == n - p == 9 and m.s2_ == pytest.approx(s2, rel=1e-10)
    assert m.kind == "reduced" and m.feature_names() == ["1", "x1", "x2", "x2^2"]
    u0 = np.array([[0.3, 0.6], [0.9, 0.1]])
    f0 = _matrix(2 * u0 - 1, REDUCED)
    var_mean = s2 * np.einsum("ij,jk,ik->i", f0, np.linalg.inv(F.T @ F), f0)
    q = stats.t.ppf(0.975, n - p)
    med, lo, hi = m.predict_interval(u0, 0.95, noise=True)   # prediction interval (§10.6)
    np.testing.assert_allclose(hi - med, q * np.sqrt(var_mean + s2), rtol=1e-9)
    med, lo, hi = m.predict_interval(u0, 0.95, noise=False)  # interval on the mean (§10.5)
    np.testing.assert_allclose(hi - med, q * np.sqrt(var_mean), rtol=1e-9)


# 2. Term table: se = sqrt(s^2 [(X'X)^-1]_jj), t = b / se, p = 2 P(T_{n-p} > |t|) (Montgomery §10.4.1).
def test_term_table_against_hand_computation(ccd):
    U, x, d = ccd
    y = d["yield"].to_numpy()
    terms = full_terms(2, 2)
    table = PolynomialModel().fit(U, y).term_table(["A", "B"])
    F = _matrix(x, terms)
    beta = np.linalg.solve(F.T @ F, F.T @ y)
    n, p = F.shape
    s2 = np.sum((y - F @ beta) ** 2) / (n - p)
    se = np.sqrt(s2 * np.diag(np.linalg.inv(F.T @ F)))
    t = beta / se
    pv = np.array([2 * (1 - stats.t.cdf(abs(v), n - p)) for v in t])
    assert list(table["term"]) == ["1", "A", "B", "A*B", "A^2", "B^2"]
    np.testing.assert_allclose(table["coefficient"], beta, rtol=1e-9)
    np.testing.assert_allclose(table["std_error"], se, rtol=1e-9)
    np.testing.assert_allclose(table["t"], t, rtol=1e-9)
    np.testing.assert_allclose(table["p_value"], pv, rtol=1e-6, atol=1e-14)
    # the published fit (Montgomery §11.3, from memory): x1*x2 is the one term not significant at 5 %
    assert table.loc[table["term"] == "A*B", "p_value"].item() > 0.05
    assert (table.loc[table["term"] != "A*B", "p_value"] < 0.01).all()


# 3. LOO by explicit refits: PRESS prediction and Student t (n - p - 1) density (Cook & Weisberg §2.2).
def test_polynomial_loo_density_equals_brute_force_refits(ccd):
    U, x, d = ccd
    y = d["mw"].to_numpy()
    terms = [(), (0,), (1,), (0, 1)]
    m = PolynomialModel(terms=terms).fit(U, y)
    F = _matrix(x, terms)
    n, p = F.shape
    total = 0.0
    mu_ref, sd_ref = [], []
    for i in range(n):
        keep = np.arange(n) != i
        b, *_ = np.linalg.lstsq(F[keep], y[keep], rcond=None)
        s2_i = np.sum((y[keep] - F[keep] @ b) ** 2) / (n - 1 - p)
        v = s2_i * (1 + F[i] @ np.linalg.inv(F[keep].T @ F[keep]) @ F[i])
        mu_ref.append(F[i] @ b)
        sd_ref.append(np.sqrt(v))
        total += stats.t.logpdf((y[i] - mu_ref[-1]) / sd_ref[-1], n - 1 - p) - np.log(sd_ref[-1])
    mu, sd = m.loo()
    np.testing.assert_allclose(mu, mu_ref, rtol=1e-9)
    np.testing.assert_allclose(sd, sd_ref, rtol=1e-9)
    assert loo_log_density(m) == pytest.approx(total, rel=1e-10)


# 4. AICc (Hurvich & Tsai 1989) and BIC by their formulas; elimination recovers a known reduced model.
def test_information_criteria_formulas():
    n, p, rss = 20, 4, 3.7
    k = p + 1
    aic = n * math.log(rss / n) + 2 * k
    assert information_criterion(rss, n, p) == pytest.approx(aic + 2 * k * (k + 1) / (n - k - 1))
    assert information_criterion(rss, n, p, "bic") == pytest.approx(n * math.log(rss / n) + k * math.log(n))
    assert information_criterion(rss, 6, 4) == math.inf


def test_backward_elimination_recovers_true_terms():
    # 3^3 full factorial (orthogonal columns), y = 10 + 3 x1 - 2 x2 + 1.5 x3 + 2.5 x1 x2 + 2 x3^2 + e,
    # noise sd 0.2, i.e. every true effect at least 7 noise sd: true terms must always stay.
    g = np.array(np.meshgrid(*[[-1.0, 0.0, 1.0]] * 3, indexing="ij")).reshape(3, -1).T
    true = [(), (0,), (1,), (2,), (0, 1), (2, 2)]
    full = full_terms(3, 2)
    spurious = [t for t in full if t not in true]
    signal = 10 + 3 * g[:, 0] - 2 * g[:, 1] + 1.5 * g[:, 2] + 2.5 * g[:, 0] * g[:, 1] + 2 * g[:, 2] ** 2
    n, trials = len(g), 60
    exact = 0
    for seed in range(trials):
        y = signal + np.random.default_rng(seed).normal(0.0, 0.2, n)
        kept = backward_eliminate(g, y, full, "aicc")
        assert set(true) <= set(kept), (seed, kept)
        assert kept == [t for t in full if t in kept]   # order of the input list
        exact += kept == [t for t in full if t in true]
    # Expected share of exact recoveries: a spurious term survives when n ln(RSS_without / RSS_with)
    # beats the AICc penalty step at the true model; RSS_without / RSS_with = 1 + F / (n - p - 1) with
    # F ~ F(1, n - p - 1) exactly (extra sum of squares, Montgomery §10.3.3). The 4 spurious columns
    # are orthogonal here, so the survivals are about independent (they share the RSS).
    p = len(true)
    step = information_criterion(1.0, n, p + 1) - information_criterion(1.0, n, p)
    q = stats.f.sf((n - p - 1) * math.expm1(step / n), 1, n - p - 1)
    expected = (1 - q) ** len(spurious)
    assert exact / trials >= expected - 3 * math.sqrt(expected * (1 - expected) / trials), (exact, expected)


def test_elimination_stops_at_a_local_aicc_minimum_by_lstsq(ccd):
    # no hierarchical single removal from the kept set lowers AICc, with RSS from numpy.linalg.lstsq
    U, x, d = ccd
    for name in ("yield", "viscosity", "mw"):
        y = d[name].to_numpy()
        kept = backward_eliminate(x, y, full_terms(2, 2))

        def aicc(ts):
            F = _matrix(x, ts)
            r = y - F @ np.linalg.lstsq(F, y, rcond=None)[0]
            return information_criterion(float(r @ r), len(y), len(ts))

        needed = {(0,) for t in kept if 0 in t and len(t) == 2} | {(1,) for t in kept if 1 in t and len(t) == 2}
        for t in kept:
            if t and t not in needed:
                assert aicc(kept) <= aicc([u for u in kept if u != t]), (name, t)


def test_elimination_keeps_hierarchy():
    # y depends on x1^2 only; x1 must stay while x1^2 does (parents kept)
    g = np.array(np.meshgrid([-1.0, 0.0, 1.0], [-1.0, 0.0, 1.0], indexing="ij")).reshape(2, -1).T
    g = np.vstack([g, g])
    y = 4 * g[:, 0] ** 2 + np.random.default_rng(0).normal(0, 0.1, len(g))
    kept = backward_eliminate(g, y, full_terms(2, 2), "bic")
    assert (0, 0) in kept and (0,) in kept


# 5. Student-t predictive in the feasibility answer (Montgomery §10.6): P(lo <= Y <= hi) from scipy's t.
def test_limit_probability_with_dof_and_feasibility_uses_it(ccd):
    mu, sd = np.array([0.0, 1.0, 3.0]), np.array([1.0, 0.5, 2.0])
    ref = stats.t.cdf((2.0 - mu) / sd, 5) - stats.t.cdf((-1.0 - mu) / sd, 5)
    np.testing.assert_allclose(limit_probability(mu, sd, -1.0, 2.0, dof=5), ref, rtol=1e-12)
    U, _, d = ccd
    m = PolynomialModel().fit(U, d["yield"].to_numpy())
    X = np.array([[0.5, 0.5], [0.2, 0.9]])
    p = Feasibility([("yield", 78.5, None)], Surrogates({"yield": m}), U).probabilities(X)[1]
    mean, s = m.predict(X, noise=True)
    np.testing.assert_allclose(p, stats.t.sf((78.5 - mean) / s, m.dof_), rtol=1e-10)
    p_normal = stats.norm.sf((78.5 - mean) / s)
    assert np.all(np.abs(p - 0.5) < np.abs(p_normal - 0.5))   # t tails: less certain than the normal


# 6. The choice: auto keeps the highest LOO log density (the GP on ties, the warped GP penalised); explicit settings are obeyed.
def test_auto_choice_is_the_argmax_of_the_scores(ccd):
    U, _, d = ccd
    for name in ("yield", "viscosity", "mw"):
        m, c = fit_response(U, d[name].to_numpy(), "auto", n_restarts=2, seed=0)
        assert set(c.scores) >= {"gp", "quadratic"}
        # the warped GP pays one nat per warp parameter (windowfinder.models.choice.EXTRA_PARAMETERS)
        best = max(c.scores, key=lambda k: (c.scores[k] - EXTRA_PARAMETERS.get(k, 0.0), k == "gp"))
        assert c.chosen == best and math.isclose(loo_log_density(m), c.scores[best], rel_tol=1e-12)
        assert ModelChoice.from_dict(c.to_dict()).text() == c.text()
    m, c = fit_response(U, d["mw"].to_numpy(), "linear")
    assert m.kind == "linear" and c.chosen == "linear" and list(c.scores) == ["linear"]


def test_unknown_model_and_too_few_runs_are_input_errors(ccd):
    U, _, d = ccd
    with pytest.raises(InputError, match="unknown"):
        fit_response(U, d["mw"].to_numpy(), "cubic")
    with pytest.raises(InputError, match="needs at least 7 runs"):
        fit_response(U[:6], d["mw"].to_numpy()[:6], "quadratic")
    # auto, 6 runs: too few for the quadratic (6 terms + 1), so the first-order model takes its place
    m, c = fit_response(U[:6], d["mw"].to_numpy()[:6], "auto", n_restarts=1)
    assert "quadratic" not in c.scores and "linear" in c.scores and c.notes[0].startswith("quadratic")
    # 4 runs: the first-order model would keep 1 residual dof (its LOO needs 2): the GP alone
    m, c = fit_response(U[:4], d["mw"].to_numpy()[:4], "auto", n_restarts=1)
    assert list(c.scores) == ["gp"] and c.chosen == "gp" and len(c.notes) == 2
