"""The HTML report (windowfinder.report): structure, self-containment, escaping, figures, a real browser.

The study is the bundled reactor case (16 space-filling runs on its simulator) plus two replicate
runs, one failed run and one run outside the bounds; the study name and a note carry a script tag.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from matplotlib.contour import ContourSet
from matplotlib.patches import Rectangle
from scipy.stats import norm
from scipy.stats import t as t_dist

from windowfinder.answers import build_tradeoff, build_window
from windowfinder.cases import case_dir, load_simulator
from windowfinder.models.diagnostics import ModelDiagnostics
from windowfinder.errors import InputError
from windowfinder.export import write_window
from windowfinder.answers.influence import sobol_indices
from windowfinder.report import (SECTION_IDS, influence_figure, loo_figure, map_figure,
                                 probability_map_figure, slice_centre, slice_grid, tradeoff_figure,
                                 write_report)
from windowfinder.report import tables
from windowfinder.report.sections import verdict
from windowfinder.inputs.spec import StudySpec
from windowfinder.study import Study

EVIL = "<script>alert(1)</script>"
EVIL_ID = '<img src="http://example.invalid/x.png">'
CHROMIUM = Path("/usr/bin/chromium")


class Page(HTMLParser):
    """Collects tags, attributes, section ids, texts and tables (with the section and h3 above them)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.sections, self.text = [], [], [], []
        self.tables, self._cell, self._row, self._h3 = [], None, None, False
        self.section, self.h3 = None, ""

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.attrs.append((tag, a))
        if tag == "section":
            self.section = a.get("id")
            self.sections.append(a.get("id"))
            self.h3 = ""
        elif tag == "h3":
            self._h3, self.h3 = True, ""
        elif tag == "table":
            self.tables.append({"section": self.section, "h3": self.h3, "rows": []})
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = ""

    def handle_endtag(self, tag):
        if tag == "h3":
            self._h3 = False
        elif tag in ("td", "th") and self._row is not None:
            self._row.append(self._cell)
            self._cell = None
        elif tag == "tr" and self.tables:
            self.tables[-1]["rows"].append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell += data
        if self._h3:
            self.h3 += data

    def table(self, section, h3=None, index=0):
        found = [t for t in self.tables if t["section"] == section and (h3 is None or h3 in t["h3"])]
        return found[index]["rows"] if len(found) > index else None


def _make_study(root: Path) -> Study:
    """Reactor case, 16 space-filling runs + 2 replicates + 1 failed + 1 outside the bounds."""
    folder = root / "study"
    folder.mkdir()
    toml = (case_dir("reactor") / "study.toml").read_text()
    toml = re.sub(r'(?m)^name = "Batch reactor[^"]*"', f'name = "{EVIL}"', toml, count=1)
    # one failed run in twenty caps P(process works), hence the joint probability, near 0.9; at 0.8 the
    # region that holds is narrower than one temperature step (no window), at 0.7 a window is found
    toml = re.sub(r"(?m)^confidence = 0\.95", "confidence = 0.7", toml, count=1)
    (folder / "study.toml").write_text(toml)
    study = Study.load(folder)
    sim = load_simulator("reactor")
    frame = study.design("space-filling", runs=16, seed=5)
    extra = pd.DataFrame([{**frame.iloc[0].to_dict(), "run": "R017"},
                          {**frame.iloc[1].to_dict(), "run": "R018"},
                          {**frame.iloc[2].to_dict(), "run": "R019", "temperature": 108.0, "time": 230.0},
                          {**frame.iloc[3].to_dict(), "run": "R020", "temperature": 112.0}])
    frame = pd.concat([frame, extra], ignore_index=True)
    rows = []
    for i, rec in enumerate(frame.to_dict("records")):
        if rec["run"] == "R019":
            rec.update(status="failed", note=EVIL)
        else:
            rec.update(sim.evaluate({f: rec[f] for f in study.spec.factor_names}, seed=100 + i),
                       status="done", note="simulated")
        rows.append(rec)
    study.add_runs(pd.DataFrame(rows))
    return Study.load(folder)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    study = _make_study(tmp_path_factory.mktemp("report"))
    fit = study.fit(n_restarts=1)
    window = build_window(study.spec, fit)
    write_window(study.out, window, study.spec.name)
    tradeoff = build_tradeoff(study.spec, fit, pop_size=24, n_gen=12)
    spec = study.spec
    suggestions = pd.DataFrame({"run": ["N001", EVIL_ID],
                                **{f.name: [f.low + 0.3 * f.span, f.low + 0.7 * f.span]
                                   for f in spec.factors},
                                "aim": ["window", "tradeoff"]})
    path = write_report(study, fit, window, tradeoff, suggestions, influence_n=128)
    raw = path.read_text(encoding="utf-8")
    page = Page()
    page.feed(raw)
    return SimpleNamespace(study=study, fit=fit, window=window, tradeoff=tradeoff, suggestions=suggestions,
                           path=path, raw=raw, page=page)


