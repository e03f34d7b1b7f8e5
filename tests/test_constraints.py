"""Constraints between factors and the step grid: parsing, geometry, and every answer kept inside.

Every check compares with plain arithmetic on the constraint's own definition (sum of coefficient x
setting against min/max, evaluated in natural units), with brute-force corner enumeration, or with a
hand-solved linear system; never with numbers produced by the code under test.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest

from windowfinder.errors import InputError
from windowfinder.inputs.constraints import LinearConstraints, box_range
from windowfinder.inputs.designs import METHODS
from windowfinder.inputs.runs import read_runs
from windowfinder.inputs.spec import StudySpec
from windowfinder.nextruns.candidates import pick
from windowfinder.study import Study
from windowfinder.cli import main

# A demo scenario of our own: a seam welder where high power at low travel speed burns through.
SEAM = """\
[study]
name = "seam"
seed = 3
confidence = 0.9

[[factor]]
name = "power"
unit = "kW"
low = 1.0
high = 4.0
tolerance = 0.05

[[factor]]
name = "speed"
unit = "mm/s"
low = 5.0
high = 20.0
tolerance = 0.5

[[factor]]
name = "passes"
low = 1
high = 4
step = 1

[[response]]
name = "depth"
unit = "mm"
goal = "maximize"
min = 1.0

[[response]]
name = "spatter"
goal = "minimize"
max = 3.0

[[constraint]]
name = "no burn-through"
terms = { power = 1.0, speed = -0.1 }
max = 2.6
"""
COEF = {"power": 1.0, "speed": -0.1}
BURN_MAX = 2.6


def burn(X):
    """The constraint's form by hand: power - 0.1 speed (natural units)."""
    X = np.atleast_2d(np.asarray(X, dtype=float))
    return X[:, 0] - 0.1 * X[:, 1]


def spec_of(text=SEAM):
    return StudySpec.from_dict(__import__("tomllib").loads(text))


def seam_dir(tmp_path, text=SEAM):
    d = tmp_path / "seam"
    d.mkdir()
    (d / "study.toml").write_text(text)
    return d


def simulate(X):
    """Demo simulator of our own (smooth, noise-free) for the seam scenario."""
    p, v, n = np.asarray(X, dtype=float).T
    return {"depth": 0.5 * p + 0.05 * n - 0.04 * v + 0.8 + 0.02 * np.sin(7 * p),
            "spatter": 0.6 * p + 0.3 * n + 0.02 * v}


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    d = seam_dir(tmp_path_factory.mktemp("c"))
    study = Study.load(d)
    study.add_runs(study.design("space-filling", runs=20))
    res = pd.DataFrame({"run": study.runs.frame["run"], **simulate(study.runs.X())})
    study.record_results(res)
    study = Study.load(d)
    return study, study.fit(n_restarts=2)


# -- parsing ---------------------------------------------------------------------------------------
def test_parse_stores_coded_rows_matching_natural_form():
    spec = spec_of()
    lin = spec.linear
    rng = np.random.default_rng(0)
    X = spec.to_natural(rng.random((500, 3)))
    # A u <= b in coded units is the same half-space as power - 0.1 speed <= 2.6 in natural units
    assert np.array_equal(lin.feasible(spec.to_coded(X)), burn(X) <= BURN_MAX + 1e-12)
    assert spec.constraints[0].text() == "1 power - 0.1 speed <= 2.6"


