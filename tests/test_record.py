"""``windowfinder record DIR results.csv``: measured results merged into planned runs by run id.

The expectations are the user's own file contents (values read back exactly) and the byte-for-byte
run table: on any refusal runs.csv must be unchanged (compared by sha256) and the message one line
naming the row.
"""

from __future__ import annotations

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


COLUMNS = ["run", "yield", "exotherm", "status", "note", "temperature", "time"]
RUN_IDS = ["R001", "R002", "R003", "R004"]


@pytest.mark.parametrize("text, word, choices, near", [
    ("run,type\nR002,80\n", "type", COLUMNS, None),       # 'type' ~ 'note': ratio 0.5, chance overlap
    ("run,yeild\nR002,80\n", "yeild", COLUMNS, "yield"),  # ratio 0.8: a letter swap
    ("run,yield\nR2,80\n", "R2", RUN_IDS, None),          # 'R2' ~ 'R002': ratio 0.67, below the threshold
    ("run,yield\nR0002,80\n", "R0002", RUN_IDS, "R002"),  # ratio 0.89
])
def test_hints_follow_the_one_close_match_policy(planned, capsys, text, word, choices, near):
    # one hint policy (windowfinder.errors.nearest, docs/architecture.md): "did you mean" only when
    # difflib's similarity ratio (Python standard library, SequenceMatcher.ratio) is >= CLOSE_MATCH
    import difflib

    from windowfinder.errors import CLOSE_MATCH

    best = max(choices, key=lambda c: difflib.SequenceMatcher(None, word, c).ratio())
    ratio = difflib.SequenceMatcher(None, word, best).ratio()
    assert (ratio >= CLOSE_MATCH) == (near is not None) and (near is None or best == near)
    code, _, err = record(planned, text, capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1
    if near:
        assert f"did you mean '{near}'?" in err
    elif choices is RUN_IDS:
        assert "did you mean" not in err and "plan it first" in err
    else:
        assert "did you mean" not in err and "allowed columns: " + ", ".join(COLUMNS) in err
