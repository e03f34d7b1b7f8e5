"""Sobol' indices (windowfinder.answers.influence) against closed forms."""

from __future__ import annotations

import numpy as np
import pytest

from windowfinder.errors import InputError
from windowfinder.answers.influence import model_indices, sobol_indices
from windowfinder.inputs.spec import StudySpec
from windowfinder.models.surrogates import Surrogates

A, B = 7.0, 0.1


def ishigami(U):
    """Ishigami & Homma (1990), "An importance quantification technique in uncertainty analysis for
    computer models", Proc. ISUMA '90, on x in [-pi, pi]^3 (here mapped from the unit cube)."""
    X = -np.pi + 2.0 * np.pi * np.asarray(U)
    return np.sin(X[:, 0]) + A * np.sin(X[:, 1]) ** 2 + B * X[:, 2] ** 4 * np.sin(X[:, 0])


def ishigami_exact(a=A, b=B):
    """Closed-form partial variances of the Ishigami function (Ishigami & Homma 1990; Saltelli et al.,
    Global Sensitivity Analysis: The Primer, Wiley 2008):
    V = a^2/8 + b pi^4/5 + b^2 pi^8/18 + 1/2, V1 = (1 + b pi^4/5)^2 / 2, V2 = a^2/8, V3 = 0,
    V13 = b^2 pi^8 (1/18 - 1/50), all other partial variances 0."""
    V = a ** 2 / 8 + b * np.pi ** 4 / 5 + b ** 2 * np.pi ** 8 / 18 + 0.5
    V1 = 0.5 * (1 + b * np.pi ** 4 / 5) ** 2
    V2 = a ** 2 / 8
    V13 = b ** 2 * np.pi ** 8 * (1 / 18 - 1 / 50)
    first = np.array([V1, V2, 0.0]) / V
    total = np.array([V1 + V13, V2, V13]) / V
    return first, total


def test_ishigami_closed_form_matches_published_values():
    # published values for a = 7, b = 0.1 as quoted in Saltelli et al., Global Sensitivity Analysis:
    # The Primer (2008): S = 0.3139, 0.4424, 0; ST = 0.5576, 0.4424, 0.2437
    first, total = ishigami_exact()
    np.testing.assert_allclose(first, [0.3139, 0.4424, 0.0], atol=1e-4)
    np.testing.assert_allclose(total, [0.5576, 0.4424, 0.2437], atol=1e-4)


@pytest.mark.parametrize("seed", [0, 1])
def test_ishigami_estimates_match_closed_form(seed):
    # closed form: ishigami_exact (Saltelli et al. 2008); estimator must agree within 0.02
    first, total = ishigami_exact()
    res = sobol_indices(ishigami, 3, n=4096, seed=seed, n_boot=50)
    np.testing.assert_allclose(res.first, first, atol=0.02)
    np.testing.assert_allclose(res.total, total, atol=0.02)
    np.testing.assert_allclose(res["first"], res.first)  # mapping-style access
    # the 95 % bootstrap half-widths are honest: the exact value lies within 2 half-widths
    assert np.all(np.abs(res.first - first) <= 2 * res.first_conf + 1e-3)
    assert np.all(np.abs(res.total - total) <= 2 * res.total_conf + 1e-3)
    # variance of the output: V in closed form (Saltelli et al. 2008)
    V = A ** 2 / 8 + B * np.pi ** 4 / 5 + B ** 2 * np.pi ** 8 / 18 + 0.5
    assert res.variance == pytest.approx(V, rel=0.03)


def test_additive_linear_function_gives_squared_coefficient_shares():
    # closed form: for f = sum c_i x_i with independent x_i ~ U(0, 1), V_i = c_i^2 / 12 and there are
    # no interactions, so S_i = ST_i = c_i^2 / sum c_j^2 (Sobol' 1993; Saltelli et al. 2008, §1.2.5)
    c = np.array([3.0, -2.0, 1.0, 0.0])
    res = sobol_indices(lambda U: U @ c + 5.0, 4, n=2048, seed=3, n_boot=0)
    share = c ** 2 / np.sum(c ** 2)
    np.testing.assert_allclose(res.first, share, atol=0.01)
    np.testing.assert_allclose(res.total, share, atol=0.01)
    assert res.total[3] == 0.0           # Jansen's estimator is exactly 0 for an unused input
    assert np.all(np.isnan(res.first_conf))
    assert res.variance == pytest.approx(np.sum(c ** 2) / 12, rel=0.01)


def test_several_outputs_equal_separate_calls():
    # the same samples serve every output column: results equal one call per output
    def both(U):
        return np.column_stack([ishigami(U), U[:, 0] * U[:, 1]])

    res = sobol_indices(both, 3, n=512, seed=2, n_boot=20, outputs=["ish", "prod"])
    one = sobol_indices(ishigami, 3, n=512, seed=2, n_boot=20)
    assert res.first.shape == (2, 3)
    np.testing.assert_allclose(res.first[0], one.first, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.total[0], one.total, rtol=1e-10, atol=1e-12)
    # x1 x2 on U(0,1)^2: V = 7/144, V1 = V2 = 1/48 (closed form), so S1 = S2 = 3/7, ST = 4/7
    prod = sobol_indices(lambda U: U[:, 0] * U[:, 1], 2, n=4096, seed=0, n_boot=0)
    np.testing.assert_allclose(prod.first, [3 / 7, 3 / 7], atol=0.02)
    np.testing.assert_allclose(prod.total, [4 / 7, 4 / 7], atol=0.02)
    frame = res.to_frame()
    assert list(frame["output"].unique()) == ["ish", "prod"] and len(frame) == 6


def test_model_indices_of_a_gp_fitted_to_a_linear_response():
    # a GP fitted to noise-free y = 20 + 30 u1 + 10 u2 must reproduce the closed-form shares 0.9, 0.1
    spec = StudySpec.from_dict({
        "factor": [{"name": "a", "low": 0.0, "high": 1.0}, {"name": "b", "low": 0.0, "high": 1.0}],
        "response": [{"name": "y", "goal": "maximize"}]})
    U = np.random.default_rng(0).random((20, 2))
    sur = Surrogates.fit_arrays(U, {"y": 20 + 30 * U[:, 0] + 10 * U[:, 1]}, n_restarts=2, seed=0)
    res = model_indices(spec, sur, n=1024, seed=0)
    np.testing.assert_allclose(res.first[0], [0.9, 0.1], atol=0.03)
    np.testing.assert_allclose(res.total[0], [0.9, 0.1], atol=0.03)
    assert res.names == ["a", "b"] and res.outputs == ["y"]


def test_bad_arguments_are_refused():
    with pytest.raises(InputError):
        sobol_indices(ishigami, 0)
    with pytest.raises(InputError):
        sobol_indices(lambda U: np.full(len(U), np.nan), 2, n=8)
    with pytest.raises(InputError):
        sobol_indices(ishigami, 3, n=8, names=["a"])
