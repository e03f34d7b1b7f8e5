"""Closed-loop campaigns: budget, resume after a crash, Dask, failing commands, no shell, other editors.

Expectations come from outside the code under test: the Branin function's published minimum (Dixon &
Szegö 1978, values as listed by Surjanovic & Bingham, Virtual Library of Simulation Experiments, 2013),
responses recomputed here from each run's recorded settings, and the run-table contract of
/work/shared/DESIGN.md ("runs.csv": unique ids, done/planned/failed, atomic rewrites, a failing command
leaves the file byte-identical), checked by counting rows and comparing bytes.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from windowfinder.campaign import RunLedger, admissible, run_campaign
from windowfinder.errors import InputError
from windowfinder.campaign.evaluators import FunctionEvaluator, RunOutcome
from windowfinder.inputs.spec import StudySpec
from windowfinder.study import Study

from conftest import snapshot

TESTS = Path(__file__).resolve().parent
sys.path.insert(0, str(TESTS))
import campaign_helpers as helpers  # noqa: E402

BRANIN_STUDY = """\
[study]
name = "campaign test: Branin"
seed = 5

[[factor]]
name = "x1"
low = -5.0
high = 10.0

[[factor]]
name = "x2"
low = 0.0
high = 15.0

[[response]]
name = "branin"
goal = "minimize"
max = 50.0

[[response]]
name = "distance"
goal = "minimize"
max = 10.0
"""

SIM = """\
import csv, sys, time
sys.path.insert(0, {tests!r})
from campaign_functions import branin, distance

inp, out, mode = sys.argv[1], sys.argv[2], sys.argv[3]
rows = list(csv.DictReader(open(inp)))
if mode == "exit":
    print("starting", file=sys.stderr)
    print("solver diverged at step 17", file=sys.stderr)
    sys.exit(3)
if mode == "hang":
    time.sleep(60)
if mode == "nooutput":
    sys.exit(0)
with open(out, "w") as fh:
    if mode == "notnumber":
        fh.write("run,branin,distance\\n" + "".join(r["run"] + ",abc,1\\n" for r in rows))
    elif mode == "unknowncolumn":
        fh.write("run,branin,colour\\n" + "".join(r["run"] + ",1,2\\n" for r in rows))
    elif mode == "norun":
        fh.write("branin,distance\\n1,2\\n")
    elif mode == "blank":
        fh.write("run,branin,distance\\n" + "".join(r["run"] + ",,\\n" for r in rows))
    elif mode == "selffail":
        fh.write("run,branin,distance,status,note\\n" + "".join(r["run"] + ",,,failed,nozzle clogged\\n"
                                                                  for r in rows))
    else:  # ok / partial
        fh.write("run,branin,distance\\n")
        for r in rows:
            x1, x2 = float(r["x1"]), float(r["x2"])
            d = "" if mode == "partial" else repr(distance(x1, x2))
            fh.write(f"{{r['run']}},{{branin(x1, x2)!r}},{{d}}\\n")
