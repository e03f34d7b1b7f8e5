<<<<<<< HEAD
"""``windowfinder record DIR results.csv``: measured results merged into planned runs by run id.

The expectations are the user's own file contents (values read back exactly) and the byte-for-byte
run table: on any refusal runs.csv must be unchanged (compared by sha256) and the message one line
naming the row.
=======
"""The window as a controlled document: window of record, provenance, schema, control plan, key hints.

The flow design -> runs -> window -> testplan -> verify -> report runs once on the bundled reactor case
(a demo scenario of our own, its simulator standing in for the lab); the checks compare against things
outside the code under test: hashlib's SHA-256 of the input files, the JSON Schema validator of the
``jsonschema`` package, the normal-distribution closed forms of process capability (Montgomery,
*Introduction to Statistical Quality Control*, 7th ed., Wiley 2013, ch. 8), and openpyxl reading the
workbook back.
>>>>>>> 8c3e8c0 (JSON Schema (draft 2020-12) of window.json shipped as package data; every window the suite writes in-process is validated (conftest wraps the JSON writer) and fuzzed CLI windows too; controlplan verb: out/controlplan.csv (+ .xlsx) with set points, ranges, guard bands, limits, predicted ranges, ppm out at set point and worst point, Cpk (noise sd) and Ppk (predictive sd) per Montgomery ch. 8; record verb; tests/test_record.py (14 tests, 46 s))
"""

from __future__ import annotations

<<<<<<< HEAD
import hashlib

import pandas as pd
import pytest

from windowfinder.cli import main
from windowfinder.study import Study
from conftest import STUDY

PLANNED = """\
run,temperature,time,yield,exotherm,status,note
R001,50,60,78.1,20.5,done,
R002,60,90,,,planned,design sobol
R003,70,120,,,planned,design sobol
R004,80,150,,,planned,design sobol
"""


@pytest.fixture
def planned(tmp_path):
    d = tmp_path / "study"
    d.mkdir()
    (d / "study.toml").write_text(STUDY)
    (d / "runs.csv").write_text(PLANNED)
    return d


def digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def record(d, text, capsys, *extra):
    f = d.parent / "results.csv"
    f.write_text(text)
    code = main(["record", str(d), str(f), *extra])
    out, err = capsys.readouterr()
    return code, out, err


def test_record_merges_values_and_statuses(planned, capsys):
    code, out, err = record(planned, "run,yield,exotherm,note\nR002,83.25,31.5,\nR003,,42,lab B\n", capsys)
    assert code == 0, err
    runs = Study.load(planned).runs.frame.set_index("run")
    assert runs.loc["R002", "yield"] == 83.25 and runs.loc["R002", "exotherm"] == 31.5
    assert runs.loc["R002", "status"] == "done"
    assert pd.isna(runs.loc["R003", "yield"]) and runs.loc["R003", "exotherm"] == 42.0
    assert runs.loc["R003", "note"] == "lab B" and runs.loc["R002", "note"] == "design sobol"
    assert runs.loc["R004", "status"] == "planned"           # not in the results: untouched
    assert runs.loc["R001", "yield"] == 78.1                 # done before: untouched
    assert "recorded 3 values for 2 runs" in out


def test_failed_status_and_factor_columns_checked(planned, capsys):
    code, _, err = record(planned, "run,temperature,time,status,note\nR004,80,150,failed,tar formed\n",
                          capsys)
    assert code == 0, err
    runs = Study.load(planned).runs.frame.set_index("run")
    assert runs.loc["R004", "status"] == "failed" and "tar formed" in runs.loc["R004", "note"]


def test_recording_the_same_file_twice_is_harmless(planned, capsys):
    text = "run,yield\nR002,83.25\n"
    assert record(planned, text, capsys)[0] == 0
    before = digest(planned / "runs.csv")
    assert record(planned, text, capsys)[0] == 0
    assert digest(planned / "runs.csv") == before


@pytest.mark.parametrize("text, expect", [
    ("run,yield\nR009,80\n", "line 2 (run R009): run id 'R009' is not in runs.csv"),
    ("run,yeild\nR002,80\n", "did you mean 'yield'"),
    ("run,colour\nR002,80\n", "column 'colour' is not a response"),
    ("run,yield\nR002,8o\n", "line 2 (run R002): 'yield' = '8o' is not a number"),
    ("run,yield\nR002,81,5\n", "line 2: 3 cells but 2 columns"),
    ("run,yield\nR002,80\nR003,81\nR002,82\n", "line 4 (run R002): run id 'R002' appears twice"),
    ("run,yield\nR001,80\n", "line 2 (run R001): 'yield' already holds 78.1"),
    ("run,status\nR001,failed\n", "already 'done'"),
    ("run,temperature,yield\nR002,61,80\n", "'temperature' = 61 differs from the planned 60"),
    ("run,yield\nR002,\n", "no measured value and no status"),
    ("run,yield,status\nR002,80,planned\n", "status 'planned' unknown for a result"),
    ("yield\n80\n", "missing column 'run'"),
    ("run,note\nR002,hello\n", "no response column and no status column"),
    ("run,yield\n", "no result rows"),
    ("run,yield\n,80\n", "line 2: empty run id"),
    ("run,yield\nR002,1e999\n", "is not finite"),
    # the second row is bad: the good first row must not be written either (atomic)
    ("run,yield\nR002,80\nR003,x\n", "line 3 (run R003)"),
])
def test_every_refusal_leaves_runs_csv_byte_identical(planned, capsys, text, expect):
    before = digest(planned / "runs.csv")
    code, out, err = record(planned, text, capsys)
    assert code == 2
    assert expect in err, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert digest(planned / "runs.csv") == before


def test_replace_allows_overwrite(planned, capsys):
    code, _, err = record(planned, "run,yield\nR001,79.5\n", capsys, "--replace")
    assert code == 0, err
    assert Study.load(planned).runs.frame.set_index("run").loc["R001", "yield"] == 79.5


def test_transform_refusal_names_run(tmp_path, capsys):
    d = tmp_path / "study"
    d.mkdir()
    (d / "study.toml").write_text(STUDY.replace('kind = "safety"', 'kind = "safety"\ntransform = "log"'))
    (d / "runs.csv").write_text(PLANNED)
    before = digest(d / "runs.csv")
    code, _, err = record(d, "run,exotherm\nR003,-2\n", capsys)
    assert code == 2 and "run R003" in err and "transform = 'log'" in err
    assert digest(d / "runs.csv") == before


def test_missing_results_file(planned, capsys):
    code = main(["record", str(planned), str(planned / "nope.csv")])
    assert code == 2 and "results file not found" in capsys.readouterr().err
=======
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
    assert main(["record", str(d)]) == 0
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
>>>>>>> 8c3e8c0 (JSON Schema (draft 2020-12) of window.json shipped as package data; every window the suite writes in-process is validated (conftest wraps the JSON writer) and fuzzed CLI windows too; controlplan verb: out/controlplan.csv (+ .xlsx) with set points, ranges, guard bands, limits, predicted ranges, ppm out at set point and worst point, Cpk (noise sd) and Ppk (predictive sd) per Montgomery ch. 8; record verb; tests/test_record.py (14 tests, 46 s))
