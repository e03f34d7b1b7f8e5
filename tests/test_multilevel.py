"""Categorical factors with more than two levels: the one-hot kernel, invariance to the order of the
levels, treatment-coded polynomial terms, designs balanced over three levels, the window per level on a
study whose middle level is the bad one, and trade-off / next runs / report on three levels."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from windowfinder.cli import main
from windowfinder.inputs.designs import is_latin
from windowfinder.models.encoding import EncodedModel, LevelEncoder
from windowfinder.study import Study

from test_categorical import HEAD, LINEAR_RESPONSE

LEVELS = ("A", "B", "C")


def _text(levels=LEVELS, model="linear"):
    """The two-level study of tests/test_categorical.py with a factor ``supplier`` of ``levels``."""
    quoted = ", ".join(f'"{v}"' for v in levels)
    head = HEAD.replace('name = "gas"\nlevels = ["pure", "mix"]', f'name = "supplier"\nlevels = [{quoted}]')
    assert "supplier" in head
    return head.replace('name = "gas study"', 'name = "supplier study"') + LINEAR_RESPONSE.replace(
        'model = "linear"', f'model = "{model}"')


# closed-form truth of the demo study: y = a + b + EFFECT[supplier], limit y <= 12; the middle level
# of the list (B) is the bad one, so a model reading the level index as ordered would interpolate it
EFFECT = {"A": 0.0, "B": 6.0, "C": 0.0}


def _study(tmp_path, levels=LEVELS, model="linear", name="s"):
    d = tmp_path / name
    d.mkdir()
    (d / "study.toml").write_text(_text(levels, model))
    return d


def _cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def _mean(model, X):
    out = model.predict(X, return_std=False)
    return out[0] if isinstance(out, tuple) else out


def matern52(r):
    """Matern 5/2 correlation (Rasmussen & Williams 2006, GPML, eq. 4.17)."""
    return (1.0 + np.sqrt(5.0) * r + 5.0 * r ** 2 / 3.0) * np.exp(-np.sqrt(5.0) * r)


def _mixed_data(n=36, seed=3):
    rng = np.random.default_rng(seed)
    lev = np.tile([0, 1, 2], n // 3)
    X = np.column_stack([rng.random((n, 2)), lev / 2.0])     # coded: level index / (L - 1)
    y = np.sin(4 * X[:, 0]) + X[:, 1] + np.array([0.0, 1.5, 0.4])[lev] + 0.02 * rng.standard_normal(n)
    return X, y, lev


# ---------------------------------------------------------------------------------- encoder, kernel
def test_encoder_maps_level_codes_to_one_hot_and_treatment_columns():
    enc = LevelEncoder({2: LEVELS})
    X = np.array([[0.1, 0.2, 0.0], [0.3, 0.4, 0.5], [0.5, 0.6, 1.0]])
    np.testing.assert_array_equal(enc.transform(X, "onehot")[:, 2:], np.eye(3))
    np.testing.assert_array_equal(enc.transform(X, "treatment")[:, 2:], [[0, 0], [1, 0], [0, 1]])
    assert enc.names(["a", "b", "supplier"], "treatment") == ["a", "b", "supplier[B]", "supplier[C]"]
    assert enc.names(["a", "b", "supplier"], "onehot") == ["a", "b", "supplier[A]", "supplier[B]",
                                                           "supplier[C]"]
    # a uniform coded value picks each level with probability 1/L (floor(u L))
    u = (np.arange(3000) + 0.5) / 3000
    counts = np.bincount(enc.level_index(u, 2), minlength=3)
    assert counts.tolist() == [1000, 1000, 1000]
    assert LevelEncoder({2: ("p", "q")}).identity and LevelEncoder((2,)).identity


def test_one_hot_kernel_matches_the_correlation_written_out_pair_by_pair():
    # Brute force: for levels a != b the one-hot columns add 1/l_a^2 + 1/l_b^2 to the squared scaled
    # distance, so the correlation at equal numeric settings is tau_ab = m(sqrt(1/l_a^2 + 1/l_b^2))
    # (the restricted level correlations of Qian, Wu & Wu 2008, Technometrics 50(3), §2).
    from windowfinder.models.gp import GPModel

    X, y, lev = _mixed_data()
    enc = LevelEncoder({2: LEVELS})
    inner = GPModel(trend="none", n_restarts=2, random_state=0).fit(enc.transform(X, "onehot"), y)
    m = enc.wrap(inner, "onehot", X)
    assert isinstance(m, EncodedModel) and m.X_train_.shape == (36, 3)
    ls = inner.length_scales_                      # a, b, then one per level
    assert ls.shape == (5,)
    c = (inner.signal_std_ / inner.y_scale_) ** 2
    rng = np.random.default_rng(5)
    la = rng.integers(0, 3, 15)
    A = np.column_stack([rng.random((15, 2)), la / 2.0])

    def brute(P, lp, Q, lq):
        K = np.empty((len(P), len(Q)))
        for i in range(len(P)):
            for j in range(len(Q)):
                r2 = ((P[i, 0] - Q[j, 0]) / ls[0]) ** 2 + ((P[i, 1] - Q[j, 1]) / ls[1]) ** 2
                if lp[i] != lq[j]:
                    r2 += 1.0 / ls[2 + lp[i]] ** 2 + 1.0 / ls[2 + lq[j]] ** 2
                K[i, j] = c * matern52(np.sqrt(r2))
        return K

    np.testing.assert_allclose(inner._signal(enc.transform(A), enc.transform(X)), brute(A, la, X, lev),
                               rtol=1e-10, atol=1e-12)
    # the prediction through the wrapper is the GP posterior mean with that kernel (R&W 2006, eq. 2.25)
    zs = (inner.z_train_ - inner.y_mean_) / inner.y_scale_
    K = brute(X, lev, X, lev) + ((inner.noise_std_ / inner.y_scale_) ** 2 + 1e-10) * np.eye(len(X))
    mean = inner.y_mean_ + inner.y_scale_ * brute(A, la, X, lev) @ np.linalg.solve(K, zs)
    np.testing.assert_allclose(_mean(m, A), mean, rtol=1e-6, atol=1e-8)


def test_squared_exponential_on_one_hot_columns_is_the_multiplicative_correlation():
    # McMillan, Sacks, Welch & Gao (1999), J. Biopharm. Stat. 9(1): tau_ab = exp(-(theta_a + theta_b)),
    # so tau_AB tau_AC / tau_BC = exp(-2 theta_A); here theta_a = 1 / (2 l_a^2).
    from windowfinder.models.gp import GPModel

    X, y, _ = _mixed_data()
    enc = LevelEncoder({2: LEVELS})
    inner = GPModel(trend="none", n_restarts=1, random_state=0, nu=np.inf).fit(enc.transform(X), y)
    ls = inner.length_scales_[2:]
    at = enc.transform(np.array([[0.5, 0.5, 0.0], [0.5, 0.5, 0.5], [0.5, 0.5, 1.0]]))
    tau = inner._signal(at, at)
    tau = tau / tau[0, 0]
    theta = 1.0 / (2.0 * ls ** 2)
    for i in range(3):
        for j in range(3):
            want = 1.0 if i == j else np.exp(-(theta[i] + theta[j]))
            assert tau[i, j] == pytest.approx(want, rel=1e-10)
    assert tau[0, 1] * tau[0, 2] / tau[1, 2] == pytest.approx(np.exp(-2 * theta[0]), rel=1e-10)


# ------------------------------------------------------------------------ order of the levels
def _runs_csv(n=30, seed=1):
    rng = np.random.default_rng(seed)
    lv = np.array(LEVELS)[np.arange(n) % 3]
    a, b = rng.random(n) * 10, rng.random(n) * 10
    y = a + b + np.array([EFFECT[g] for g in lv]) + 0.3 * np.sin(a) * (lv == "C") + 0.05 * rng.standard_normal(n)
    return pd.DataFrame({"run": [f"R{i + 1}" for i in range(n)], "a": a, "b": b, "supplier": lv,
                         "y": y, "status": "done"}).to_csv(index=False)


@pytest.mark.parametrize("model,rtol", [("quadratic", 1e-8), ("gp", 1e-3)])
def test_predictions_do_not_depend_on_the_order_the_levels_are_listed(tmp_path, model, rtol):
    # Invariance: the same runs, levels listed A, B, C or C, A, B. An ordered reading of the index
    # would put B between A and C in one study and at the end in the other.
    runs = _runs_csv()
    preds = []
    for k, levels in enumerate((("A", "B", "C"), ("C", "A", "B"))):
        d = _study(tmp_path, levels, model, name=f"s{k}")
        (d / "runs.csv").write_text(runs)
        st = Study.load(d)
        fit = st.fit()
        rng = np.random.default_rng(9)
        pts = rng.random((20, 2)) * 10
        out = {}
        for g in LEVELS:
            U = np.array([st.spec.coded_point({"a": p[0], "b": p[1], "supplier": g}) for p in pts])
            out[g] = _mean(fit.surrogates.models["y"], U)
        preds.append(out)
    for g in LEVELS:
        np.testing.assert_allclose(preds[0][g], preds[1][g], rtol=rtol, atol=1e-3 * rtol)
    # the levels stay apart: B is the bad one (truth 6 above A and C)
    assert np.mean(preds[0]["B"] - preds[0]["A"]) == pytest.approx(6.0, abs=0.5)


def test_an_ordered_reading_of_the_index_would_miss_the_middle_level():
    # Why the encoding matters, against the closed-form truth: with A = C and B bad, least squares on
    # the raw index column cannot fit B; the indicator terms can.
    from windowfinder.models.choice import fit_response

    rng = np.random.default_rng(4)
    n = 30
    lev = np.arange(n) % 3
    X = np.column_stack([rng.random((n, 2)), lev / 2.0])
    y = 10 * X[:, 0] + 10 * X[:, 1] + np.array([EFFECT[g] for g in LEVELS])[lev] + 0.05 * rng.standard_normal(n)
    ours, _ = fit_response(X, y, "linear", categorical={2: LEVELS})
    ordinal, _ = fit_response(X, y, "linear")
    truth_b = 10 * X[:, 0] + 10 * X[:, 1] + 6.0
    at_b = X.copy()
    at_b[:, 2] = 0.5
    assert np.max(np.abs(_mean(ours, at_b) - truth_b)) < 0.2
    assert np.max(np.abs(_mean(ordinal, at_b) - truth_b)) > 2.0


# -------------------------------------------------------------------------- polynomial indicators
def test_polynomial_indicators_match_lstsq_on_the_dummy_coded_matrix():
    # Reference: numpy.linalg.lstsq on the treatment-coded model matrix (Montgomery, Peck & Vining 2012,
    # Introduction to Linear Regression Analysis, 5th ed., §8.1): 1, x_a, x_b, z_B, z_C, their products
    # with the numeric factors, x_a x_b and the numeric squares; no z_B z_C (zero) and no z^2 (= z).
    from windowfinder.inputs.spec import StudySpec
    from windowfinder.models.choice import fit_response

    spec = StudySpec.from_dict(__import__("tomllib").loads(_text(model="quadratic")))
    assert spec.term_names == ["a", "b", "supplier[B]", "supplier[C]"]
    rng = np.random.default_rng(8)
    n = 30
    lev = np.arange(n) % 3
    U = np.column_stack([rng.random((n, 2)), lev / 2.0])
    y = 3 + U[:, 0] - 2 * U[:, 1] ** 2 + 1.5 * (lev == 1) - (lev == 2) * U[:, 0] + 0.05 * rng.standard_normal(n)
    m, choice = fit_response(U, y, "quadratic", categorical=spec.level_map)

    def design(V, lv):
        xa, xb, zb, zc = 2 * V[:, 0] - 1, 2 * V[:, 1] - 1, (lv == 1) * 1.0, (lv == 2) * 1.0
        return np.column_stack([np.ones(len(V)), xa, xb, zb, zc, xa * xb, xa * zb, xa * zc, xb * zb,
                                xb * zc, xa ** 2, xb ** 2])

    beta = np.linalg.lstsq(design(U, lev), y, rcond=None)[0]
    table = m.term_table(spec.term_names)
    assert table["term"].tolist() == ["1", "a", "b", "supplier[B]", "supplier[C]", "a*b", "a*supplier[B]",
                                      "a*supplier[C]", "b*supplier[B]", "b*supplier[C]", "a^2", "b^2"]
    np.testing.assert_allclose(table["coefficient"], beta, rtol=1e-9, atol=1e-10)
    lv = np.array([0, 1, 2, 2, 1])
    V = np.column_stack([rng.random((5, 2)), lv / 2.0])
    np.testing.assert_allclose(_mean(m, V), design(V, lv) @ beta, rtol=1e-9)
    assert m.kind == "quadratic" and choice.chosen == "quadratic"


def test_study_fit_reports_one_term_per_level_and_one_length_scale_per_level(tmp_path):
    d = _study(tmp_path, model="linear")
    (d / "runs.csv").write_text(_runs_csv())
    fit = Study.load(d).fit()
    terms = {t["term"]: t["coefficient"] for t in fit.diagnostics[0].terms}
    assert set(terms) == {"1", "a", "b", "supplier[B]", "supplier[C]"}
    assert terms["supplier[B]"] == pytest.approx(6.0, abs=0.3)   # level effects against level A
    assert terms["supplier[C]"] == pytest.approx(0.0, abs=0.3)
    (d / "study.toml").write_text(_text(model="gp"))
    fit = Study.load(d).fit()
    assert set(fit.diagnostics[0].length_scales) == {"a", "b", "supplier[A]", "supplier[B]", "supplier[C]"}


def test_failure_model_sees_levels_unordered(tmp_path):
    # every run at the middle level fails: the failure model must not spread that to A and C more
    # than to each other (brute-force truth: P(works) is 0 at B, 1 at A and C)
    from windowfinder.models.surrogates import Surrogates

    X, y, lev = _mixed_data(n=36)
    works = lev != 1
    sur = Surrogates.fit_arrays(X, {"y": y}, works=works, kind="gp", n_restarts=1,
                                categorical={2: LEVELS})
    assert isinstance(sur.failure, EncodedModel)
    pts = np.random.default_rng(2).random((10, 2))
    p = {k: sur.p_works(np.column_stack([pts, np.full(10, k / 2.0)])) for k in range(3)}
    assert p[1].max() < 0.3 and p[0].min() > 0.7 and p[2].min() > 0.7


# ------------------------------------------------------------------------------------------ designs
@pytest.mark.parametrize("runs", [12, 13])
def test_space_filling_design_is_balanced_and_latin_per_level(tmp_path, runs):
    st = Study.load(_study(tmp_path))
    frame = st.design("space-filling", runs=runs)
    counts = frame["supplier"].value_counts()
    assert set(counts.index) == set(LEVELS) and counts.max() - counts.min() <= 1
    U = st.spec.to_coded(st.spec.level_indices(frame)[st.spec.factor_names].to_numpy(float))
    for g in LEVELS:   # each slice a Latin hypercube (McKay, Beckman & Conover 1979)
        assert is_latin(U[frame["supplier"].to_numpy() == g][:, st.spec.numeric])


# ------------------------------------------------------------------------------------------- window
def _bad_middle_study(tmp_path):
    d = _study(tmp_path)
    st = Study.load(d)
    frame = st.design("space-filling", runs=24)
    rng = np.random.default_rng(2)
    frame["y"] = [a + b + EFFECT[g] + 0.05 * rng.standard_normal()
                  for a, b, g in zip(frame["a"], frame["b"], frame["supplier"])]
    frame["status"] = "done"
    st.add_runs(frame)
    return d


def _truly_feasible(win, level):
    """Share of the guard box where the closed-form truth meets y <= 12 at ``level`` (brute force)."""
    f = {x["name"]: x for x in win["factors"]}
    g = np.random.default_rng(0).random((4000, 2))
    a = f["a"]["guard_low"] + g[:, 0] * (f["a"]["guard_high"] - f["a"]["guard_low"])
    b = f["b"]["guard_low"] + g[:, 1] * (f["b"]["guard_high"] - f["b"]["guard_low"])
    return np.mean(a + b + EFFECT[level] <= 12.0)


def test_window_names_only_the_good_levels_when_the_middle_one_is_bad(tmp_path, capsys):
    d = _bad_middle_study(tmp_path)
    code, out, err = _cli(["window", d], capsys)
    assert code == 0, err
    win = json.loads((d / "out" / "window.json").read_text())   # schema-checked by conftest
    sup = next(f for f in win["factors"] if f["name"] == "supplier")
    assert sup == {"name": "supplier", "levels": ["A", "C"]} and "levels: A, C" in out
    assert _truly_feasible(win, "A") >= 0.95 and _truly_feasible(win, "C") >= 0.95
    assert _truly_feasible(win, "B") < 0.95
    # the truth: a + b <= 12 at A and C, so the box is near the largest square 6 x 6 at the origin
    f = {x["name"]: x for x in win["factors"]}
    assert f["a"]["low"] == pytest.approx(0.0, abs=0.5) and 4.5 < f["a"]["high"] < 7.0
    code, out, err = _cli(["window", d, "--level", "supplier=C"], capsys)
    win = json.loads((d / "out" / "window.json").read_text())
    assert code == 0 and win["fixed_levels"] == {"supplier": "C"}
    assert next(f for f in win["factors"] if f["name"] == "supplier")["levels"] == ["C"]
    assert _truly_feasible(win, "C") >= 0.95
    code, out, err = _cli(["window", d, "--level", "supplier=B"], capsys)
    win = json.loads((d / "out" / "window.json").read_text())
    assert code == 0 and next(f for f in win["factors"] if f["name"] == "supplier")["levels"] == ["B"]
    assert _truly_feasible(win, "B") >= 0.95
    f = {x["name"]: x for x in win["factors"]}
    assert f["a"]["high"] < 4.5   # truth at B: a + b <= 6
    code, _, err = _cli(["window", d, "--level", "supplier=D"], capsys)
    assert code == 2 and "levels are" in err and len(err.strip().splitlines()) == 1


def test_tradeoff_next_runs_and_report_maps_cover_three_levels(tmp_path, capsys):
    d = _bad_middle_study(tmp_path)
    for verb in (["window", d], ["tradeoff", d], ["suggest", d, "--count", "4"], ["report", d]):
        code, _, err = _cli(verb, capsys)
        assert code == 0, err
    trade = pd.read_csv(d / "out" / "tradeoff.csv")
    assert len(trade) and set(trade["supplier"]) <= set(LEVELS)
    # minimising y = a + b + effect: the best settings are at a = b = 0 on A or C, never B
    assert "B" not in set(trade["supplier"])
    nxt = pd.read_csv(d / "out" / "next.csv")
    assert len(nxt) == 4 and set(nxt["supplier"]) <= set(LEVELS)
    html = (d / "out" / "report.html").read_text()
    for g in LEVELS:
        assert f"a × b at supplier = {g}" in html


def test_block_offsets_and_censored_refits_take_the_encoded_levels():
    # Blocks: two days offset by +1 / -1 (truth); the random-offset model recovers their difference
    # (BLUP, Robinson 1991, Statistical Science 6(1)). Censored: runs at B known only to lie above 12
    # are imputed beyond the bound (truncated-normal mean > bound, Schmee & Hahn 1979).
    from windowfinder.models.choice import fit_response
    from windowfinder.models.surrogates import Surrogates

    X, y, lev = _mixed_data(n=36)
    day = np.where(np.arange(36) < 18, "d1", "d2")
    shift = np.where(day == "d1", 1.0, -1.0)
    m, _ = fit_response(X, y + shift, "gp", n_restarts=1, blocks=day, categorical={2: LEVELS})
    assert isinstance(m, EncodedModel)
    assert m.block_offsets_["d1"] - m.block_offsets_["d2"] == pytest.approx(2.0, abs=0.3)
    yc = 10 * X[:, 0] + np.array([0.0, 20.0, 1.0])[lev]     # B: 20 + ..., above a bound of 15
    mask = lev == 1
    sur = Surrogates.fit_arrays(X, {"y": np.where(mask, np.nan, yc)}, kind="gp", n_restarts=1,
                                censored={"y": (mask, 15.0, "above")}, categorical={2: LEVELS})
    model = sur.models["y"]
    assert isinstance(model, EncodedModel) and model.X_train_.shape == (36, 3)
    assert np.all(_mean(model, X[mask]) > 15.0)
    assert np.all(_mean(model, X[~mask]) < 12.0)