@pytest.mark.parametrize("extra, expect", [
    ('[[constraint]]\nname = "c"\nterms = { power = 1.0 }\nmaxx = 2\n', "did you mean 'max'"),
    ('[[constraint]]\nname = "c"\nterms = { powr = 1.0 }\nmax = 2\n', "unknown factor 'powr'"),
    ('[[constraint]]\nname = "c"\nterms = { power = 1.0 }\n', "needs min and/or max"),
    ('[[constraint]]\nname = "c"\nterms = { power = "a" }\nmax = 2\n', "must be a finite number"),
    ('[[constraint]]\nname = "c"\nterms = { power = 0.0 }\nmax = 2\n', "every coefficient"),
    ('[[constraint]]\nname = "c"\nterms = { power = 1.0 }\nmin = 3\nmax = 2\n', "must not exceed"),
    ('[[constraint]]\nterms = { power = 1.0 }\nmax = 2\n', "missing key 'name'"),
    ('[[constraint]]\nname = "no burn-through"\nterms = { power = 1.0 }\nmax = 3\n', "duplicate"),
    ('[[constraint]]\nname = "=cmd"\nterms = { power = 1.0 }\nmax = 3\n', "read as a formula"),
    # power + speed ranges over 6 .. 24 within the bounds (by hand): max = 5 cannot be met
    ('[[constraint]]\nname = "c"\nterms = { power = 1.0, speed = 1.0 }\nmax = 5\n', "6 .. 24"),
])
def test_bad_constraints_refused_with_one_line(extra, expect):
    with pytest.raises(InputError) as e:
        spec_of(SEAM + extra)
    assert expect in str(e.value) and "\n" not in str(e.value)


def test_jointly_infeasible_constraints_refused():
    # each alone is met somewhere; together power + speed >= 20 and power + speed <= 10 exclude all
    extra = ('[[constraint]]\nname = "a"\nterms = { power = 1.0, speed = 1.0 }\nmin = 20\n'
             '[[constraint]]\nname = "b"\nterms = { power = 1.0, speed = 1.0 }\nmax = 10\n')
    with pytest.raises(InputError, match="together exclude every setting"):
        spec_of(SEAM + extra)
    # a thin but non-empty intersection passes: 12 <= power + speed <= 12.01 (by hand: power = 2, speed = 10)
    ok = ('[[constraint]]\nname = "a"\nterms = { power = 1.0, speed = 1.0 }\nmin = 12\n'
          '[[constraint]]\nname = "b"\nterms = { power = 1.0, speed = 1.0 }\nmax = 12.01\n')
    u = spec_of(SEAM + ok).linear.feasible_point()
    x = spec_of(SEAM + ok).to_natural(u)[0]
    assert 12 - 1e-6 <= x[0] + x[1] <= 12.01 + 1e-6 and x[0] - 0.1 * x[1] <= BURN_MAX + 1e-6


def test_check_refuses_infeasible_constraint_exit_2(tmp_path, capsys):
    # power - 0.1 speed ranges over 1 - 2 = -1 .. 4 - 0.5 = 3.5 within the bounds (by hand)
    d = seam_dir(tmp_path, SEAM.replace("max = 2.6", "max = -1.5"))
    assert main(["check", str(d)]) == 2
    err = capsys.readouterr().err
    assert "no burn-through" in err and "-1 .. 3.5" in err and len(err.strip().splitlines()) == 1


# -- geometry --------------------------------------------------------------------------------------
def test_box_worst_equals_brute_force_corners():
    # support function of a box (Boyd & Vandenberghe 2004, Convex Optimization, section 3.1): the
    # maximum of a linear form over a box is reached at one of its 2^d corners
    rng = np.random.default_rng(1)
    for _ in range(50):
        d = int(rng.integers(1, 6))
        A, b = rng.normal(size=(3, d)), rng.normal(size=3)
        lin = LinearConstraints.__new__(LinearConstraints)
        lin.A, lin.b, lin.row_names = A, b, ["x"] * 3
        lo = rng.random(d) * 0.5
        hi = lo + rng.random(d) * 0.5
        corners = np.array([[hi[j] if bit else lo[j] for j, bit in enumerate(bits)]
                            for bits in itertools.product((0, 1), repeat=d)])
        assert np.allclose(lin.box_worst(lo, hi), (corners @ A.T - b).max(axis=0))
        smallest, largest = box_range(A[0], lo, hi)
        assert np.isclose(smallest, (corners @ A[0]).min()) and np.isclose(largest, (corners @ A[0]).max())
        # largest shrink about the centre: every corner of the shrunk box meets the rows (bisection)
        m, half = (lo + hi) / 2, (hi - lo) / 2
        s = lin.shrink_share(m, half)
        if 0 < s < 1:
            def ok(t):
                return lin.box_inside(m - t * half, m + t * half)
            assert ok(s * (1 - 1e-9)) and not ok(min(1.0, s * (1 + 1e-6) + 1e-12))