"""


@pytest.fixture
def branin_dir(tmp_path, monkeypatch) -> Path:
    d = tmp_path / "branin"
    d.mkdir()
    (d / "study.toml").write_text(BRANIN_STUDY)
    monkeypatch.syspath_prepend(str(TESTS))  # --function campaign_helpers:... must import
    monkeypatch.setenv("PYTHONPATH", str(TESTS))  # ... in spawned pool and Dask workers as well
    return d


@pytest.fixture
def sim(tmp_path) -> Path:
    path = tmp_path / "sim.py"
    path.write_text(SIM.format(tests=str(TESTS)))
    return path


def quiet(line: str) -> None:
    pass


def table(folder: Path) -> pd.DataFrame:
    return Study.load(folder).runs.frame


def assert_clean_budget(frame: pd.DataFrame, budget: int) -> None:
    """Run-table contract (DESIGN.md): unique ids; exactly ``budget`` completed runs, none planned."""
    assert frame["run"].is_unique
    assert frame["status"].isin(["done", "failed"]).sum() == budget
    assert (frame["status"] == "planned").sum() == 0


def assert_branin_values(frame: pd.DataFrame) -> None:
    """Each done run's responses equal the functions recomputed at that run's own settings."""
    done = frame[frame["status"] == "done"]
    assert len(done) > 0
    for rec in done.to_dict("records"):
        assert rec["branin"] == pytest.approx(helpers.branin(rec["x1"], rec["x2"]), rel=1e-12)
        assert rec["distance"] == pytest.approx(helpers.distance(rec["x1"], rec["x2"]), rel=1e-12)


def test_branin_helper_matches_published_minimum():
    # Dixon & Szegö (1978); Surjanovic & Bingham, VLSE (2013): f* = 0.397887 at these three minimisers.
    for x1, x2 in [(-math.pi, 12.275), (math.pi, 2.275), (9.42478, 2.475)]:
        assert helpers.branin(x1, x2) == pytest.approx(0.397887, abs=1e-6)


def test_closed_loop_function_on_process_pool_ends_at_budget(branin_dir):
    res = run_campaign(branin_dir, function="campaign_helpers:evaluate", budget=10, initial=4, batch=2,
                       workers=2, propose=helpers.random_proposer, progress=quiet)
    frame = table(branin_dir)
    assert len(frame) == 10
    assert_clean_budget(frame, 10)
    assert (frame["status"] == "done").all()
    # proposals reached 10 % past the bounds; every recorded setting must be inside study.toml's bounds
    assert frame["x1"].between(-5, 10).all() and frame["x2"].between(0, 15).all()
    assert_branin_values(frame)
    # 4 initial runs in one batch, then 3 proposal batches of 2: 4 + 3 * 2 = 10
    assert (res.runs_done, res.evaluated, res.batches, res.failed) == (10, 10, 4, 0)
    assert [h["runs_done"] for h in res.history] == [4, 6, 8, 10]
    assert res.to_frame().shape[0] == 4 and res.to_dict()["budget"] == 10


def test_resume_after_hard_crash_reaches_budget_without_duplicates(branin_dir):
    # the campaign process dies abruptly (os._exit) while evaluating the 6th run: the 4 design runs are
    # recorded, R006 and R007 of the batch R005..R007 are still planned (R005 may or may not have been
    # written before the crash: the worker thread starts R006 while the main thread records R005)
    code = textwrap.dedent(f"""
        import campaign_helpers as h
        from windowfinder.campaign import run_campaign
        run_campaign({str(branin_dir)!r}, function="campaign_helpers:crash_at", budget=8, initial=4,
                     batch=3, workers=1, propose=h.random_proposer, progress=lambda s: None)
    """)
    env = {**os.environ, "PYTHONPATH": str(TESTS), "CRASH_AT": "6"}
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 3, proc.stderr
    before = table(branin_dir)
    assert before["run"].tolist() == [f"R{i:03d}" for i in range(1, 8)]
    assert before["status"].tolist()[:4] == ["done"] * 4
    assert before["status"].tolist()[5:] == ["planned"] * 2
    n_before = int((before["status"] == "done").sum())

    res = run_campaign(branin_dir, function="campaign_helpers:evaluate", budget=8, initial=4, batch=3,
                       workers=1, propose=helpers.random_proposer, progress=quiet)
    after = table(branin_dir)
    assert_clean_budget(after, 8)
    assert after["run"].tolist() == [f"R{i:03d}" for i in range(1, 9)]
    # runs completed before the crash are kept untouched; planned ones ran at their planned settings
    pd.testing.assert_frame_equal(after.iloc[:n_before], before.iloc[:n_before])
    cols = ["run", "x1", "x2"]
    pd.testing.assert_frame_equal(after.iloc[n_before:7][cols], before.iloc[n_before:7][cols])
    assert res.evaluated == 8 - n_before  # planned rows re-issued + one new run
    assert_branin_values(after)


def test_interrupt_mid_batch_on_pool_then_resume(branin_dir):
    # expectation: the budget rule and unique ids (counted); completed rows kept verbatim
    calls = []

    def interrupt_at_fifth_result(line):
        if line.startswith("run "):
            calls.append(line)
            if len(calls) == 5:
                raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_campaign(branin_dir, function="campaign_helpers:evaluate", budget=9, initial=4, batch=3,
                     workers=2, propose=helpers.random_proposer, progress=interrupt_at_fifth_result)
    before = table(branin_dir)
    assert (before["status"] != "planned").sum() == 5 and (before["status"] == "planned").sum() == 2
    run_campaign(branin_dir, function="campaign_helpers:evaluate", budget=9, initial=4, batch=3,
                 workers=2, propose=helpers.random_proposer, progress=quiet)
    after = table(branin_dir)
    assert_clean_budget(after, 9)
    done_before = before[before["status"] == "done"]
    pd.testing.assert_frame_equal(after.set_index("run").loc[done_before["run"]].reset_index(),
                                  done_before.reset_index(drop=True))
    assert_branin_values(after)


def test_dask_local_cluster_completes_campaign(branin_dir):
    # expectation: the budget rule, counted, and values recomputed from the recorded settings
    pytest.importorskip("dask.distributed")
    # evaluate_on_dask fails any run that is not executed inside a Dask worker
    res = run_campaign(branin_dir, function="campaign_helpers:evaluate_on_dask", budget=6, initial=4,
                       batch=2, dask_local=2, propose=helpers.random_proposer, progress=quiet)
    frame = table(branin_dir)
    assert_clean_budget(frame, 6)
    assert (frame["status"] == "done").all(), frame["note"].tolist()
    assert_branin_values(frame)
    assert res.batches == 2


@pytest.mark.parametrize("mode, expected", [
    ("exit", "exited with code 3: solver diverged at step 17"),
    ("nooutput", "wrote no output file"),
    ("notnumber", "'branin' = 'abc' is not a number"),
    ("unknowncolumn", "column 'colour' is not a response"),
    ("norun", "no 'run' column"),
    ("blank", "measured no response"),
    ("selffail", "command reported failed: nozzle clogged"),
])
def test_failing_command_records_failed_runs_and_goes_on(branin_dir, sim, mode, expected):
    # expectation: the {in}/{out} protocol of windowfinder.campaign.commands and DESIGN.md's "failed" status;
    # every run fails with the named reason and the loop still reaches the budget (counted)
    res = run_campaign(branin_dir, command=f"{sys.executable} {sim} {{in}} {{out}} {mode}", budget=4,
                       initial=2, batch=2, workers=2, propose=helpers.random_proposer, progress=quiet)
    frame = table(branin_dir)
    assert_clean_budget(frame, 4)
    assert (frame["status"] == "failed").all()
    assert all(expected in note for note in frame["note"]), frame["note"].tolist()
    assert res.failed == 4


def test_missing_program_and_timeout_are_failed_runs(branin_dir, sim, tmp_path):
    # expectation: as above; the hanging script sleeps 60 s, far past the 1 s limit
    run_campaign(branin_dir, command="windowfinder-no-such-program {in} {out}", budget=2, initial=2,
                 workers=2, progress=quiet)
    frame = table(branin_dir)
    assert (frame["status"] == "failed").all()
    assert frame["note"].str.contains("program 'windowfinder-no-such-program' not found").all()
    run_campaign(branin_dir, command=f"{sys.executable} {sim} {{in}} {{out}} hang", budget=4, initial=2,
                 batch=2, workers=2, run_timeout=1, propose=helpers.random_proposer, progress=quiet)
    frame = table(branin_dir)
    assert_clean_budget(frame, 4)
    assert frame["note"].iloc[2:].str.contains("timed out after 1 s").all()


def test_command_results_and_unmeasured_responses(branin_dir, sim):
    # expectation: values recomputed from the recorded settings; DESIGN.md: a blank response cell on a
    # done run means "not measured"
    run_campaign(branin_dir, command=f"{sys.executable} {sim} {{in}} {{out}} ok", budget=3, initial=3,
                 workers=2, progress=quiet)
    run_campaign(branin_dir, command=f"{sys.executable} {sim} {{in}} {{out}} partial", budget=5,
                 initial=3, batch=2, workers=1, propose=helpers.random_proposer, progress=quiet)
    frame = table(branin_dir)
    assert_clean_budget(frame, 5)
    assert (frame["status"] == "done").all()
    assert_branin_values(frame.iloc[:3])
    partial = frame.iloc[3:]
    assert partial["distance"].isna().all() and partial["note"].str.contains("not measured: distance").all()
    for rec in partial.to_dict("records"):
        assert rec["branin"] == pytest.approx(helpers.branin(rec["x1"], rec["x2"]), rel=1e-12)


def test_command_is_not_run_through_a_shell(branin_dir, sim, tmp_path):
    # expectation: POSIX shell grammar (IEEE Std 1003.1, "Shell Command Language"): through a shell,
    # ';', '&&' and '$( )' would run touch; split with shlex and run without one, they are plain words
    pwned = tmp_path / "PWNED"
    also = tmp_path / "ALSO"
    run_campaign(branin_dir, command=f"{sys.executable} {sim} {{in}} {{out}} ok ; touch {pwned} "
                                     f"&& touch {also} $(touch {also})", budget=2, initial=2, workers=1,
                 progress=quiet)
    assert not pwned.exists() and not also.exists()
    # the extra words reached the program as plain arguments, and it still answered normally
    assert (table(branin_dir)["status"] == "done").all()


def test_function_failures_and_seed():
    ev = FunctionEvaluator("campaign_helpers:evaluate_seeded", ["branin", "distance"])
    out = ev("R001", {"x1": 9.0, "x2": 13.0}, 7)
    assert (out.status, out.note) == ("failed", "campaign_helpers:evaluate_seeded: tar formed")
    ok = ev("R002", {"x1": math.pi, "x2": 2.275}, 7)
    # Branin minimum 0.397887 (Dixon & Szegö 1978; Surjanovic & Bingham 2013)
    assert ok.status == "done" and ok.responses["branin"] == pytest.approx(0.397887, abs=1e-6)
    # without a seed the helper raises TypeError -> failed run with the exception named
    bad = FunctionEvaluator(helpers.evaluate_seeded, ["branin", "distance"])("R003", {"x1": 0, "x2": 0})
    assert bad.status == "failed" and "TypeError" in bad.note
    for target in ("campaign_helpers", "no_such_module_xyz:f", "campaign_helpers:nothing"):
        with pytest.raises(InputError):
            FunctionEvaluator(target, ["branin"])


def test_bad_arguments_leave_runs_csv_byte_identical(study_dir):
    # expectation: DESIGN.md "a command that fails leaves runs.csv byte-identical" (sha256 of every file)
    before = snapshot(study_dir)
    bad = [dict(function="campaign_helpers:evaluate", budget=0),
           dict(function="campaign_helpers:evaluate", command="x {in} {out}", budget=5),
           dict(command="prog {in}", budget=8),
           dict(command="prog 'unclosed {in} {out}", budget=8),
           dict(function="no_such_module_xyz:f", budget=8),
           dict(function="campaign_helpers:evaluate", budget=8, run_timeout=5),
           dict(function="campaign_helpers:evaluate", budget=8, aim="fastest"),
           dict(function="campaign_helpers:evaluate", budget=8, scheduler="tcp://x:1", dask_local=2)]
    for kwargs in bad:
        with pytest.raises(InputError):
            run_campaign(study_dir, progress=quiet, **kwargs)
    assert snapshot(study_dir) == before


def test_planned_rows_issued_first_and_budget_never_exceeded(study_dir):
    # expectation: the budget rule (completed runs never exceed it) and planned rows first, counted;
    # P1's yield is the helper's closed form 60 + 0.3 * temperature
    # conftest's runs.csv: 5 completed runs; add 3 planned rows
    with open(study_dir / "runs.csv", "a") as fh:
        fh.write("P1,55,60,,,planned,\nP2,65,90,,,planned,\nP3,75,120,,,planned,\n")
    before = snapshot(study_dir)
    res = run_campaign(study_dir, function="campaign_helpers:yield_exotherm", budget=5, workers=1,
                       progress=quiet)
    assert res.evaluated == 0 and snapshot(study_dir) == before  # budget already reached: untouched
    res = run_campaign(study_dir, function="campaign_helpers:yield_exotherm", budget=6, workers=1,
                       progress=quiet)
    frame = table(study_dir)
    assert res.evaluated == 1 and len(frame) == 8
    assert frame.set_index("run")["status"][["P1", "P2", "P3"]].tolist() == ["done", "planned", "planned"]
    assert frame.set_index("run").loc["P1", "yield"] == pytest.approx(60 + 0.3 * 55)


def test_ledger_keeps_other_editors_rows_and_results(study_dir):
    # expectation: DESIGN.md run-table contract; another editor's rows and values survive verbatim
    study = Study.load(study_dir)
    ledger = RunLedger(study)
    rows = ledger.add(pd.DataFrame({"run": ["", ""], "temperature": [50.0, 60.0], "time": [40.0, 50.0],
                                    "yield": np.nan, "exotherm": np.nan, "note": ""}))
    assert rows["run"].tolist() == ["R006", "R007"]
    path = study_dir / "runs.csv"
    # another editor appends a run and fills in R007 by hand
    text = path.read_text().replace("R007,60,50,,,planned,", "R007,60,50,88,33,done,by hand")
    path.write_text(text + "U1,45,35,70.5,12,done,entered by the lab\n")
    assert ledger.record(RunOutcome("R006", "done", {"yield": 81.0, "exotherm": 25.0})) == "done"
    assert ledger.record(RunOutcome("R007", "done", {"yield": 1.0, "exotherm": 2.0})) == "conflict"
    frame = table(study_dir).set_index("run")
    assert frame.loc["U1", "note"] == "entered by the lab" and frame.loc["U1", "yield"] == 70.5
    assert frame.loc["R007", "yield"] == 88 and frame.loc["R007", "note"] == "by hand"
    assert frame.loc["R006", "yield"] == 81 and frame.loc["R006", "status"] == "done"
    assert ledger.conflicts and "R007" in ledger.conflicts[0]
    # the editor breaks the table (duplicate id): the campaign stops, leaves it as is, parks the result
    path.write_text(path.read_text() + "U1,45,35,,,done,\n")
    broken = path.read_bytes()
    with pytest.raises(InputError, match="another editor"):
        ledger.record(RunOutcome("R006", "failed", {}, "late"))
    assert path.read_bytes() == broken
    assert "R006" in (study_dir / "out" / "unsaved-runs.csv").read_text()


def test_transform_range_values_kept_out_of_the_table():
    spec = StudySpec.from_dict({"study": {"name": "t"},
                                "factor": [{"name": "a", "low": 0.0, "high": 1.0}],
                                "response": [{"name": "imp", "goal": "minimize", "max": 2.0,
                                              "transform": "log"}]})
    values, note = admissible(spec, RunOutcome("R1", "done", {"imp": -0.1}))
    # below the physical bound 0 of a log response: impossible, read_runs would refuse the table
    assert values == {} and "imp = -0.1 rejected" in note
    # exactly at the bound (an impurity of 0) is a measurement: recorded in its cell, not only in the note
    values, note = admissible(spec, RunOutcome("R1", "done", {"imp": 0.0}))
    assert values == {"imp": 0.0} and "rejected" not in note
    assert admissible(spec, RunOutcome("R1", "done", {"imp": 0.5}))[0] == {"imp": 0.5}


def test_default_proposer_study_suggest(branin_dir):
    if not hasattr(Study, "suggest"):
        pytest.skip("Study.suggest is not available yet; the default proposer calls it")
    res = run_campaign(branin_dir, function="campaign_helpers:evaluate", budget=8, initial=6, batch=2,
                       workers=1, progress=quiet)
    frame = table(branin_dir)
    assert_clean_budget(frame, 8)
    assert frame["x1"].between(-5, 10).all() and frame["x2"].between(0, 15).all()
    assert_branin_values(frame)
    assert res.history[-1]["source"].startswith("proposed")


def test_run_command_on_a_bundled_case_entry(tmp_path, capsys):
    """`windowfinder run --command "python -m windowfinder.cases.reactor {in} {out}"` (issue 14).

    Expectation from outside the campaign: every recorded response equals the reactor simulator called
    directly at the run's recorded settings with the seed the entry documents (CRC-32 of "seed:run"),
    and runs.csv ends with exactly the budget of done runs (DESIGN.md, "runs.csv").
    """
    import zlib

    from windowfinder import cli
    from windowfinder.cases import load_simulator

    folder = tmp_path / "reactor"
    assert cli.main(["new", str(folder), "--example", "reactor"]) == 0
    (folder / "runs.csv").unlink()  # start from an empty table: the campaign's own initial design
    command = f"{sys.executable} -m windowfinder.cases.reactor {{in}} {{out}} --seed 11"
    code = cli.main(["run", str(folder), "--command", command, "--budget", "2", "--initial", "2",
                     "--workers", "2"])
    assert code == 0, capsys.readouterr().err
    study = Study.load(folder)
    done = study.runs.done()
    assert len(done) == 2 and len(study.runs.frame) == 2
    sim = load_simulator("reactor")
    for rec in done.to_dict("records"):
        settings = {f: rec[f] for f in sim.FACTORS}
        expected = sim.evaluate(settings, seed=zlib.crc32(f"11:{rec['run']}".encode()))
        for name, value in expected.items():
            assert rec[name] == pytest.approx(value, rel=1e-12, abs=1e-12)


def test_simulator_values_at_a_physical_bound_are_recorded_in_their_cells(tmp_path, monkeypatch):
    # a yield of exactly 0 or 100 % returned by a simulator is a measurement: it goes into the response
    # cell (formerly blank, with the value only in the note) and the fit keeps it (models.transform)
    d = tmp_path / "bounded"
    d.mkdir()
    (d / "study.toml").write_text('[study]\nname = "b"\nseed = 4\n\n[[factor]]\nname = "x1"\nlow = 0.0\n'
                                  'high = 1.0\n\n[[factor]]\nname = "x2"\nlow = 0.0\nhigh = 1.0\n\n'
                                  '[[response]]\nname = "yield"\nunit = "%"\ngoal = "maximize"\nmin = 50.0\n'
                                  'transform = "logit"\nbounds = [0, 100]\n')
    monkeypatch.syspath_prepend(str(TESTS))
    run_campaign(d, function="campaign_helpers:saturating_yield", budget=8, initial=8, workers=1,
                 progress=quiet)
    frame = table(d)
    expect = np.clip(200.0 * frame["x1"].to_numpy() - 50.0, 0.0, 100.0)   # the function, recomputed
    np.testing.assert_allclose(frame["yield"].to_numpy(), expect, rtol=1e-12)
    assert ((expect == 0) | (expect == 100)).any() and not frame["note"].fillna("").str.contains(
        "rejected").any()
    fit = Study.load(d).fit(n_restarts=1)
    assert any("exactly at a physical bound kept" in w for w in fit.warnings)