# ------------------------------------------------------------------------------------------ the page
def test_written_atomically_to_out(built):
    assert built.path == built.study.out / "report.html"
    assert not [p for p in built.study.out.iterdir() if p.name.endswith(".tmp")]
    assert built.raw.startswith("<!DOCTYPE html>")


def test_sections_present_in_order(built):
    # the section order the report issue asks for
    assert [s for s in built.page.sections if s in SECTION_IDS] == list(SECTION_IDS)


def test_no_external_references(built):
    # self-contained: only data: URIs (RFC 2397, Masinter 1998) and in-page anchors; no scripts,
    # style sheets, frames or fonts fetched from anywhere
    for tag, attrs in built.page.attrs:
        for key in set(attrs) & {"src", "href", "srcset", "data", "action", "poster", "background"}:
            v = (attrs[key] or "").strip().lower()
            assert not v.startswith(("http:", "https:", "//", "file:", "ftp:")), (tag, key, v)
            if key == "src":
                assert v.startswith("data:image/png;base64,")
            if key == "href":
                assert v.startswith("#")
    assert not {"script", "link", "iframe", "object", "embed", "base"} & set(built.page.tags)
    rest = built.raw.replace(html.escape(EVIL_ID), "")    # the one URL is a run id shown as text
    assert "://" not in rest and "url(" not in rest and "@import" not in rest


def test_every_image_has_alt_text(built):
    # WHATWG HTML Living Standard §4.8.4.4: an image that conveys information needs a text alternative
    imgs = [a for t, a in built.page.attrs if t == "img"]
    assert len(imgs) >= 6
    assert all((a.get("alt") or "").strip() for a in imgs)


def test_user_strings_are_escaped(built):
    # OWASP XSS Prevention Cheat Sheet, rule 1: HTML-escape untrusted data placed in element content
    assert "script" not in built.page.tags
    assert EVIL not in built.raw and EVIL_ID not in built.raw
    assert built.raw.count("&lt;script&gt;alert(1)&lt;/script&gt;") >= 3   # title, header, note
    text = "".join(built.page.text)
    assert EVIL in text and EVIL_ID in text                                 # shown as text, not markup
    assert all(not (a.get("src") or "").startswith("http") for t, a in built.page.attrs if t == "img")


def test_safety_caution_comes_first(built):
    # DESIGN.md "Cautions": a safety limit is involved (adiabatic_rise), so the caution leads the page
    raw = built.raw
    first = raw.index('class="caution"')
    assert first < raw.index("<table") and first < raw.index("<figure")
    caution = raw[first:raw.index("</div>", first)]
    for words in ("not a safety assessment", "hazard review", "verification runs at scale",
                  "local codes", "qualified, licensed engineer"):
        assert words in caution


def test_window_and_limit_tables_match_the_window(built):
    rows = built.page.table("summary")
    assert rows[0][:4] == ["factor", "low", "high", "unit"]
    for row, f in zip(rows[1:], built.window.factors):
        assert row[0] == f["name"] and float(row[1]) == pytest.approx(f["low"], rel=1e-3)
        assert float(row[2]) == pytest.approx(f["high"], rel=1e-3) and row[3] == f["unit"]
    assert f"{built.window.min_probability:.3f}" in built.raw


def test_data_section_lists_failed_outside_and_replicates(built):
    page = built.page
    failed = page.table("data", "Failed runs")
    assert [r[0] for r in failed[1:]] == ["R019"]
    outside = page.table("data", "outside the study bounds")
    assert [r[0] for r in outside[1:]] == ["R020"]
    groups = page.table("data", "Replicates")
    assert sorted(r[0] for r in groups[1:]) == sorted([f"{a}, {b}" for a, b in (("R001", "R017"),
                                                                                ("R002", "R018"))])