def test_existing_runs_breaking_a_constraint_are_kept_and_named(tmp_path):
    d = seam_dir(tmp_path)
    # R002: 4.0 - 0.1 * 6 = 3.4 > 2.6 breaks it; R001: 2 - 1 = 1 meets it (by hand)
    (d / "runs.csv").write_text("run,power,speed,passes,depth,spatter,status\n"
                                "R001,2,10,1,1.5,2,done\nR002,4,6,2,1.7,2.5,done\n")
    table = read_runs(d / "runs.csv", Study.load(d).spec)
    assert len(table) == 2
    assert list(table.breaking()) == [[], ["no burn-through"]]
    assert any("no burn-through" in w and "R002" in w and "R001" not in w for w in table.warnings)


# -- designs ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("method", METHODS)
def test_every_design_meets_constraint_and_step(tmp_path, method):
    study = Study.load(seam_dir(tmp_path))
    runs = {"space-filling": 13, "sobol": 9}.get(method)
    frame = study.design(method, runs=runs)
    X = frame[study.spec.factor_names].to_numpy()
    assert len(X) > 0
    assert np.all(burn(X) <= BURN_MAX + 1e-9)                 # the constraint, by hand
    assert np.allclose(X[:, 2], np.round(X[:, 2]))             # passes on the step grid (step = 1)
    if method != "ccd-circumscribed":
        assert np.all((X >= study.spec.lows - 1e-9) & (X <= study.spec.lows + study.spec.spans + 1e-9))
    if method in ("space-filling", "sobol"):
        assert len(X) == runs


@pytest.mark.parametrize("runs", [3, 4, 5, 7, 12, 30])
def test_few_levels_stay_on_step_grid_whatever_the_run_count(tmp_path, runs):
    # no constraints: the Latin hypercube path (strata) must still give settable levels 1..4
    text = SEAM.split("[[constraint]]")[0]
    study = Study.load(seam_dir(tmp_path, text))
    for method in ("space-filling", "sobol"):
        X = study.design(method, runs=runs)[study.spec.factor_names].to_numpy()
        assert set(X[:, 2]) <= {1.0, 2.0, 3.0, 4.0}


def test_classical_design_drops_forbidden_points_and_says_so(tmp_path):
    study = Study.load(seam_dir(tmp_path))
    frame = study.design("full-factorial")
    # 3^3 = 27 points at power 1, 2.5, 4 x speed 5, 12.5, 20 x passes 1, 2(.5 -> 2), 4; by hand,
    # power - 0.1 speed > 2.6 at (2.5, 5) no (2.0), (4, 5) yes (3.5), (4, 12.5) yes (2.75), (4, 20) no (2.0)
    assert len(frame) == 27 - 2 * 3
    assert any("6 of 27 points break" in n for n in frame.attrs["notes"])


# -- window, trade-off, suggestions ----------------------------------------------------------------
def test_window_guard_band_inside_constraint_at_every_corner(fitted):
    from windowfinder.answers.results import build_window

    study, fit = fitted
    win = build_window(study.spec, fit)
    assert win.found
    g = pd.DataFrame(win.factors).set_index("name")
    corners = np.array(list(itertools.product(*[(g.loc[f, "guard_low"], g.loc[f, "guard_high"])
                                                for f in study.spec.factor_names])))
    assert np.all(burn(corners) <= BURN_MAX + 1e-9)
    # window edges of the stepped factor on its grid
    assert float(g.loc["passes", "low"]).is_integer() and float(g.loc["passes", "high"]).is_integer()


