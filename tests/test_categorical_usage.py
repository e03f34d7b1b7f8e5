"""Using a study with a categorical factor as a new user does: options, messages, tables, the API.

The toy study (ours, for these checks only) has two numeric factors and a two-level categorical one;
its single response is linear with a closed-form truth, ``y = a + b + 4 [resin = beta]``, max 12.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from windowfinder.cli import main
from windowfinder.study import Study

STUDY = """\
[study]
name = "resin toy"
seed = 5
confidence = 0.9

[[factor]]
name = "resin"
levels = ["alpha", "beta"]

[[factor]]
name = "a"
unit = "degC"
low = 0.0
high = 10.0
step = 0.5
tolerance = 0.5

[[factor]]
name = "b"
unit = "bar"
low = 0.0
high = 10.0
step = 0.5

[[response]]
name = "y"
unit = "mm"
goal = "minimize"
max = 12.0
model = "linear"
"""

EFFECT = 4.0


def truth(a, b, resin):
    return np.asarray(a, float) + np.asarray(b, float) + EFFECT * (np.asarray(resin) == "beta")


def make_study(folder, text=STUDY, runs=24, noise=0.05, response="y", respond=None):
    """A study folder with ``runs`` space-filling runs of ``respond(frame)`` (default :func:`truth`)
    plus seeded normal noise of sd ``noise`` in column ``response``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "study.toml").write_text(text)
    st = Study.load(folder)
    frame = st.design("space-filling", runs=runs)
    rng = np.random.default_rng(2)
    value = truth(frame["a"], frame["b"], frame["resin"]) if respond is None else respond(frame)
    frame[response] = value + noise * rng.standard_normal(len(frame))
    frame["status"] = "done"
    st.add_runs(frame)
    return folder


@pytest.fixture(scope="module")
def toy(tmp_path_factory):
    return make_study(tmp_path_factory.mktemp("toy") / "s")