def test_pooled_sd_of_duplicates(built):
    # Montgomery, Design and Analysis of Experiments (2013), §2.4.1: pooled variance
    # sum (n_g - 1) s_g^2 / sum (n_g - 1); for k duplicate pairs this is sum d_i^2 / (2 k)
    frame = built.study.runs.frame.set_index("run")
    _, pooled = tables.replicates(built.study.runs.frame, built.study.spec, built.fit.diagnostics)
    for r in built.study.spec.response_names:
        d = np.array([frame.loc["R001", r] - frame.loc["R017", r],
                      frame.loc["R002", r] - frame.loc["R018", r]])
        row = pooled.set_index("response").loc[r]
        assert row["pooled sd"] == pytest.approx(np.sqrt(np.sum(d ** 2) / 4), rel=1e-12)
        assert row["degrees of freedom"] == 2
        shown = {c[0]: c for c in built.page.table("data", "Replicates", index=1)[1:]}
        assert shown[r][2] == f"{row['pooled sd']:.4g}"


def test_next_runs_section_shows_suggestions(built):
    rows = built.page.table("next-runs")
    assert [r[0] for r in rows[1:]] == ["N001", EVIL_ID]


def test_limit_status_wording():
    # definitions of the status column, checked on hand-made predicted ranges
    spec = StudySpec.from_dict({"factor": [{"name": "x", "low": 0.0, "high": 1.0}],
                                "response": [{"name": "a", "max": 10.0}, {"name": "b", "min": 1.0},
                                             {"name": "c", "min": 0.0, "max": 5.0}]})
    pred = [{"response": "a", "low": 2.0, "high": 8.0, "pi95_low": 1.0, "pi95_high": 9.5},
            {"response": "b", "low": 1.5, "high": 3.0, "pi95_low": 0.5, "pi95_high": 4.0},
            {"response": "c", "low": -0.5, "high": 4.0, "pi95_low": -1.0, "pi95_high": 4.5}]
    st = tables.limit_status(spec, SimpleNamespace(found=True, predicted=pred))
    assert st["status"].tolist() == ["all 95 % intervals inside", "predictions inside, intervals cross",
                                     "some predictions outside"]
    assert (tables.limit_status(spec, None)["status"] == "no window").all()


def test_model_verdicts():
    # thresholds of windowfinder.models.diagnostics (Q2 < 0.5; coverage < 80 % with >= 10 runs): common
    # practice, no source
    def diag(q2, cov, n=12):
        return ModelDiagnostics("y", "gp", n, q2, 1.0, cov)

    assert verdict(diag(0.3, 0.95))[1] and "Do not trust" in verdict(diag(0.3, 0.95))[0]
    assert verdict(diag(0.9, 0.6))[1] and "too narrow" in verdict(diag(0.9, 0.6))[0]
    assert not verdict(diag(0.9, 0.6, n=8))[1]
    assert not verdict(diag(0.9, 0.95))[1]


# ------------------------------------------------------------------------------------------ figures
def _contours(ax):
    return [c for c in ax.collections if isinstance(c, ContourSet)]


def test_map_window_box_and_limit_lines_at_exported_values(built):
    spec = built.study.spec
    exported = json.loads((built.study.out / "window.json").read_text())["factors"]
    runs = built.study.runs.completed()
    for pair, resp in zip(((0, 1), (0, 2), (1, 2)), ("adiabatic_rise", "yield_B", "impurity_C")):
        fig = map_figure(spec, built.fit, built.window, pair, resp, runs, built.suggestions)
        ax = fig.axes[0]
        assert len(_contours(ax)) >= 2                       # filled map + limit line
        lim = [c for c in _contours(ax) if c.get_gid() == "limit"]
        r = spec.response(resp)
        assert len(lim) == 1 and list(lim[0].levels) == [v for v in (r.min, r.max) if v is not None]
        box = [p for p in ax.patches if isinstance(p, Rectangle) and p.get_gid() == "window"]
        assert len(box) == 1
        fi, fj = exported[pair[0]], exported[pair[1]]
        (x, y), w, h = box[0].get_xy(), box[0].get_width(), box[0].get_height()
        assert (x, y) == pytest.approx((fi["low"], fj["low"]), rel=1e-9)
        assert (w, h) == pytest.approx((fi["high"] - fi["low"], fj["high"] - fj["low"]), rel=1e-9)
        guard = [p for p in ax.patches if p.get_gid() == "guard band"]
        assert guard[0].get_x() == pytest.approx(fi["guard_low"], rel=1e-9)
    # runs as distinct markers at their natural settings
    lines = {ln.get_gid(): ln for ln in fig.axes[0].lines if ln.get_gid()}
    done = runs[runs["status"] == "done"]
    np.testing.assert_allclose(lines["done runs"].get_xdata(), done["time"])
    failed = runs[runs["status"] == "failed"]
    np.testing.assert_allclose(lines["failed runs"].get_xdata(), failed["time"])
    np.testing.assert_allclose(lines["failed runs"].get_ydata(), failed["catalyst"])
    np.testing.assert_allclose(lines["suggested runs"].get_xdata(), built.suggestions["time"])
    assert len({lines[k].get_marker() for k in ("done runs", "failed runs", "suggested runs")}) == 3


