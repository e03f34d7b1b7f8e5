"""The window as a controlled document: window of record, provenance, schema, control plan, key hints.

The flow design -> runs -> window -> testplan -> verify -> report runs once on the bundled reactor case
(a demo scenario of our own, its simulator standing in for the lab); the checks compare against things
outside the code under test: hashlib's SHA-256 of the input files, the JSON Schema validator of the
``jsonschema`` package, the normal-distribution closed forms of process capability (Montgomery,
*Introduction to Statistical Quality Control*, 7th ed., Wiley 2013, ch. 8), and openpyxl reading the
workbook back.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math

import numpy as np
import pandas as pd
import pytest

from windowfinder.cases import load_simulator
from windowfinder.cases.examples import simulate_planned
from windowfinder.cli import main
from windowfinder.errors import InputError
from windowfinder.export.controlplan import capability_index, ppm_out
from windowfinder.export.record import compare
from windowfinder.study import Study
from conftest import check_window_document

CONF = "0.9"


def sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def phi(z: float) -> float:
    """Standard normal CDF from the error function (independent of scipy)."""
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


@pytest.fixture(scope="module")
def flow(tmp_path_factory):
    """new (12 example runs) -> design 6 more -> run them -> window -> testplan -> verify -> report."""
    d = tmp_path_factory.mktemp("record") / "reactor"
    assert main(["new", str(d), "--example", "reactor"]) == 0
    assert main(["design", str(d), "--runs", "6", "--seed", "21"]) == 0
    simulate_planned(Study.load(d), "reactor", seed=21)
    hashes_at_window = {"study.toml": sha(d / "study.toml"), "runs.csv": sha(d / "runs.csv")}
    assert main(["window", str(d), "--confidence", CONF]) == 0
    window_before = json.loads((d / "out" / "window.json").read_text())
    assert window_before["found"], window_before["message"]
    assert main(["testplan", str(d), "--confidence", CONF]) == 0
    plan = pd.read_csv(d / "out" / "testplan.csv")
    study = Study.load(d)
    sim = load_simulator("reactor")
    for i, rec in plan.iterrows():  # the lab: one noisy run per planned setting
        res = sim.evaluate({f: rec[f] for f in study.spec.factor_names}, seed=1000 + i)
        for r in study.spec.response_names:
            plan.loc[i, r] = res[r]
    filled = d / "filled.csv"
    plan.to_csv(filled, index=False)
    runs_before_verify = sha(d / "runs.csv")
    assert main(["verify", str(d), str(filled)]) == 0
    assert main(["report", str(d), "--confidence", CONF]) == 0
    return {"dir": d, "hashes_at_window": hashes_at_window, "window_before": window_before,
            "runs_before_verify": runs_before_verify, "filled": filled}


def test_verify_freezes_the_window_it_judged(flow):
    d = flow["dir"]
    rec = json.loads((d / "out" / "record.json").read_text())
    entry = rec["history"][-1]
    planned = json.loads((d / "out" / "testplan.window.json").read_text())
    assert entry["window"] == planned  # the judged window, as planned, byte for byte in content
    assert entry["plan_sha256"] == sha(flow["filled"])
    assert entry["provenance"]["inputs"]["runs.csv"] == flow["runs_before_verify"]  # before the append
    assert entry["verdict"].startswith("window confirmed") == entry["confirmed"]
    check_window_document(entry["window"], "record.json")
    if entry["confirmed"]:
        assert rec["of_record"] == entry


def test_report_leads_with_window_of_record_and_verdict(flow):
    d = flow["dir"]
    entry = json.loads((d / "out" / "record.json").read_text())["of_record"]
    assert entry is not None, "the reactor verification should confirm its window"
    html = (d / "out" / "report.html").read_text()
    summary = html[html.index('id="summary"'):]
    first = summary.index("Window of record")
    assert first < summary.index("Refit on all runs")  # the record comes first, the refit after it
    assert entry["verdict"] in html
    lo = entry["window"]["factors"][0]["low"]
    assert f"{lo:.4g}" in summary[first:summary.index("Refit on all runs")]


def test_refit_that_disagrees_shows_both_with_reason(flow, capsys):
    d = flow["dir"]
    capsys.readouterr()
    assert main(["window", str(d), "--confidence", "0.6"]) == 0  # another confidence: another window
    out = capsys.readouterr().out
    doc = json.loads((d / "out" / "window.json").read_text())
    entry = json.loads((d / "out" / "record.json").read_text())["of_record"]
    assert doc["record"]["factors"] == entry["window"]["factors"]  # the record is kept, not replaced
    assert not doc["record"]["agree"]
    assert "confidence 0.6 instead of 0.9" in doc["record"]["reason"]
    assert "of record" in out and "refit" in out and "confidence 0.6 instead of 0.9" in out
    cmp = compare(entry, doc, Study.load(d).spec)
    assert [r["record_low"] for r in cmp.rows] == [f["low"] for f in entry["window"]["factors"]]
    assert [r["refit_low"] for r in cmp.rows] == [f["low"] for f in doc["factors"]]
    # the same window compared with itself agrees
    assert compare(entry, entry["window"], Study.load(d).spec).agree
    assert main(["verified", str(d)]) == 0
    assert entry["verdict"] in capsys.readouterr().out


def test_provenance_hashes_are_sha256_of_inputs(flow):
    prov = flow["window_before"]["provenance"]
    assert prov["inputs"] == flow["hashes_at_window"]
    assert prov["confidence"] == float(CONF) and prov["seed"] == Study.load(flow["dir"]).spec.seed
    assert prov["confidence_applies_to"].startswith("each new run")
    assert set(prov["models"]) == set(Study.load(flow["dir"]).spec.response_names)
    assert prov["created_utc"].endswith("Z") and len(prov["created_utc"]) == 20
    side = json.loads((flow["dir"] / "out" / "testplan.provenance.json").read_text())
    assert side["file_sha256"] == sha(flow["dir"] / "out" / "testplan.csv")
    # per-run diagnostics stay in fit.json
    assert all(set(m) <= {"response", "model", "n", "loo_q2", "loo_rmse", "coverage95", "noise_sd"}
               for m in flow["window_before"]["models"])
    assert "diagnostics" not in flow["window_before"]


def test_suggest_and_tradeoff_sidecars(flow, tmp_path):
    import shutil

    d = tmp_path / "copy"
    shutil.copytree(flow["dir"], d)
    runs_before = sha(d / "runs.csv")
    assert main(["suggest", str(d), "--count", "2"]) == 0
    side = json.loads((d / "out" / "next.provenance.json").read_text())
    assert side["inputs"]["runs.csv"] == runs_before != sha(d / "runs.csv")  # read before the append
    assert side["file_sha256"] == sha(d / "out" / "next.csv")
    assert main(["tradeoff", str(d)]) == 0
    side = json.loads((d / "out" / "tradeoff.provenance.json").read_text())
    assert side["file_sha256"] == sha(d / "out" / "tradeoff.csv")
    assert side["inputs"] == {"study.toml": sha(d / "study.toml"), "runs.csv": sha(d / "runs.csv")}


def test_windows_validate_against_shipped_schema(flow):
    import jsonschema

    from windowfinder.export.files import window_schema

    schema = window_schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    for name in ("window.json", "testplan.window.json"):
        jsonschema.validate(json.loads((flow["dir"] / "out" / name).read_text()), schema,
                            cls=jsonschema.Draft202012Validator)
    bad = dict(flow["window_before"], confidence=1.5)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, schema, cls=jsonschema.Draft202012Validator)
    bad = dict(flow["window_before"], diagnostics=[])  # per-run arrays do not belong here
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, schema, cls=jsonschema.Draft202012Validator)


def test_controlplan_csv_and_xlsx(flow):
    d = flow["dir"]
    assert main(["controlplan", str(d)]) == 0
    with open(d / "out" / "controlplan.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    study = Study.load(d)
    spec = study.spec
    assert [r["name"] for r in rows if r["item"] == "factor"] == spec.factor_names
    assert {r["name"] for r in rows if r["item"] == "response"} == {r.name for r in spec.limited}
    entry = json.loads((d / "out" / "record.json").read_text())["of_record"]
    for r, f in zip([r for r in rows if r["item"] == "factor"], entry["window"]["factors"]):
        assert float(r["low"]) == f["low"] and float(r["high"]) == f["high"]
        assert f["low"] <= float(r["set_point"]) <= f["high"]
    # ppm and Ppk recomputed from the fitted models' predictive distribution with the closed forms
    fit = study.fit()
    x = np.array([[float(r["set_point"]) for r in rows if r["item"] == "factor"]])
    for row in (r for r in rows if r["item"] == "response"):
        resp = spec.response(row["name"])
        m = fit.surrogates.models[resp.name]
        mu, sd = m.predict(spec.to_coded(x), return_std=True, noise=True)
        lo = m.transform_.forward_limit(resp.min) if resp.min is not None else -math.inf
        hi = m.transform_.forward_limit(resp.max) if resp.max is not None else math.inf
        if getattr(m, "dof_", None) is None:
            p_out = phi((lo - mu[0]) / sd[0]) + 1 - phi((hi - mu[0]) / sd[0])
            assert float(row["ppm_out_at_set_point"]) == pytest.approx(1e6 * p_out, rel=1e-6, abs=1e-6)
        ppk = min(hi - mu[0], mu[0] - lo) / (3 * sd[0])
        assert float(row["ppk_at_set_point"]) == pytest.approx(ppk, rel=1e-9)
    openpyxl = pytest.importorskip("openpyxl")
    ws = openpyxl.load_workbook(d / "out" / "controlplan.xlsx").active
    header = [c.value for c in ws[1]]
    assert header[:2] == ["item", "name"] and ws.max_row == len(rows) + 1
    assert isinstance(ws.cell(2, header.index("low") + 1).value, (int, float))


# -- capability: closed forms and a handbook table --------------------------------------------------
@pytest.mark.parametrize("mu,sigma,lsl,usl", [(10.0, 1.0, 7.0, 14.0), (0.3, 0.2, -0.5, None),
                                              (5.0, 0.5, None, 6.2), (2.0, 0.1, 1.0, 3.0)])
def test_cpk_and_ppm_closed_forms(mu, sigma, lsl, usl):
    # Cpk = min(USL - mu, mu - LSL) / (3 sigma), one-sided Cpu / Cpl; fraction out of a normal process
    # (Montgomery 2013, ch. 8, process capability ratios and process fallout)
    sides = [s for s in ((usl - mu) if usl is not None else None, (mu - lsl) if lsl is not None else None)
             if s is not None]
    assert capability_index(mu, sigma, lsl, usl) == pytest.approx(min(sides) / (3 * sigma), rel=1e-12)
    out = (phi((lsl - mu) / sigma) if lsl is not None else 0.0) + (
        1 - phi((usl - mu) / sigma) if usl is not None else 0.0)
    assert ppm_out(mu, sigma, lsl, usl) == pytest.approx(1e6 * out, rel=1e-9, abs=1e-9)


@pytest.mark.parametrize("cp,two_sided,one_sided", [(1.0, 2700, 1350), (1.33, 66, 33)])
def test_ppm_of_a_centred_process_handbook_table(cp, two_sided, one_sided):
    # Montgomery 2013, ch. 8, table of Cp against process fallout in ppm for a centred normal process
    # (values from memory, rounded as printed); specification half-width 3 Cp sigma
    assert ppm_out(0.0, 1.0, -3 * cp, 3 * cp) == pytest.approx(two_sided, rel=0.06)
    assert ppm_out(0.0, 1.0, None, 3 * cp) == pytest.approx(one_sided, rel=0.06)
    assert capability_index(0.0, 1.0, -3 * cp, 3 * cp) == pytest.approx(cp)


# -- key suggestions: only for near misses ----------------------------------------------------------
def test_unknown_key_hint_only_for_close_matches(study_dir):
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace("step = 0.5", "type = 0.5"))
    with pytest.raises(InputError) as e:
        Study.load(study_dir)
    msg = str(e.value)
    assert "'type'" in msg and "did you mean" not in msg and "valid keys:" in msg and "step" in msg
    (study_dir / "study.toml").write_text(text.replace("tolerance = 1.0", "tolerence = 1.0"))
    with pytest.raises(InputError) as e:
        Study.load(study_dir)
    assert "did you mean 'tolerance'?" in str(e.value)


# -- margin maps ------------------------------------------------------------------------------------
def test_margin_map_is_probability_in_sd_units(flow):
    # For a one-sided limit and a normal predictive, P(limit met) = Phi(z) with z the margin in
    # predictive sd; checked against the feasibility module's per-limit probability, with Phi by erfc.
    from windowfinder.report import margin_map_figure, slice_grid, slice_figure

    study = Study.load(flow["dir"])
    spec, fit = study.spec, study.fit()
    grid = slice_grid(spec, fit, (0, 1), m=15)
    checked = 0
    for k, name in enumerate(grid.fmap.names):
        r, m = spec.response(name), fit.surrogates.models[name]
        if getattr(m, "dof_", None) is not None or (r.min is not None and r.max is not None):
            continue
        z = grid.margins[name].ravel()
        p = np.array([phi(v) for v in z])
        assert np.allclose(p, grid.fmap.p_each[:, k], atol=1e-9), name
        checked += 1
    assert checked >= 1
    fig = slice_figure(spec, fit, None, (0, 1), grid=grid)
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    assert titles[0].startswith("P(all limits met)")  # the probability leads
    assert all("margin to" in t for t in titles[1:]) and len(titles) == 1 + len(spec.limited)
    fig = margin_map_figure(spec, fit, None, (0, 1), spec.limited[0].name, grid=grid)
    assert fig.axes[0].legend_handles_[0].get_label().startswith("median on the limit")


def test_maps_draw_the_window_of_record_beside_the_refit(flow, monkeypatch):
    # contract (docs/guide.md, report): with a window of record in out/record.json every map draws it at
    # the ranges record.json holds, in its own colour and line style, and labels the refit as such;
    # expectations are the numbers written in record.json and window.json-format ranges (no model)
    from matplotlib.patches import Rectangle

    from windowfinder.answers import build_window
    from windowfinder.report import sections, slice_figure, slice_grid

    study = Study.load(flow["dir"])
    spec, fit = study.spec, study.fit()
    entry = json.loads((flow["dir"] / "out" / "record.json").read_text())["of_record"]
    rec = {f["name"]: f for f in entry["window"]["factors"]}
    refit = build_window(spec, fit, 0.6)   # another confidence: another window than the record's 0.9
    assert refit.found
    pair = (0, 2)
    fig = slice_figure(spec, fit, refit, pair, grid=slice_grid(spec, fit, pair, m=12), record=entry)
    fi, fj = (rec[spec.factor_names[k]] for k in pair)
    maps = [ax for ax in fig.axes if ax.get_title()]
    assert len(maps) == 1 + len(spec.limited)
    for ax in maps:
        boxes = {p.get_gid(): p for p in ax.patches if isinstance(p, Rectangle)}
        box, win = boxes["window of record"], boxes["window"]
        assert box.get_xy() == pytest.approx((fi["low"], fj["low"]), rel=1e-12)
        assert (box.get_width(), box.get_height()) == pytest.approx(
            (fi["high"] - fi["low"], fj["high"] - fj["low"]), rel=1e-12)
        ri, rj = refit.factors[pair[0]], refit.factors[pair[1]]
        assert win.get_xy() == pytest.approx((ri["low"], rj["low"]), rel=1e-12)
        assert box.get_edgecolor() != win.get_edgecolor() and box.get_linestyle() != win.get_linestyle()
        labels = [h.get_label() for h in ax.legend_handles_]
        assert f"window of record (verified {entry['verified_utc'][:10]})" in labels
        assert "refit window (all runs)" in labels and "window" not in labels
    # the report's map section hands the record to every map
    seen = []
    monkeypatch.setattr(sections, "slice_figure", lambda *a, **k: seen.append(k.get("record")) or
                        slice_figure(*a, **k))
    monkeypatch.setattr(sections, "slice_grid", lambda spec, fit, pair, centre, **k:
                        slice_grid(spec, fit, pair, centre, m=8, **{x: v for x, v in k.items() if x != "m"}))
    text = sections.maps(sections.Content(study, fit, refit, record=entry))
    assert seen and all(r is entry for r in seen)
    assert "window of record" in text
    # without a record, the plain label and no record box
    fig = slice_figure(spec, fit, refit, pair, grid=slice_grid(spec, fit, pair, m=12))
    ax = fig.axes[0]
    assert not [p for p in ax.patches if p.get_gid() == "window of record"]
    assert "window" in [h.get_label() for h in ax.legend_handles_]