def test_window_shrink_when_search_ignores_constraint(fitted):
    # the closed-form guard (used for d > 10, where not all corners are verified) on its own: a box
    # spanning the whole range is shrunk about its centre until every guard corner meets the constraint
    from windowfinder.answers.results import _inside_constraints, guard_band

    study, _ = fitted
    spec = study.spec
    lo, hi = _inside_constraints(spec, spec.lows.copy(), spec.lows + spec.spans)
    glo, ghi = guard_band(spec, lo, hi)
    corners = np.array(list(itertools.product(*zip(glo, ghi))))
    assert np.all(burn(corners) <= BURN_MAX + 1e-9)
    assert np.all(hi > lo)


def test_tradeoff_points_inside_constraint_and_on_grid(fitted):
    from windowfinder.answers.tradeofftable import build_tradeoff

    study, fit = fitted
    tr = build_tradeoff(study.spec, fit, pop_size=40, n_gen=25)
    X = tr.frame[study.spec.factor_names].to_numpy()
    assert tr.found and len(X)
    assert np.all(burn(X) <= BURN_MAX + 1e-9)
    assert np.allclose(X[:, 2], np.round(X[:, 2]))


def test_suggestions_never_in_forbidden_region(fitted):
    study, fit = fitted
    nxt = study.suggest(4, fit=fit)
    X = nxt.frame[study.spec.factor_names].to_numpy()
    assert np.all(burn(X) <= BURN_MAX + 1e-9)
    assert np.allclose(X[:, 2], np.round(X[:, 2]))


def test_forbidden_completed_run_is_never_repeated():
    # a score that is huge only at a completed run: without constraints it is repeated (replicate);
    # when the snap marks that setting forbidden (NaN) it must not be
    run = np.array([[0.9, 0.1]])
    base = np.random.default_rng(0).random((64, 2))

    def score(X):
        return np.where(np.all(np.isclose(X, run), axis=1), 100.0, 0.01)

    x, _, rep = pick(score, base, run, [], 0.05, lambda U: U, np.random.default_rng(1))
    assert rep and np.allclose(x, run[0])

    def snap(U):
        V = np.array(U, dtype=float)
        V[V[:, 0] - V[:, 1] > 0.7] = np.nan   # forbidden: u0 - u1 > 0.7
        return V

    x, _, rep = pick(score, base[snap(base)[:, 0] == snap(base)[:, 0]], run, [], 0.05, snap,
                     np.random.default_rng(1))
    assert not rep and x[0] - x[1] <= 0.7


def test_tradeoff_on_grid_with_linear_constraint_matches_brute_force():
    # ZDT1 (Zitzler, Deb & Thiele 2000, "Comparison of multiobjective evolutionary algorithms",
    # Evol. Comput. 8(2)) from pymoo, two variables on a 0.1 grid, with x1 + x2 <= 0.8. The exact
    # discrete constrained front comes from enumerating all 121 grid points (brute force).
    from pymoo.problems import get_problem
    from pymoo.util.nds.non_dominated_sorting import NonDominatedSorting

    from windowfinder.answers.tradeoff import find_tradeoff

    zdt = get_problem("zdt1", n_var=2)
    A, b = np.array([[1.0, 1.0]]), np.array([0.8])

    def snap(U):
        return np.round(np.asarray(U) * 10) / 10

    res = find_tradeoff(lambda X: zdt.evaluate(X), lambda X: np.ones(len(X)), 2, 0.9, 2, seed=1,
                        pop_size=30, n_gen=12, constraints=(A, b), snap=snap)
    assert np.allclose(res.X * 10, np.round(res.X * 10))            # every point on the grid
    assert np.all(res.X @ A.T <= b + 1e-9)                            # and inside the constraint
    G = np.array(list(itertools.product(np.arange(11) / 10, repeat=2)))
    G = G[G.sum(axis=1) <= 0.8 + 1e-9]
    F = zdt.evaluate(G)
    front = F[NonDominatedSorting().do(F, only_non_dominated_front=True)]
    found = {tuple(np.round(f, 9)) for f in res.F}
    assert found == {tuple(np.round(f, 9)) for f in front}


