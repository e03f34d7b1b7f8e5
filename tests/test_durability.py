"""No data lost: a study lock, and a campaign killed with SIGKILL that resumes to exactly its budget."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from windowfinder.cli import main
from windowfinder.errors import InputError
from windowfinder.inputs.lock import LOCK_NAME, StudyLock
from windowfinder.inputs.runs import read_runs
from windowfinder.inputs.spec import StudySpec
from conftest import snapshot

HERE = Path(__file__).parent


def test_second_writer_is_refused_while_first_holds_lock(study_dir, capsys):
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        (study_dir / LOCK_NAME).write_text(f"{holder.pid}\n")
        before = snapshot(study_dir)
        code = main(["design", str(study_dir), "--method", "sobol", "--runs", "4"])
        err = capsys.readouterr().err
        assert code == 2 and f"study is busy, held by pid {holder.pid}" in err
        assert snapshot(study_dir) == before
    finally:
        holder.kill()
        holder.wait()


def test_stale_lock_of_dead_process_is_taken_over(study_dir, capsys):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (study_dir / LOCK_NAME).write_text(f"{dead.pid}\n")
    code = main(["design", str(study_dir), "--method", "sobol", "--runs", "4"])
    out = capsys.readouterr()
    assert code == 0 and "stale lock" in out.err
    assert not (study_dir / LOCK_NAME).exists()  # released after the command


def test_lock_is_exclusive_in_process(study_dir):
    with StudyLock(study_dir):
        assert (study_dir / LOCK_NAME).read_text().strip() == str(os.getpid())
    assert not (study_dir / LOCK_NAME).exists()
    (study_dir / LOCK_NAME).write_text("1\n")  # pid 1 is alive on any Unix
    with pytest.raises(InputError, match="held by pid 1"):
        StudyLock(study_dir).acquire()


def _completed(path, spec):
    t = read_runs(path, spec)
    return t.completed()


def test_sigkill_mid_campaign_then_resume_to_exact_budget(study_dir):
    (study_dir / "runs.csv").unlink()  # start from nothing
    spec = StudySpec.from_toml(study_dir / "study.toml")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(HERE), os.environ.get("PYTHONPATH", "")])}
    cmd = [sys.executable, "-m", "windowfinder", "run", str(study_dir), "--function",
           "durability_functions:slow_process", "--budget", "10", "--initial", "4", "--batch", "2",
           "--workers", "1"]
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    deadline = time.monotonic() + 120
    done_before = None
    while time.monotonic() < deadline:
        time.sleep(0.2)
        if (study_dir / "runs.csv").exists():
            try:
                done = _completed(study_dir / "runs.csv", spec)
            except InputError:
                continue
            if len(done) >= 5:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
                done_before = done
                break
    assert done_before is not None, "campaign did not reach 5 runs in time"
    # the table still parses and keeps every completed run, byte for byte in its values
    after_kill = _completed(study_dir / "runs.csv", spec)
    assert len(after_kill) >= len(done_before)
    merged = done_before.merge(after_kill, on="run", suffixes=("", "_after"))
    assert len(merged) == len(done_before)
    assert (merged["yield"].fillna(-1) == merged["yield_after"].fillna(-1)).all()
    # resume: the same command ends at exactly the budget, unique ids
    p = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr[-2000:]
    final = read_runs(study_dir / "runs.csv", spec)
    assert len(final.completed()) == 10 and final.frame["run"].is_unique
    assert len(final.planned()) == 0
    kept = final.frame.set_index("run").loc[done_before["run"], "yield"]
    assert (kept.fillna(-1).to_numpy() == done_before["yield"].fillna(-1).to_numpy()).all()
    assert not (study_dir / LOCK_NAME).exists()
