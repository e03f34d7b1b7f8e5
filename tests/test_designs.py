"""Checks of windowfinder.inputs.designs against published run counts, design properties and scipy."""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import qmc

from windowfinder.inputs.designs import (METHODS, box_behnken, central_composite, design_size, full_factorial,
                                  is_latin, make_design, maximin_latin_hypercube, one_factor_at_a_time,
                                  sobol, space_filling)
from windowfinder.errors import InputError


def pm1(X):
    """Coded [0, 1] -> -1..+1 units."""
    return 2.0 * np.asarray(X) - 1.0


def strata_counts(X):
    """Points per stratum [i/n, (i+1)/n), per column (brute force)."""
    n = len(X)
    return np.array([[np.sum((col >= i / n) & (col < (i + 1) / n)) for i in range(n)] for col in X.T])


# ---- central composite ------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["face", "inscribed", "circumscribed"])
@pytest.mark.parametrize("k", [2, 3, 4, 5])
@pytest.mark.parametrize("n_c", [0, 1, 4])
def test_ccd_run_count(k, kind, n_c):
    # N = 2^k + 2k + n_c (Box & Wilson 1951; Montgomery, Design and Analysis of Experiments, sec. 11.4)
    X = central_composite(k, kind=kind, centre=n_c)
    assert X.shape == (2**k + 2 * k + n_c, k)
    method = {"face": "ccd", "inscribed": "ccd-inscribed", "circumscribed": "ccd-circumscribed"}[kind]
    assert design_size(method, k, centre=n_c) == 2**k + 2 * k + n_c
    assert make_design(method, k, centre=n_c).shape == X.shape
    # centre runs are exactly the n_c appended rows at 0.5
    assert np.sum(np.all(X == 0.5, axis=1)) == n_c


@pytest.mark.parametrize("k, alpha", [(2, 1.414), (3, 1.682), (4, 2.0)])
def test_ccd_rotatable_alpha_published(k, alpha):
    # Rotatable axial distance (2^k)^(1/4): 1.414, 1.682, 2.000 for k = 2, 3, 4
    # (Box & Hunter 1957, Ann. Math. Statist. 28; Montgomery, DAE sec. 11.4.1)
    Xc = pm1(central_composite(k, kind="circumscribed"))
    assert np.abs(Xc).max() == pytest.approx(alpha, abs=1e-3)  # axial runs beyond the bounds
    assert Xc.min() < -1 and Xc.max() > 1  # documented extrapolation, only for this kind
    Xi = pm1(central_composite(k, kind="inscribed"))
    assert np.abs(Xi).max() == pytest.approx(1.0)  # axial runs on the bounds
    assert np.abs(Xi[: 2**k]).max() == pytest.approx(1.0 / alpha, abs=1e-3)  # factorial runs at +-1/alpha
    assert 0.0 <= central_composite(k, kind="inscribed").min() <= central_composite(k).max() <= 1.0


@pytest.mark.parametrize("kind", ["inscribed", "circumscribed"])
@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_ccd_rotatability_moments(k, kind):
    # Rotatability condition: odd moments vanish, sum x_i^4 = 3 sum x_i^2 x_j^2 for all i != j
    # (Box & Hunter 1957, "Multi-factor experimental designs for exploring response surfaces", sec. 4)
    X = pm1(central_composite(k, kind=kind, centre=2))
    pure = (X**4).sum(axis=0)
    mixed = np.array([(X[:, i] ** 2 * X[:, j] ** 2).sum() for i, j in itertools.combinations(range(k), 2)])
    assert np.allclose(pure, 3.0 * mixed[0]) and np.allclose(mixed, mixed[0])
    assert np.allclose(X.sum(axis=0), 0.0) and np.allclose((X**3).sum(axis=0), 0.0)


def test_face_centred_ccd_is_not_rotatable():
    # Face-centred CCD (alpha = 1) is not rotatable (Montgomery, DAE sec. 11.4.2): for k = 2 the pure
    # fourth moment is 2^2 + 2 = 6, the mixed one 2^2 = 4, ratio 1.5 rather than 3 (closed form).
    X = pm1(central_composite(2))
    assert (X[:, 0] ** 4).sum() == pytest.approx(6.0)
    assert (X[:, 0] ** 2 * X[:, 1] ** 2).sum() == pytest.approx(4.0)
    assert np.all(np.isin(X, [-1.0, 0.0, 1.0]))


