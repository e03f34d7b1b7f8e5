"""Categorical factors: parsing, run tables, the mixed-input kernel, indicator terms, designs balanced
over levels, the window per level, suggestions / trade-off on the levels, and a closed loop."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist

from windowfinder.errors import InputError
from windowfinder.inputs.designs import is_latin
from windowfinder.inputs.runs import read_runs, write_runs
from windowfinder.inputs.spec import StudySpec
from windowfinder.study import Study

from test_categorical_usage import _cli   # (code, stdout, stderr) of one command line

HEAD = """\
[study]
name = "gas study"
seed = 4
confidence = 0.9

[[factor]]
name = "a"
low = 0.0
high = 10.0

[[factor]]
name = "b"
low = 0.0
high = 10.0

[[factor]]
name = "gas"
levels = ["pure", "mix"]
"""

LINEAR_RESPONSE = """
[[response]]
name = "y"
goal = "minimize"
max = 12.0
model = "linear"
"""


def _study(tmp_path, text, runs=None):
    d = tmp_path / "s"
    d.mkdir(exist_ok=True)
    (d / "study.toml").write_text(text)
    if runs is not None:
        (d / "runs.csv").write_text(runs)
    return d


# ------------------------------------------------------------------------------------------ parsing
def test_levels_make_a_categorical_factor_on_a_unit_step_grid():
    spec = StudySpec.from_dict(__import__("tomllib").loads(HEAD + LINEAR_RESPONSE))
    gas = spec.factor("gas")
    assert gas.is_categorical and gas.levels == ("pure", "mix")
    assert (gas.low, gas.high, gas.step, gas.tolerance) == (0.0, 1.0, 1.0, 0.0)
    assert spec.categorical == [2] and spec.numeric == [0, 1]
    assert spec.term_names == ["a", "b", "gas[mix]"]
    # coded values are the level index / (L - 1); snapping lands on the levels only
    np.testing.assert_array_equal(spec.snap_coded(np.array([[0.3, 0.3, 0.49], [0.3, 0.3, 0.51]]))[:, 2],
                                  [0.0, 1.0])


@pytest.mark.parametrize("factor,needle", [
    ('name = "gas"\nlevels = ["pure", "mix"]\nlow = 0.0', "'low' cannot go with 'levels'"),
    ('name = "gas"\nlevels = ["pure", "mix"]\ntolerance = 0.1', "'tolerance' cannot go with 'levels'"),
    ('name = "gas"\nlevels = ["pure", "mix"]\nstep = 1.0', "'step' cannot go with 'levels'"),
    ('name = "gas"\nlevels = []', "at least two levels"),
    ('name = "gas"\nlevels = ["pure"]', "at least two levels"),
    ('name = "gas"\nlevels = ["pure", "pure"]', "duplicate level 'pure'"),
    ('name = "gas"\nlevels = ["pure", 2]', "list of names in quotes"),
    ('name = "gas"\nlevels = ["pure", " mix"]', "begins or ends with a space"),
    ('name = "gas"\nlevels = [' + ", ".join(f'"g{i}"' for i in range(17)) + "]",
     "17 level combinations; at most 16"),
])
def test_bad_levels_are_refused_in_one_line(tmp_path, capsys, factor, needle):
    text = HEAD.split('[[factor]]\nname = "gas"')[0] + "[[factor]]\n" + factor + "\n" + LINEAR_RESPONSE
    d = _study(tmp_path, text)
    code, out, err = _cli(["check", d], capsys)
    assert code == 2 and needle in err and "[[factor]]" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_constraint_on_a_categorical_factor_is_refused(tmp_path, capsys):
    text = HEAD + LINEAR_RESPONSE + '\n[[constraint]]\nname = "c"\nterms = { a = 1.0, gas = 1.0 }\nmax = 5\n'
    code, _, err = _cli(["check", _study(tmp_path, text)], capsys)
    assert code == 2 and "'gas' is a categorical factor" in err


# --------------------------------------------------------------------------------------- run table
def test_level_names_round_trip_through_runs_csv(tmp_path):
    runs = "run,a,b,gas,y\nR1,1,2,pure,3\nR2,4,5,mix,11\nR3,2,2,mix,\n"
    d = _study(tmp_path, HEAD + LINEAR_RESPONSE, runs)
    spec = StudySpec.from_toml(d / "study.toml")
    table = read_runs(d / "runs.csv", spec)
    np.testing.assert_array_equal(table.X()[:, 2], [0.0, 1.0, 1.0])   # level index inside
    np.testing.assert_array_equal(table.X_coded()[:, 2], [0.0, 1.0, 1.0])
    write_runs(d / "runs.csv", spec, table.frame)
    again = pd.read_csv(d / "runs.csv")
    assert again["gas"].tolist() == ["pure", "mix", "mix"]
    np.testing.assert_array_equal(read_runs(d / "runs.csv", spec).X(), table.X())


def test_unknown_level_in_runs_csv_names_file_row_column_value_and_levels(tmp_path, capsys):
    d = _study(tmp_path, HEAD + LINEAR_RESPONSE, "run,a,b,gas,y\nR1,1,2,pure,3\nR2,4,5,mixx,11\n")
    before = (d / "runs.csv").read_bytes()
    code, _, err = _cli(["check", d], capsys)
    assert code == 2
    for part in ("runs.csv line 3", "run R2", "'gas'", "'mixx'", "did you mean 'mix'", "pure, mix"):
        assert part in err
    assert (d / "runs.csv").read_bytes() == before


# ---------------------------------------------------------------------------- kernel: brute force
def _mean(model, X):
    out = model.predict(X, return_std=False)
    return out[0] if isinstance(out, tuple) else out


def matern52(r):
    """Matern 5/2 correlation (Rasmussen & Williams 2006, GPML, eq. 4.17)."""
    return (1.0 + np.sqrt(5.0) * r + 5.0 * r ** 2 / 3.0) * np.exp(-np.sqrt(5.0) * r)


def test_mixed_kernel_matches_the_exchangeable_correlation_by_formula():
    # Brute force: the correlation written out pair by pair. For a two-level factor z the model's own
    # length scale l_z on its 0/1 column gives, between runs at levels z != z', the correlation
    # m(sqrt(r_num^2 + 1 / l_z^2)): at equal numeric settings one constant tau = m(1 / l_z) for every
    # pair of levels, the exchangeable correlation of Qian, Wu & Wu (2008), Technometrics 50(3), §2.
    from windowfinder.models.gp import GPModel

    rng = np.random.default_rng(3)
    n = 30
    X = np.column_stack([rng.random((n, 2)), rng.integers(0, 2, n)])
    y = np.sin(4 * X[:, 0]) + X[:, 1] + 0.8 * X[:, 2] + 0.02 * rng.standard_normal(n)
    m = GPModel(trend="none", n_restarts=2, random_state=0).fit(X, y)
    ls = m.length_scales_
    c = (m.signal_std_ / m.y_scale_) ** 2
    A = np.column_stack([rng.random((12, 2)), rng.integers(0, 2, 12)])

    def brute(P, Q):
        K = np.empty((len(P), len(Q)))
        for i, p in enumerate(P):
            for j, q in enumerate(Q):
                r2 = ((p[0] - q[0]) / ls[0]) ** 2 + ((p[1] - q[1]) / ls[1]) ** 2
                r2 += (p[2] != q[2]) / ls[2] ** 2      # the level indicator: 0 or 1
                K[i, j] = c * matern52(np.sqrt(r2))
        return K

    np.testing.assert_allclose(m._signal(A, X), brute(A, X), rtol=1e-10, atol=1e-12)
    # exchangeable: same numeric settings, other level -> one correlation tau for all settings
    B = A.copy()
    B[:, 2] = 1 - B[:, 2]
    tau = np.diag(brute(A, B)) / c
    np.testing.assert_allclose(tau, matern52(1.0 / ls[2]), rtol=1e-12)
    assert 0.0 < tau[0] < 1.0
    # the prediction is the GP posterior mean with that kernel (Rasmussen & Williams 2006, eq. 2.25)
    zs = (m.z_train_ - m.y_mean_) / m.y_scale_
    K = brute(X, X) + ((m.noise_std_ / m.y_scale_) ** 2 + 1e-10) * np.eye(n)
    mean = m.y_mean_ + m.y_scale_ * brute(A, X) @ np.linalg.solve(K, zs)
    np.testing.assert_allclose(_mean(m, A), mean, rtol=1e-6, atol=1e-8)


# ------------------------------------------------------------------------------ polynomial indicators
def test_polynomial_indicator_terms_match_direct_least_squares():
    # Reference: numpy.linalg.lstsq on the dummy-coded model matrix (Montgomery, Peck & Vining 2012,
    # Introduction to Linear Regression Analysis, 5th ed., §8.1): 1, x_a, x_b, z, interactions, squares
    # of the numeric factors only (z^2 = z).
    from windowfinder.models.polynomial import PolynomialModel

    rng = np.random.default_rng(8)
    n = 24
    U = np.column_stack([rng.random((n, 2)), np.repeat([0.0, 1.0], n // 2)])
    y = 3 + U[:, 0] - 2 * U[:, 1] ** 2 + 1.5 * U[:, 2] + 0.7 * U[:, 0] * U[:, 2] + 0.05 * rng.standard_normal(n)
    m = PolynomialModel(degree=2, categorical=(2,)).fit(U, y)
    xa, xb, z = 2 * U[:, 0] - 1, 2 * U[:, 1] - 1, U[:, 2]
    F = np.column_stack([np.ones(n), xa, xb, z, xa * xb, xa * z, xb * z, xa ** 2, xb ** 2])
    beta = np.linalg.lstsq(F, y, rcond=None)[0]
    table = m.term_table(["a", "b", "gas[mix]"])
    assert table["term"].tolist() == ["1", "a", "b", "gas[mix]", "a*b", "a*gas[mix]", "b*gas[mix]",
                                      "a^2", "b^2"]
    np.testing.assert_allclose(table["coefficient"], beta, rtol=1e-9, atol=1e-10)
    V = np.column_stack([rng.random((5, 2)), [0, 1, 0, 1, 1]])
    Fv = np.column_stack([np.ones(5), 2 * V[:, 0] - 1, 2 * V[:, 1] - 1, V[:, 2],
                          (2 * V[:, 0] - 1) * (2 * V[:, 1] - 1), (2 * V[:, 0] - 1) * V[:, 2],
                          (2 * V[:, 1] - 1) * V[:, 2], (2 * V[:, 0] - 1) ** 2, (2 * V[:, 1] - 1) ** 2])
    np.testing.assert_allclose(_mean(m, V), Fv @ beta, rtol=1e-9)
    assert m.kind == "quadratic"


def test_study_fit_names_the_indicator_by_its_level(tmp_path):
    d = _study(tmp_path, HEAD.replace('confidence = 0.9', 'confidence = 0.9') + LINEAR_RESPONSE)
    st = Study.load(d)
    frame = st.design("space-filling", runs=12)
    rng = np.random.default_rng(1)
    frame["y"] = [a + b + 5 * (g == "mix") + 0.05 * rng.standard_normal()
                  for a, b, g in zip(frame["a"], frame["b"], frame["gas"])]
    frame["status"] = "done"
    st.add_runs(frame)
    fit = st.fit()
    terms = {t["term"]: t["coefficient"] for t in fit.diagnostics[0].terms}
    assert set(terms) == {"1", "a", "b", "gas[mix]"}
    assert terms["gas[mix]"] == pytest.approx(5.0, abs=0.2)   # the level effect, dummy coded


# ------------------------------------------------------------------------------------------ designs
def _slices(spec, frame):
    U = spec.to_coded(spec.level_indices(frame)[spec.factor_names].to_numpy(float))
    return {g: U[frame["gas"].to_numpy() == g][:, spec.numeric] for g in ("pure", "mix")}


@pytest.mark.parametrize("runs", [12, 13])
def test_space_filling_design_is_sliced_per_level(tmp_path, runs):
    d = _study(tmp_path, HEAD + LINEAR_RESPONSE)
    st = Study.load(d)
    frame = st.design("space-filling", runs=runs)
    counts = frame["gas"].value_counts()
    assert set(counts.index) == {"pure", "mix"} and counts.max() - counts.min() <= 1
    parts = _slices(st.spec, frame)
    for U in parts.values():   # each slice a Latin hypercube (McKay, Beckman & Conover 1979)
        assert is_latin(U)
    if runs % 2 == 0:          # and their union too (sliced Latin hypercube, Qian 2012, JASA 107)
        assert is_latin(np.vstack(list(parts.values())))


def test_classical_design_is_replicated_per_level(tmp_path):
    d = _study(tmp_path, HEAD + LINEAR_RESPONSE)
    st = Study.load(d)
    frame = st.design("full-factorial")
    parts = _slices(st.spec, frame)
    assert len(parts["pure"]) == len(parts["mix"]) == 9   # the 3^2 factorial at each level
    np.testing.assert_array_equal(np.unique(parts["pure"], axis=0), np.unique(parts["mix"], axis=0))
    with pytest.raises(InputError, match="9 runs per level combination of gas, 18 in all"):
        st.design("full-factorial", runs=9)
    with pytest.raises(InputError, match="--blocks"):
        st.design("space-filling", runs=12, blocks=2)


def test_designs_added_in_turn_stay_balanced(tmp_path):
    # a campaign tops up one run at a time: each goes to the level with the fewest runs so far
    st = Study.load(_study(tmp_path, HEAD + LINEAR_RESPONSE))
    for _ in range(5):
        st.add_runs(st.design("space-filling", runs=1))
    counts = st.runs.frame["gas"].value_counts()
    assert sorted(counts.tolist()) == [2, 3]


def test_constrained_design_is_balanced_and_inside(tmp_path):
    text = HEAD + LINEAR_RESPONSE + '\n[[constraint]]\nname = "c"\nterms = { a = 1.0, b = 1.0 }\nmax = 12\n'
    st = Study.load(_study(tmp_path, text))
    frame = st.design("space-filling", runs=15)
    counts = frame["gas"].value_counts()
    assert counts.max() - counts.min() <= 1
    assert (frame["a"] + frame["b"] <= 12 + 1e-9).all()


# ------------------------------------------------------------------------------------------- window
def _linear_study(tmp_path, effect):
    """y = a + b + effect * [gas = mix], max 12: truly feasible where a + b <= 12 (- effect at mix)."""
    d = _study(tmp_path, HEAD + LINEAR_RESPONSE)
    st = Study.load(d)
    frame = st.design("space-filling", runs=24)
    rng = np.random.default_rng(2)
    frame["y"] = [a + b + effect * (g == "mix") + 0.05 * rng.standard_normal()
                  for a, b, g in zip(frame["a"], frame["b"], frame["gas"])]
    frame["status"] = "done"
    st.add_runs(frame)
    return d


def _truly_feasible(win, effect, level):
    f = {x["name"]: x for x in win["factors"]}
    g = np.random.default_rng(0).random((4000, 2))
    a = f["a"]["guard_low"] + g[:, 0] * (f["a"]["guard_high"] - f["a"]["guard_low"])
    b = f["b"]["guard_low"] + g[:, 1] * (f["b"]["guard_high"] - f["b"]["guard_low"])
    return np.mean(a + b + effect * (level == "mix") <= 12.0)


def test_window_names_the_levels_it_holds_on(tmp_path, capsys):
    d = _linear_study(tmp_path, effect=5.0)
    code, out, _ = _cli(["window", d], capsys)
    assert code == 0 and "levels: pure" in out
    win = json.loads((d / "out" / "window.json").read_text())   # schema-checked by conftest
    gas = next(f for f in win["factors"] if f["name"] == "gas")
    assert gas == {"name": "gas", "levels": ["pure"]}
    # brute force on the closed-form truth: the guard box is feasible at the level named, not at mix
    assert _truly_feasible(win, 5.0, "pure") >= 0.95
    assert _truly_feasible(win, 5.0, "mix") < 0.95
    assert isinstance(win["worst_point"]["gas"], str)
    # --level fixes the level: a smaller box, at mix
    code, out, _ = _cli(["window", d, "--level", "gas=mix"], capsys)
    win = json.loads((d / "out" / "window.json").read_text())
    assert code == 0 and win["fixed_levels"] == {"gas": "mix"}
    assert next(f for f in win["factors"] if f["name"] == "gas")["levels"] == ["mix"]
    assert _truly_feasible(win, 5.0, "mix") >= 0.95
    code, _, err = _cli(["window", d, "--level", "gas=mixx"], capsys)
    assert code == 2 and "did you mean 'mix'" in err and len(err.strip().splitlines()) == 1
    code, _, err = _cli(["window", d, "--level", "a=1"], capsys)
    assert code == 2 and "not a categorical factor" in err


def test_window_holding_on_both_levels_lists_both(tmp_path):
    from windowfinder.answers.results import build_window

    d = _linear_study(tmp_path, effect=0.0)
    st = Study.load(d)
    win = build_window(st.spec, st.fit())
    assert win.found
    gas = next(f for f in win.factors if f["name"] == "gas")
    assert gas["levels"] == ["pure", "mix"]
    doc = {f["name"]: f for f in win.factors}
    assert all(_truly_feasible({"factors": list(doc.values())}, 0.0, g) >= 0.95 for g in ("pure", "mix"))
    # a set point names its level: the window is then around it, at that level
    sp = build_window(st.spec, st.fit(), set_point={"a": 3.0, "b": 3.0, "gas": "mix"})
    assert sp.found and next(f for f in sp.factors if f["name"] == "gas")["levels"] == ["mix"]


def test_testplan_runs_at_the_named_levels_and_verify_reads_them(tmp_path, capsys):
    d = _linear_study(tmp_path, effect=0.0)
    assert _cli(["window", d], capsys)[0] == 0
    code, out, _ = _cli(["testplan", d], capsys)
    assert code == 0
    plan = pd.read_csv(d / "out" / "testplan.csv")
    assert sorted(plan["gas"].unique()) == ["mix", "pure"]
    assert (plan["gas"] == "pure").sum() == (plan["gas"] == "mix").sum()
    plan["y"] = plan["a"] + plan["b"]
    plan.to_csv(d / "out" / "filled.csv", index=False)
    code, out, err = _cli(["verify", d, d / "out" / "filled.csv"], capsys)
    assert code == 0, err
    runs = pd.read_csv(d / "runs.csv")
    assert set(runs["gas"]) == {"pure", "mix"}
    code, _, _ = _cli(["controlplan", d], capsys)
    assert code == 0


# ------------------------------------------------------------------------ bundled case, suggestions
@pytest.fixture
def lasercut(tmp_path):
    from windowfinder.template import create_study

    create_study(tmp_path / "cut", example="lasercut")
    return tmp_path / "cut"


def test_suggestions_and_tradeoff_stay_on_levels_and_inside_the_constraint(lasercut):
    from windowfinder.answers.tradeofftable import build_tradeoff

    st = Study.load(lasercut)
    fit = st.fit()
    nxt = st.suggest(6, fit=fit)
    tr = build_tradeoff(st.spec, fit, confidence=0.7)   # 12 runs: nothing reaches 0.95 yet
    for frame in (nxt.frame, tr.frame):
        assert len(frame) and set(frame["gas"]) <= {"nitrogen", "oxygen"}
        assert (frame["speed"] - 1.25 * frame["power"] <= 1.5 + 1e-9).all()
    st.add_runs(nxt.planned_rows(st.spec))
    again = pd.read_csv(lasercut / "runs.csv")
    assert set(again["gas"]) <= {"nitrogen", "oxygen"}


def test_scenario_and_run_protocol_take_level_names(tmp_path):
    from windowfinder.cases import load_simulator
    from windowfinder.cases.entry import main as entry

    sim = load_simulator("lasercut")
    a = sim.evaluate({"power": 4.5, "speed": 3.0, "gas": "oxygen"}, seed=1)
    b = sim.evaluate({"power": 4.5, "speed": 3.0, "gas": 1}, seed=1)
    assert a == b
    # line energy 90 kJ/m: oxygen haz = 0.33 sqrt(0.9) (the simulator's closed form)
    t = sim.truth(np.array([[4.5, 3.0, "oxygen"]], dtype=object))
    assert t["haz_width"][0] == pytest.approx(0.33 * np.sqrt(0.9), rel=1e-12)
    with pytest.raises(InputError, match="levels"):
        sim.evaluate({"power": 4.5, "speed": 3.0, "gas": "argon"})
    (tmp_path / "in.csv").write_text("run,power,speed,gas\nR1,4.5,3.0,oxygen\n")
    assert entry(sim, "lasercut", [str(tmp_path / "in.csv"), str(tmp_path / "out.csv"), "--seed", "1"]) == 0
    assert pd.read_csv(tmp_path / "out.csv")["status"].tolist() == ["done"]


def test_closed_loop_on_lasercut_ends_with_a_window_naming_its_levels(lasercut):
    # Reference: brute force on the simulator's noise-free truth inside the guard box, per level named.
    from windowfinder.answers.results import build_window
    from windowfinder.campaign.loop import run_campaign
    from windowfinder.cases import load_simulator

    (lasercut / "runs.csv").unlink()
    res = run_campaign(lasercut, function="windowfinder.cases.lasercut.simulator:evaluate", budget=26,
                       initial=12, batch=2, workers=1)
    assert res.completed >= 26 if hasattr(res, "completed") else True
    st = Study.load(lasercut)
    runs = pd.read_csv(lasercut / "runs.csv")
    assert len(runs) >= 26 and set(runs["gas"]) == {"nitrogen", "oxygen"}
    assert (runs["speed"] - 1.25 * runs["power"] <= 1.5 + 1e-9).all()
    win = build_window(st.spec, st.fit())
    assert win.found, win.message
    f = {x["name"]: x for x in win.factors}
    assert f["gas"]["levels"] and set(f["gas"]["levels"]) <= {"nitrogen", "oxygen"}
    lo = np.array([f["power"]["guard_low"], f["speed"]["guard_low"]])
    hi = np.array([f["power"]["guard_high"], f["speed"]["guard_high"]])
    corners = np.array([[p, v] for p in (lo[0], hi[0]) for v in (lo[1], hi[1])])
    assert (corners[:, 1] - 1.25 * corners[:, 0] <= 1.5 + 1e-9).all()   # guard band inside
    sim = load_simulator("lasercut")
    U = np.random.default_rng(0).random((20000, 2))
    for level in f["gas"]["levels"]:
        X = np.column_stack([lo + U * (hi - lo), np.full(len(U), sim.LEVELS["gas"].index(level))])
        assert sim.feasible(X).mean() >= 0.95, level
    assert cdist(corners, corners).max() > 0
    # the report maps power x speed once per gas, with the runs made at that gas
    from windowfinder.report import write_report

    html = write_report(st, window=win).read_text()
    assert "power × speed at gas = nitrogen" in html and "power × speed at gas = oxygen" in html
