"""Using a study with a categorical factor as a new user does: options, messages, tables, the API.

The toy study (ours, for these checks only) has two numeric factors and a two-level categorical one;
its single response is linear with a closed-form truth, ``y = a + b + 4 [resin = beta]``, max 12.
"""

from __future__ import annotations

import json

import numpy as np
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


def make_study(folder, text=STUDY, runs=24, noise=0.05):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "study.toml").write_text(text)
    st = Study.load(folder)
    frame = st.design("space-filling", runs=runs)
    rng = np.random.default_rng(2)
    frame["y"] = truth(frame["a"], frame["b"], frame["resin"]) + noise * rng.standard_normal(len(frame))
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
    from windowfinder.campaign.loop import ModelProgress, run_campaign

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