# ---- Box-Behnken -------------------------------------------------------------------------------------
@pytest.mark.parametrize("k, n", [(3, 12), (4, 24), (5, 40)])
@pytest.mark.parametrize("n_c", [0, 3])
def test_box_behnken_published_size_and_zeros(k, n, n_c):
    # Run counts 12 / 24 / 40 without centre runs; every non-centre run has k - 2 factors at the centre
    # and two at +-1 (Box & Behnken 1960, Technometrics 2(4), table of designs for k = 3, 4, 5)
    X = pm1(box_behnken(k, centre=n_c))
    assert X.shape == (n + n_c, k) == (design_size("box-behnken", k, centre=n_c), k)
    runs, centres = X[:n], X[n:]
    assert np.all(np.sum(runs == 0.0, axis=1) == k - 2)
    assert np.all(np.isin(runs, [-1.0, 0.0, 1.0]))
    assert len({tuple(r) for r in runs}) == n and np.all(centres == 0.0)


@pytest.mark.parametrize("k", [1, 2, 6])
def test_box_behnken_outside_range_refused(k):
    # Box & Behnken (1960) need k >= 3; k >= 6 uses other block structures, not built here.
    with pytest.raises(InputError, match="3 to 5"):
        make_design("box-behnken", k)


def quadratic_rank(X):
    """Rank of the full second-order model matrix (intercept, linear, squares, interactions)."""
    X = pm1(X)
    pairs = itertools.combinations_with_replacement(range(X.shape[1]), 2)
    A = np.column_stack([np.ones(len(X)), X] + [X[:, i] * X[:, j] for i, j in pairs])
    return np.linalg.matrix_rank(A), A.shape[1]


@pytest.mark.parametrize("make", [lambda c: box_behnken(3, c), lambda c: box_behnken(4, c),
                                  lambda c: box_behnken(5, c), lambda c: central_composite(2, "inscribed", c),
                                  lambda c: central_composite(4, "circumscribed", c)])
def test_spherical_designs_need_a_centre_run(make):
    # Closed form: when every non-centre run has the same sum of squares r^2 (Box-Behnken: r^2 = 2; a
    # rotatable CCD with alpha = sqrt(k), k = 2, 4), sum_i x_i^2 = r^2 * intercept, so the quadratic model
    # matrix loses one rank; one centre run restores it (Box & Behnken 1960; Montgomery, DAE sec. 11.4.2).
    rank, p = quadratic_rank(make(0))
    assert rank == p - 1
    assert quadratic_rank(make(1)) == (p, p)


# ---- Latin hypercube ---------------------------------------------------------------------------------
@pytest.mark.parametrize("d, n, seed", [(1, 12, 0), (2, 12, 1), (3, 12, 7), (5, 20, 3), (8, 13, 11), (4, 2, 5)])
def test_space_filling_one_point_per_stratum(d, n, seed):
    # Latin hypercube property: each factor has exactly one point in each of the n strata
    # [i/n, (i+1)/n) (McKay, Beckman & Conover 1979, Technometrics 21(2), sec. 2)
    X = make_design("space-filling", d, runs=n, seed=seed)
    assert X.shape == (n, d)
    assert np.all(strata_counts(X) == 1)
    assert np.all(strata_counts(maximin_latin_hypercube(d, n, seed, candidates=5)) == 1)


@settings(max_examples=25, deadline=None)
@given(d=st.integers(1, 6), n=st.integers(2, 40), seed=st.integers(0, 10_000))
def test_space_filling_latin_property_any_size(d, n, seed):
    # Same property as above (McKay, Beckman & Conover 1979), over random sizes and seeds
    assert np.all(strata_counts(space_filling(d, n, seed)) == 1)


def test_is_latin_detects_a_violation():
    # is_latin agrees with brute-force stratum counts (McKay, Beckman & Conover 1979 definition) on
    # Sobol' prefixes, some of which are Latin and some not, and on a hand-made violation.
    verdicts = []
    for n in range(2, 9):
        X = qmc.Sobol(2, rng=0).random_base2(3)[:n]
        verdicts.append(is_latin(X))
        assert verdicts[-1] == bool(np.all(strata_counts(X) == 1))
    assert not all(verdicts)
    assert not is_latin(np.array([[0.1, 0.1], [0.2, 0.9]]))  # both x1 values in stratum [0, 1/2)


def test_space_filling_beats_plain_latin_hypercube_on_discrepancy():
    # random-cd lowers the centred L2 discrepancy (Hickernell 1998) relative to a plain LH of the same
    # seed; scipy.stats.qmc.discrepancy is the reference implementation.
    for seed in range(3):
        plain = qmc.LatinHypercube(3, rng=seed).random(20)
        assert qmc.discrepancy(space_filling(3, 20, seed)) < qmc.discrepancy(plain)