def _cli(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


# ------------------------------------------------------------------- window: a level given twice
def test_set_point_level_and_level_option_that_disagree_are_refused(toy, capsys):
    out = toy / "out" / "window.json"
    before = out.read_bytes() if out.exists() else None
    code, _, err = _cli(["window", toy, "--set-point", "a=3", "b=3", "resin=alpha", "--level", "resin=beta"],
                        capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "resin=alpha" in err and "resin=beta" in err and "Traceback" not in err
    assert (out.read_bytes() if out.exists() else None) == before            # nothing written
    code, _, err = _cli(["window", toy, "--level", "resin=alpha", "resin=beta"], capsys)
    assert code == 2 and "disagree" in err and len(err.strip().splitlines()) == 1
    # the same level both ways is fine: the window holds at beta, where a + b <= 12 - 4 (closed form)
    code, _, _ = _cli(["window", toy, "--set-point", "a=2", "b=2", "resin=beta", "--level", "resin=beta"],
                      capsys)
    win = json.loads(out.read_text())
    assert code == 0 and win["found"]
    f = {x["name"]: x for x in win["factors"]}
    assert f["resin"]["levels"] == ["beta"]
    assert f["a"]["guard_high"] + f["b"]["guard_high"] <= 12.0 - EFFECT + 1e-9


def test_level_usage_hint_uses_this_studys_names(toy, capsys):
    code, _, err = _cli(["window", toy, "--level", "resin"], capsys)
    assert code == 2 and "e.g. resin=beta" in err and "gas" not in err


# ---------------------------------------------------------------- report: log axes, window table
def _one_two_five(lo, hi):
    """1, 2 and 5 times the powers of ten inside [lo, hi] (the usual log-axis tick series)."""
    vals = [m * 10.0 ** k for k in range(-3, 6) for m in (1, 2, 5)]
    return sorted(v for v in vals if lo <= v <= hi)


def test_log_axis_tick_labels_are_plain_numbers():
    import matplotlib

    from windowfinder.inputs.spec import Response
    from windowfinder.models.gp import GPModel
    from windowfinder.report import loo_figure

    X = np.linspace(0.0, 1.0, 14)[:, None]
    y = 3.0 * np.exp(3.0 * X[:, 0]) * np.exp(0.05 * np.random.default_rng(1).standard_normal(14))
    model = GPModel(transform="log", n_restarts=1, random_state=0).fit(X, y)
    voc = Response(name="voc", unit="ppm", goal="none", max=25.0, transform="log")
    with matplotlib.rc_context({"text.parse_math": False}):   # as the report draws
        fig = loo_figure(model, y, response=voc)
        fig.canvas.draw()
        ax = fig.axes[0]
        assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
        for k, axis, (lo, hi) in ((0, ax.xaxis, ax.get_xlim()), (1, ax.yaxis, ax.get_ylim())):
            lo, hi = min(lo, hi), max(lo, hi)
            shown = [t.get_text() for t in axis.get_ticklabels(which="both")
                     if t.get_text() and lo <= t.get_position()[k] <= hi]   # the labels drawn
            assert shown and not any("$" in s for s in shown)
            # plain numbers at the 1-2-5 ticks inside the axis range, no minor-tick labels
            assert sorted(float(s) for s in shown) == pytest.approx(_one_two_five(lo, hi))


def test_report_window_table_gives_a_categorical_factor_its_own_cells(toy):
    from windowfinder.answers.results import build_window
    from windowfinder.report import tables
    from windowfinder.report.page import html_table

    st = Study.load(toy)
    win = build_window(st.spec, st.fit(), levels={"resin": "beta"})
    assert win.found
    frame = tables.window_frame(win).set_index("factor")
    assert list(frame.columns) == ["levels", "low", "high", "unit", "tolerance (±)", "guard band"]
    assert frame.loc["resin", "levels"] == "beta"
    assert frame.loc["resin", ["low", "high", "tolerance (±)", "guard band"]].isna().all()
    a = next(f for f in win.factors if f["name"] == "a")
    assert (frame.loc["a", "low"], frame.loc["a", "high"], frame.loc["a", "tolerance (±)"]) == \
        (a["low"], a["high"], 0.5)
    # at beta the box must satisfy a + b <= 12 - 4 at its upper corner (closed-form truth)
    assert frame.loc["a", "high"] + frame.loc["b", "high"] <= 12.0 - EFFECT + 1e-9
    page = html_table(tables.window_frame(win))
    row = page[page.index("<td>resin</td>"):].split("</tr>")[0]
    assert "<td>beta</td>" in row and "levels:" not in row and ">0<" not in row and ">0.0<" not in row
    # a study without categorical factors has no levels column
    plain = tables.factor_frame([f for f in win.factors if "levels" not in f])
    assert "levels" not in plain.columns


# ------------------------------------------------------------- campaign: one window figure, one unit
def toy_evaluate(settings):
    """The toy's truth plus noise (sd 0.05), seeded by the setting: a simulator for the closed loop."""
    rng = np.random.default_rng(int(1000 * settings["a"] + 10 * settings["b"]))
    return {"y": float(truth(settings["a"], settings["b"], settings["resin"]) + 0.05 * rng.standard_normal())}


def test_campaign_progress_volume_is_the_window_of_the_same_runs_in_percent(tmp_path):
    from windowfinder.answers.results import build_window
    from windowfinder.answers.window import volume_text
    from windowfinder.campaign.loop import run_campaign
    from windowfinder.campaign.progress import ModelProgress

    d = make_study(tmp_path / "s", runs=12)
    tracker, lines = ModelProgress(), []
    run_campaign(d, function=toy_evaluate, budget=16, batch=2, workers=1, propose=tracker.propose,
                 metrics=tracker.metrics(), progress=lines.append)
    st = Study.load(d)
    assert len(st.runs.completed()) == 16 and len(tracker.fit_.X_runs) == 16   # not one batch behind
    win = build_window(st.spec, st.fit())                                   # what `window` says
    assert win.found
    last = [ln for ln in lines if ln.startswith("16/16 runs done")][-1]
    shown = volume_text(win.volume_share).replace(" of the studied factor space", "")
    assert f"window volume {shown}," in last and shown.endswith(" %")


# ------------------------------------------------------------ next runs: no accidental repeats
CONSTRAINED = STUDY + """
[[constraint]]
name = "a plus b"
terms = { a = 1.0, b = 1.0 }
max = 16.0
"""


def test_campaign_top_up_adds_a_new_space_filling_run_not_a_repeat(tmp_path):
    from scipy.spatial.distance import cdist

    from windowfinder.campaign.loop import run_campaign

    d = make_study(tmp_path / "s", text=CONSTRAINED, runs=12)
    run_campaign(d, function=toy_evaluate, budget=13, initial=13, batch=1, workers=1, progress=lambda s: None)
    st = Study.load(d)
    frame = st.runs.frame
    assert len(frame) == 13 and frame["note"].iloc[-1] == "design space-filling (added)"
    U = st.runs.X_coded(frame)
    old, new = U[:12], U[12:]
    # brute force over every allowed setting (0.5 steps, both levels, a + b <= 16): the farthest one
    # from the 12 runs; greedy maximin on 2048 Sobol candidates must come close to it
    g = np.arange(0.0, 10.01, 0.5)
    A, B, R = (x.ravel() for x in np.meshgrid(g, g, [0.0, 1.0]))
    ok = A + B <= 16.0
    grid = np.column_stack([R[ok], A[ok] / 10.0, B[ok] / 10.0])   # coded: resin index, a, b
    best = cdist(grid, old).min(axis=1).max()
    got = cdist(new, old).min()
    assert got >= 0.8 * best and got > 0.1       # was 0: the top-up repeated a run of the start design


class NoisyStub:
    """Linear mean, constant model sd and run-to-run noise sd (identity transform): a GP stand-in."""

    def __init__(self, coef, sd, noise, d=1):
        self.coef, self.sd, self.noise_std_ = np.asarray(coef, float), float(sd), float(noise)
        self.X_train_ = np.zeros((1, d))
        from windowfinder.models.transform import Transform

        self.transform_ = Transform("none")

    def predict(self, X, return_std=True, noise=False):
        mean = np.asarray(X, float) @ self.coef
        sd = np.hypot(self.sd, self.noise_std_) if noise else self.sd
        return (mean, np.full(len(mean), sd)) if return_std else mean


def test_tradeoff_score_ignores_a_setting_that_cannot_reach_the_confidence():
    from scipy.stats import norm

    from windowfinder.models.surrogates import Surrogates
    from windowfinder.nextruns.acquisition import Acquisition

    # g = x minimised (model sd 0.02); limit y >= 0.3 with y = x, model sd 1e-4, noise sd 0.2:
    # a new run meets it with P = Phi((x - 0.3) / 0.2) (scipy.stats.norm), >= 0.95 for x >= 0.629
    models = {"g": NoisyStub([1.0], 0.02, 0.0), "y": NoisyStub([1.0], 1e-4, 0.2)}
    X_runs = np.array([[0.5], [0.7], [0.9], [1.0]])
    acq = Acquisition(Surrogates(models), [("y", 0.3, None)], [("g", "minimize", None)], X_runs, 0.95)
    assert acq.front_[:, 0] == pytest.approx([0.7, 0.9, 1.0])            # runs with P >= 0.95
    x_out, x_in = np.array([[0.5]]), np.array([[0.65]])
    assert acq.p_joint(x_out)[0] == pytest.approx(norm.cdf(1.0), abs=1e-4)   # 0.84: never reaches 0.95
    # x = 0.5 would improve the front a lot but is not in the window however often it is run: score 0
    assert acq.tradeoff(x_out)[0] == 0.0
    # x = 0.65 is in the window (P = 0.96 for the mean, model sd 1e-4): the plain expected improvement
    # of a minimised goal over the front's best 0.7, E[max(0, 0.7 - G)], G ~ N(0.65, 0.02^2), closed form
    z = (0.7 - 0.65) / 0.02
    exact = (0.7 - 0.65) * norm.cdf(z) + 0.02 * norm.pdf(z)
    assert acq.tradeoff(x_in)[0] == pytest.approx(exact, rel=0.05)


def test_a_proposed_replicate_names_the_run_it_repeats(toy):
    from windowfinder.study import NextRuns

    st = Study.load(toy)
    made = st.runs.frame.iloc[[3, 7]]
    frame = st.spec.labelled(made[["resin", "a", "b"]].reset_index(drop=True))
    frame.insert(0, "run", ["R901", "R902"])
    frame["aim"] = ["tradeoff", "window"]
    frame.loc[1, "a"] = frame.loc[1, "a"] + 0.5            # the second row is a new setting
    frame["repeats"] = st._repeats(frame, [True, False])
    assert list(frame["repeats"]) == [made["run"].iloc[0], ""]
    notes = NextRuns(frame, "", "").planned_rows(st.spec)["note"].tolist()
    assert notes == [f"suggested (tradeoff), replicate of {made['run'].iloc[0]}", "suggested (window)"]


# ------------------------------------------------------------------------ API: P at any settings
def test_study_probability_matches_the_internal_computation_and_least_squares_by_hand(toy):
    from scipy.stats import t as t_dist

    from windowfinder.answers.results import feasibility_of
    from windowfinder.errors import InputError

    st = Study.load(toy)
    fit = st.fit()
    ask = pd.DataFrame({"resin": ["alpha", "beta", "beta", "alpha"], "a": [3.0, 3.0, 4.0, 9.5],
                        "b": [4.0, 4.0, 3.5, 9.0]})
    got = st.probability(ask, fit=fit)
    assert list(got.columns) == ["resin", "a", "b", "p_y", "p_all_limits", "p_works", "p_joint", "allowed"]
    assert list(got["resin"]) == list(ask["resin"])
    # the internal computation on coded inputs
    U = st.spec.to_coded(st.spec.level_indices(ask)[["resin", "a", "b"]].to_numpy(float))
    _, joint = feasibility_of(st.spec, fit).probabilities(U)
    np.testing.assert_allclose(got["p_joint"], joint, rtol=1e-12)
    # closed form: ordinary least squares on [1, a, b, beta] and the Student-t prediction interval of a
    # new observation, P(Y <= 12) = T_{n-p}((12 - yhat) / (s sqrt(1 + x (X'X)^-1 x')))
    # (Montgomery, Peck & Vining 2012, Introduction to Linear Regression Analysis, 5th ed., §3.5)
    runs = st.runs.done()
    Z = np.column_stack([np.ones(len(runs)), runs["a"], runs["b"], runs["resin"] == 1.0]).astype(float)
    beta, *_ = np.linalg.lstsq(Z, runs["y"].to_numpy(float), rcond=None)
    n, p = Z.shape
    s2 = np.sum((runs["y"].to_numpy(float) - Z @ beta) ** 2) / (n - p)
    Xq = np.column_stack([np.ones(4), ask["a"], ask["b"], ask["resin"] == "beta"]).astype(float)
    sd = np.sqrt(s2 * (1 + np.einsum("ij,jk,ik->i", Xq, np.linalg.inv(Z.T @ Z), Xq)))
    expect = t_dist.cdf((12.0 - Xq @ beta) / sd, n - p)
    np.testing.assert_allclose(got["p_y"], expect, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(got["p_all_limits"], got["p_y"])
    assert (got["p_works"] == 1.0).all() and got["allowed"].all()
    # the truth says: alpha 3 + 4 = 7 <= 12 comfortably; beta 3 + 4 + 4 = 11 near the limit; 9.5 + 9 no
    assert got["p_y"][0] > 0.999 and got["p_y"][3] < 1e-3
    with pytest.raises(InputError, match="no column for factor"):
        st.probability(ask[["a", "b"]], fit=fit)
    with pytest.raises(InputError, match="not a level"):
        st.probability(ask.assign(resin="gamma"), fit=fit)


def test_new_template_shows_a_commented_constraint_that_works_when_uncommented(tmp_path):
    import re

    from windowfinder.inputs.spec import StudySpec
    from windowfinder.template import create_study

    path = create_study(tmp_path / "t")
    text = path.read_text()
    assert "# [[constraint]]" in text and len(StudySpec.from_toml(path).constraints) == 0
    block = text[text.index("# [[constraint]]"):].split("\n\n")[0]
    path.write_text(text.replace(block, re.sub(r"^# ?", "", block, flags=re.M)))
    spec = StudySpec.from_toml(path)
    assert len(spec.constraints) == 1
    # by hand: temperature + 0.2 time <= 110 holds at (40, 30): 46, breaks at (90, 180): 126
    U = spec.to_coded(np.array([[40.0, 30.0], [90.0, 180.0]]))
    assert list(spec.linear.feasible(U)) == [True, False]


# ------------------------------------------------------------- messages in the user's own terms
def test_design_size_messages_count_numeric_factors_per_level_and_in_all(tmp_path, capsys):
    d = tmp_path / "s"
    d.mkdir()
    (d / "study.toml").write_text(STUDY)
    # a 3^2 full factorial (Montgomery 2013, Design and Analysis of Experiments, 8th ed., §9.2) per level
    code, _, err = _cli(["design", d, "--method", "full-factorial", "--runs", "8"], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "2 numeric factors has 9 runs per level combination of resin, 18 in all" in err
    code, _, err = _cli(["design", d, "--method", "box-behnken"], capsys)   # needs 3 or more factors
    assert code == 2 and "numeric factors, the study has 2 (besides the categorical resin)" in err
    assert not (d / "runs.csv").exists()
    code, _, _ = _cli(["design", d, "--method", "full-factorial", "--runs", "18"], capsys)
    assert code == 0 and len(Study.load(d).runs.frame) == 18


def _planned_copy(tmp_path, toy):
    import shutil

    d = tmp_path / "c"
    shutil.copytree(toy, d)
    st = Study.load(d)
    frame = st.design("space-filling", runs=2)
    st.add_runs(frame)
    return d, frame


def test_level_names_with_wrong_case_or_spaces_are_refused_with_the_fix(tmp_path, toy, capsys):
    d, planned = _planned_copy(tmp_path, toy)
    run, level = planned["run"].iloc[0], planned["resin"].iloc[0]
    other = {"alpha": "beta", "beta": "alpha"}[level]
    before = (d / "runs.csv").read_bytes()
    for cell, needle in ((level.capitalize(), f"case-sensitive: write '{level}'"),
                         (f" {level}", f"space before or after the level name; write '{level}'"),
                         (other, f"differs from the planned '{level}'")):
        (d / "r.csv").write_text(f"run,resin,y\n{run},{cell},5.0\n")
        code, _, err = _cli(["record", d, d / "r.csv"], capsys)
        assert code == 2 and needle in err and len(err.strip().splitlines()) == 1, err
        assert (d / "runs.csv").read_bytes() == before                           # nothing written
    # a runs.csv cell " beta" is refused like a name with a leading space (names policy)
    text = before.decode().splitlines()
    row = next(i for i, ln in enumerate(text) if ln.startswith(f"{run},"))
    text[row] = text[row].replace(f",{level},", f", {level},", 1)
    (d / "runs.csv").write_text("\n".join(text) + "\n")
    code, _, err = _cli(["check", d], capsys)
    assert code == 2 and "space before or after the level name" in err and len(err.strip().splitlines()) == 1


def test_fit_shows_a_categorical_length_scale_as_the_correlation_between_levels(tmp_path, capsys):
    text = STUDY.replace('model = "linear"', 'model = "gp"')
    d = make_study(tmp_path / "g", text=text, runs=16)
    code, out, _ = _cli(["fit", d], capsys)
    assert code == 0
    st = Study.load(d)
    model = st.fit().surrogates.models["y"]
    l_z = model.length_scales_[st.spec.factor_names.index("resin")]
    # Matern 5/2 at r = 1 / l_z (Rasmussen & Williams 2006, eq. 4.17): (1 + s + s^2 / 3) exp(-s), s = sqrt(5) r
    s = np.sqrt(5.0) / l_z
    tau = (1 + s + s * s / 3) * np.exp(-s)
    row = next(ln for ln in out.splitlines() if ln.startswith("y "))
    assert f"resin: levels correlate {tau:.2f}" in row and "resin=" not in row
