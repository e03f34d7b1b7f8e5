"""Run table: validation with row and column named, flags, atomic appends that keep old bytes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from windowfinder.errors import InputError
from windowfinder.inputs.runs import append_runs, next_ids, read_runs, safe_cell
from windowfinder.inputs.spec import StudySpec


@pytest.fixture
def spec(study_dir):
    return StudySpec.from_toml(study_dir / "study.toml")


def test_reads_statuses_and_not_measured_cells(study_dir, spec):
    t = read_runs(study_dir / "runs.csv", spec)
    assert len(t) == 5
    assert list(t.failed()["run"]) == ["R005"]
    assert np.isnan(t.frame.loc[3, "yield"])  # blank = not measured
    np.testing.assert_allclose(t.X_coded()[0], [(50 - 40) / 50, (60 - 30) / 150])


HEADER = "run,temperature,time,yield,exotherm,status,note\n"
BAD = [
    ("run,temperature,yield,exotherm\nR1,50,80,20\n", ["missing column 'time'"]),
    (HEADER + "R1,50,abc,80,20,done,\n", ["line 2", "R1", "time", "not a number"]),
    (HEADER + "R1,50,60,80,inf,done,\n", ["line 2", "exotherm", "not finite"]),
    (HEADER + "R1,50,60,80,20,done,\nR1,55,60,81,21,done,\n", ["duplicate run id 'R1'", "line 3"]),
    (HEADER + "R1,50,60,80,20,finished,\n", ["status 'finished'"]),
    ("", ["empty file"]),
    (HEADER.replace("time", "tiem") + "R1,50,60,80,20,done,\n", ["unknown column 'tiem'", "'time'"]),
    ("run;temperature;time\nR1;50;60\n", ["';'"]),
    (HEADER + 'R1,50,"60,5",80,20,done,\n', ["decimal comma"]),
    (HEADER + "R1,,60,80,20,done,\n", ["'temperature' is empty"]),
]


@pytest.mark.parametrize("text,words", BAD)
def test_bad_tables_are_refused_naming_row_and_column(tmp_path, spec, text, words):
    p = tmp_path / "runs.csv"
    p.write_text(text)
    with pytest.raises(InputError) as e:
        read_runs(p, spec)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith("runs.csv")
    for w in words:
        assert w in msg


def test_out_of_bounds_runs_are_kept_and_flagged(tmp_path, spec):
    p = tmp_path / "runs.csv"
    p.write_text(HEADER + "R1,50,60,80,20,done,\nR2,95,60,80,20,done,\n")
    t = read_runs(p, spec)
    assert len(t) == 2 and list(t.outside()) == [False, True]
    assert any("R2" in w for w in t.warnings)


def test_append_keeps_old_bytes_verbatim(study_dir, spec):
    p = study_dir / "runs.csv"
    before = p.read_bytes()
    new = pd.DataFrame({"run": ["R006"], "temperature": [55.0], "time": [75.0], "status": ["planned"],
                        "note": ["=cmd|' /C calc'!A0"]})
    append_runs(p, spec, new)
    after = p.read_bytes()
    assert after.startswith(before)
    # runs.csv is the user's own data: the note is kept verbatim (neutralised only in exported tables)
    assert after[len(before):].decode() == "R006,55,75,,,planned,=cmd|' /C calc'!A0\n"
    t = read_runs(p, spec)
    assert t.frame["status"].iloc[-1] == "planned" and len(t) == 6


def test_formula_cells_are_neutralised():
    # OWASP "CSV Injection": cells starting with = + - @ are prefixed so spreadsheets show text.
    assert safe_cell("=1+1") == "'=1+1" and safe_cell("@SUM(A1)") == "'@SUM(A1)"
    assert safe_cell("-x") == "'-x" and safe_cell(-1.5) == "-1.5" and safe_cell("ok") == "ok"


def test_next_ids_continue_after_largest():
    assert next_ids(["R001", "R009", "x7"], 2) == ["R010", "R011"]