def test_probability_map_values_hatching_and_confidence_line(built):
    spec, fit, win = built.study.spec, built.fit, built.window
    grid = slice_grid(spec, fit, (0, 1), slice_centre(spec, win), m=25, confidence=win.confidence)
    fig = probability_map_figure(spec, fit, win, (0, 1), grid=grid)
    sets = {c.get_gid(): c for c in _contours(fig.axes[0]) if c.get_gid()}
    assert list(sets["confidence"].levels) == [win.confidence]
    assert (grid.fmap.klass == "uncertain").any() and sets["uncertain"].hatches == ["////"]
    if grid.fmap.untrusted.any():
        assert sets["untrusted"].hatches == ["xx"]
    # the mapped probability is the product of normal probabilities of each limit (new-run predictive
    # sd) times P(works): P(lo <= Y <= hi) = Phi((hi - mu)/sd) - Phi((lo - mu)/sd), scipy.stats.norm;
    # Student t with n - p dof for a least-squares polynomial (Montgomery 2013, §10.6), scipy.stats.t
    U = grid.U[::37]
    p = fit.surrogates.failure.predict_proba(U)
    for r in spec.limited:
        m = fit.surrogates.models[r.name]
        mu, sd = m.predict(U, return_std=True, noise=True)
        lo = -np.inf if r.min is None else m.transform_.forward(np.array([r.min]))[0]
        hi = np.inf if r.max is None else m.transform_.forward(np.array([r.max]))[0]
        dist = norm if getattr(m, "dof_", None) is None else t_dist(m.dof_)
        p = p * (dist.cdf((hi - mu) / sd) - dist.cdf((lo - mu) / sd))
    np.testing.assert_allclose(grid.fmap.p_joint[::37], p, rtol=1e-6, atol=1e-9)


def test_loo_figure_plots_every_run(built):
    d = built.fit.diagnostics[0]
    fig = loo_figure(d, response=built.study.spec.response(d.response))
    ax = fig.axes[0]
    xs = np.concatenate([c.get_children()[0].get_xdata() for c in ax.containers])
    assert sorted(xs) == pytest.approx(sorted(d.measured))
    # the same figure straight from the model (closed-form LOO recomputed)
    m = built.fit.surrogates.models[d.response]
    fig2 = loo_figure(m, np.asarray(d.measured), d.response, unit="%")
    ys = np.concatenate([c.get_children()[0].get_ydata() for c in fig2.axes[0].containers])
    assert sorted(ys) == pytest.approx(sorted(d.loo_median))


def test_tradeoff_figure_marks_the_pick(built):
    spec, tr = built.study.spec, built.tradeoff
    fig = tradeoff_figure(spec, tr)
    star = [ln for ln in fig.axes[0].lines if ln.get_gid() == "balanced pick"]
    pick = tr.pick
    assert star[0].get_xdata()[0] == pytest.approx(pick["yield_B_pred"])
    assert star[0].get_ydata()[0] == pytest.approx(pick["impurity_C_pred"])


def test_parallel_coordinates_for_three_goals():
    # scaling of each axis to the front's range with "better" up: (v - min) / (max - min) on -v for
    # a minimised goal and on -|v - target| for a target (definition of the drawing)
    spec = StudySpec.from_dict({"factor": [{"name": "x", "low": 0.0, "high": 1.0}],
                                "response": [{"name": "a", "goal": "maximize"},
                                             {"name": "b", "goal": "minimize"},
                                             {"name": "c", "goal": "target", "target": 5.0}]})
    vals = {"a": [1.0, 2.0, 3.0], "b": [10.0, 20.0, 40.0], "c": [5.0, 7.0, 4.0]}
    frame = pd.DataFrame({"x": [0.1, 0.5, 0.9]})
    for k, v in vals.items():
        frame[f"{k}_pred"], frame[f"{k}_lo95"], frame[f"{k}_hi95"] = v, np.array(v) - 1, np.array(v) + 1
    frame["p_all_limits"], frame["balanced_pick"] = [0.99, 0.97, 0.96], [False, True, False]
    fig = tradeoff_figure(spec, SimpleNamespace(frame=frame))
    line = [ln for ln in fig.axes[0].lines if ln.get_gid() == "balanced pick"][0]
    # pick row 1: a = 2 -> 0.5; b = 20 -> (-20 + 40) / 30 = 2/3; |c - 5| = 2 -> (-2 + 2) / 2 = 0
    np.testing.assert_allclose(line.get_ydata(), [0.5, 2 / 3, 0.0])