# ---- Sobol -------------------------------------------------------------------------------------------
@pytest.mark.parametrize("d, m, seed", [(2, 3, 0), (3, 4, 5), (6, 5, 42)])
def test_sobol_matches_scipy_and_is_balanced(d, m, seed):
    # Reference library: scipy.stats.qmc.Sobol, scrambled, same seed. Balance: the first 2^m points of a
    # scrambled Sobol' sequence have one point per stratum [i/2^m, (i+1)/2^m) in every coordinate
    # (Sobol' 1967; Owen 1995, scrambling keeps the net property).
    X = make_design("sobol", d, runs=2**m, seed=seed)
    np.testing.assert_array_equal(X, qmc.Sobol(d, scramble=True, rng=seed).random(2**m))
    assert np.all(strata_counts(X) == 1)


def test_sobol_any_n_without_warning():
    # First n of the sequence = scipy's random_base2 prefix (reference library); no balance warning.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        X = sobol(3, 12, seed=9)
    np.testing.assert_array_equal(X, qmc.Sobol(3, rng=9).random_base2(4)[:12])


@pytest.mark.parametrize("method", ["space-filling", "sobol"])
def test_seeded_reproducibility(method):
    # Project rule (same inputs + seed -> same outputs); common practice, no source.
    a, b = make_design(method, 4, runs=10, seed=3), make_design(method, 4, runs=10, seed=3)
    np.testing.assert_array_equal(a, b)
    assert not np.allclose(a, make_design(method, 4, runs=10, seed=4))
    # default size 10 d (Loeppky, Sacks & Welch 2009, Technometrics 51(4))
    assert make_design(method, 4).shape == (40, 4)


# ---- full factorial and OFAT ------------------------------------------------------------------------
@pytest.mark.parametrize("d, levels", [(1, 2), (2, 3), (3, 2), (3, 4), (4, 3)])
def test_full_factorial_is_every_combination(d, levels):
    # levels^d runs, each combination once (Montgomery, DAE ch. 5); brute force with itertools.product
    X = make_design("full-factorial", d, levels=levels, centre=1)
    assert X.shape == (levels**d + 1, d)
    grid = np.linspace(0, 1, levels)
    assert {tuple(r) for r in full_factorial(d, levels)} == set(itertools.product(grid, repeat=d))


@pytest.mark.parametrize("d, levels, n_c", [(1, 3, 0), (2, 5, 2), (4, 3, 1), (3, 7, 0)])
def test_ofat_count_and_structure(d, levels, n_c):
    # One-factor-at-a-time: 1 + d (levels - 1) runs; every non-centre run differs from the centre in
    # exactly one factor (Montgomery, DAE sec. 1.2, the one-factor-at-a-time strategy; count by counting)
    X = one_factor_at_a_time(d, levels, centre=n_c)
    n = 1 + d * (levels - 1)
    assert X.shape == (n + n_c, d) == (design_size("ofat", d, levels=levels, centre=n_c), d)
    assert np.array_equal(make_design("ofat", d, runs=n, centre=n_c), X)
    moved = np.sum(~np.isclose(X, 0.5), axis=1)
    assert moved[0] == 0 and np.all(moved[1:n] == 1) and np.all(moved[n:] == 0)
    for j in range(d):  # each factor visits all its levels
        col = X[np.isclose(np.delete(X, j, axis=1), 0.5).all(axis=1), j]
        assert set(np.round(col, 12)) == set(np.round(np.linspace(0, 1, levels), 12))


# ---- centre runs, errors -----------------------------------------------------------------------------
@pytest.mark.parametrize("method", METHODS)
def test_centre_runs_appended_for_every_method(method):
    # Replicated centre runs (Montgomery, DAE sec. 6.8): `centre` more rows at 0.5 than without them
    base, more = make_design(method, 3, runs=None, centre=0), make_design(method, 3, centre=3)
    assert len(more) == len(base) + 3 == design_size(method, 3, centre=3)
    assert np.all(more[-3:] == 0.5) and np.array_equal(more[:-3], base)


@pytest.mark.parametrize("kwargs, text", [
    (dict(method="box-behnkin", d=3), "box-behnken"),
    (dict(method="sobl", d=3), "sobol"),
    (dict(method="sobol", d=0), "at least 1 factor"),
    (dict(method="sobol", d=2, runs=0), "runs must be at least 1"),
    (dict(method="ccd", d=3, runs=10), "has 14 runs"),
    (dict(method="ccd", d=1), "at least 2 factors"),
    (dict(method="ofat", d=2, levels=4), "odd number of levels"),
    (dict(method="ofat", d=3, runs=6), "does not fit"),
    (dict(method="full-factorial", d=30, levels=3), "above the limit"),
    (dict(method="sobol", d=2, centre=-1), "centre"),
])
def test_bad_arguments_raise_input_error(kwargs, text):
    # Project error contract (docs/architecture.md); nearest name via difflib (Python standard library)
    with pytest.raises(InputError, match=text):
        make_design(**kwargs)