def test_window_spec_states_each_constraint_margin(fitted, tmp_path):
    from windowfinder.answers.results import build_window
    from windowfinder.export.files import write_window

    study, fit = fitted
    win = build_window(study.spec, fit)
    g = pd.DataFrame(win.factors).set_index("name")
    # smallest margin over the guard band, by hand: 2.6 - (power_high - 0.1 speed_low)
    expect = BURN_MAX - (g.loc["power", "guard_high"] - 0.1 * g.loc["speed", "guard_low"])
    assert win.constraints[0]["smallest_margin"] == pytest.approx(expect, abs=1e-9)
    assert expect >= -1e-9
    md = write_window(tmp_path, win, "seam")[1].read_text()
    assert "no burn-through: 1 power - 0.1 speed <= 2.6" in md


def test_report_names_constraints_and_breaking_runs(fitted, tmp_path):
    import shutil

    from windowfinder.report.sections import Content, data

    study, fit = fitted
    d = tmp_path / "r"
    shutil.copytree(study.dir, d)
    with open(d / "runs.csv", "a") as fh:     # 4 - 0.1 * 6 = 3.4 > 2.6 (by hand): breaks it
        fh.write("R900,4,6,2,1.7,2.5,done,\n")
    html = data(Content(Study.load(d), fit))
    assert "no burn-through: 1 power - 0.1 speed &lt;= 2.6" in html or \
        "no burn-through: 1 power - 0.1 speed <= 2.6" in html
    assert "R900" in html and "never repeat them" in html


def test_cli_design_and_record_with_constraint(tmp_path, capsys):
    d = seam_dir(tmp_path)
    assert main(["design", str(d), "--method", "full-factorial"]) == 0
    out = capsys.readouterr().out
    assert "note: full-factorial: 6 of 27 points break constraint(s) 'no burn-through'" in out
    study = Study.load(d)
    X = study.runs.X()
    assert len(X) == 21 and np.all(burn(X) <= BURN_MAX + 1e-9)
    res = pd.DataFrame({"run": study.runs.frame["run"], **simulate(X)})
    res.to_csv(tmp_path / "results.csv", index=False)
    assert main(["record", str(d), str(tmp_path / "results.csv")]) == 0
    assert "recorded 42 values for 21 runs (0 failed)" in capsys.readouterr().out
    assert (Study.load(d).runs.status == "done").all()


def test_space_filling_batch_skips_forbidden_settings():
    # the fallback batch when the models cannot carry a claim (answers.support) gets the same snap
    from windowfinder.answers.support import space_filling_batch

    def snap(U):
        V = np.round(np.asarray(U, dtype=float) * 4) / 4
        V[V[:, 0] + V[:, 1] > 1.0] = np.nan      # forbidden: u0 + u1 > 1
        return V

    X = space_filling_batch(np.empty((0, 2)), 6, 2, seed=0, snap=snap)
    assert len(X) == 6 and np.all(np.isfinite(X))
    assert np.all(X.sum(axis=1) <= 1.0 + 1e-12) and np.allclose(X * 4, np.round(X * 4))


def test_blocks_with_constraint_every_run_inside_and_labelled(tmp_path):
    study = Study.load(seam_dir(tmp_path))
    frame = study.design("space-filling", runs=12, blocks=3)
    X = frame[study.spec.factor_names].to_numpy()
    assert len(frame) == 12 and np.all(burn(X) <= BURN_MAX + 1e-9)
    assert sorted(frame["block"].value_counts().tolist()) == [4, 4, 4]