def test_influence_figure_bars_equal_indices():
    res = sobol_indices(lambda U: U @ np.array([2.0, 1.0]), 2, n=256, seed=0, names=["p", "q"],
                        outputs=["y"])
    fig = influence_figure(res)
    widths = sorted(p.get_width() for p in fig.axes[0].patches if isinstance(p, Rectangle))
    assert widths == pytest.approx(sorted(np.concatenate([res.first[0], res.total[0]])))


def test_write_report_computes_what_is_missing(built, tmp_path, monkeypatch):
    study = built.study
    calls = []
    monkeypatch.setattr(study, "fit", lambda: calls.append(1) or built.fit)   # the fixture's models
    path = write_report(study, tradeoff=built.tradeoff, path=tmp_path / "r.html", influence_n=64)
    assert calls == [1]
    page = Page()
    page.feed(path.read_text(encoding="utf-8"))
    assert [s for s in page.sections if s in SECTION_IDS] == [s for s in SECTION_IDS if s != "next-runs"]
    assert page.table("summary")[0][0] == "factor"      # a window was computed


def test_study_without_limits_and_bad_suggestions(tmp_path):
    # no limit: no window, no probability map; the goals are mapped and traded off instead
    folder = tmp_path / "nolimits"
    folder.mkdir()
    toml = (case_dir("tempering") / "study.toml").read_text()
    toml = re.sub(r"(?m)^(min|max) = .*$", "", toml).replace('kind = "safety"', 'kind = "quality"')
    (folder / "study.toml").write_text(toml)
    study = Study.load(folder)
    sim = load_simulator("tempering")
    frame = study.design("space-filling", runs=10, seed=2)
    for i, rec in frame.iterrows():
        for k, v in sim.evaluate({f: rec[f] for f in study.spec.factor_names}, seed=i).items():
            frame.loc[i, k] = v
    frame["status"] = "done"
    study.add_runs(frame)
    study = Study.load(folder)
    fit = study.fit(n_restarts=1)
    tr = build_tradeoff(study.spec, fit, pop_size=16, n_gen=8)
    with pytest.raises(InputError):
        write_report(study, fit, tradeoff=tr, suggestions=pd.DataFrame({"run": ["A"], "time": [1.0]}))
    page = Page()
    page.feed(write_report(study, fit, tradeoff=tr, influence_n=64).read_text(encoding="utf-8"))
    alts = [a["alt"] for t, a in page.attrs if t == "img"]
    assert any("Maps over temperature and time" in a for a in alts)
    assert not any("probability" in a for a in alts)
    assert "No response has a limit" in "".join(page.text)
    assert not any(a.get("class") == "caution" for t, a in page.attrs)    # no safety response left


# ------------------------------------------------------------------------------------- real browser
@pytest.mark.skipif(not CHROMIUM.exists(), reason="no /usr/bin/chromium (Debian chromium) on this machine; "
                                                  "apt-get install chromium to run the browser check")
def test_renders_in_a_real_browser(built, tmp_path):
    import matplotlib.image as mpimg

    shot = tmp_path / "shot.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,2000",
           built.path.resolve().as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists(), "chromium wrote no screenshot"
    img = mpimg.imread(shot)
    assert img.shape[0] == 2000 and img.shape[1] == 1200
    assert float(np.var(img)) > 0
    assert len(np.unique(img.reshape(-1, img.shape[-1])[::7], axis=0)) > 10
    shutil.rmtree(tmp_path / "profile", ignore_errors=True)


def test_models_section_shows_choice_and_terms(built):
    # rendering contract (no external source): the candidates' LOO scores and the term table of each
    # polynomial model appear under the response, as in fit.json
    for d in built.fit.diagnostics:
        rows = [t["rows"] for t in built.page.tables if t["section"] == "models" and d.response in t["h3"]]
        choice = next(r for r in rows if r[0][0] == "candidate")
        shown = {r[0]: float(r[1]) for r in choice[1:]}
        assert shown == pytest.approx(d.choice["scores"], rel=1e-3)
        assert [r[0] for r in choice[1:] if r[2] == "yes"] == [d.choice["chosen"]]
        terms = [r for r in rows if r[0][0] == "term"]
        assert bool(terms) == bool(d.terms)
        if d.terms:
            assert [r[0] for r in terms[0][1:]] == [t["term"] for t in d.terms]
            assert [float(r[1]) for r in terms[0][1:]] == pytest.approx(
                [t["coefficient"] for t in d.terms], rel=1e-3, abs=1e-9)
