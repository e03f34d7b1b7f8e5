"""Shared fixtures: a small study folder written from text, and a snapshot of a folder's bytes."""

from __future__ import annotations

import windowfinder  # noqa: F401  (first: it holds BLAS to one thread before numpy loads)

import hashlib
import json
from pathlib import Path

import pytest

STUDY = """\
[study]
name = "test study"
confidence = 0.9
seed = 3

[[factor]]
name = "temperature"
unit = "degC"
low = 40.0
high = 90.0
step = 0.5
tolerance = 1.0

[[factor]]
name = "time"
unit = "min"
low = 30.0
high = 180.0

[[response]]
name = "yield"
unit = "%"
goal = "maximize"
min = 80.0

[[response]]
name = "exotherm"
unit = "K"
max = 50.0
kind = "safety"
"""

RUNS = """\
run,temperature,time,yield,exotherm,status,note
R001,50,60,78.1,20.5,done,
R002,60,90,82.3,30.1,done,
R003,70,120,85.0,41.2,done,first try
R004,80,150,,55.0,done,yield not measured
R005,85,170,,,failed,tar formed
"""


@pytest.fixture
def study_dir(tmp_path: Path) -> Path:
    d = tmp_path / "study"
    d.mkdir()
    (d / "study.toml").write_text(STUDY)
    (d / "runs.csv").write_text(RUNS)
    return d


def snapshot(folder: Path) -> dict:
    """Path -> sha256 of every file below ``folder`` (to prove nothing was written or lost)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


# -- every window the suite writes validates against the shipped schema ------------------------------
WINDOW_FILES = ("window.json", "testplan.window.json")
WINDOWS_CHECKED = []  # (path) of every window document validated in this session


def window_validator():
    """Draft 2020-12 validator of the JSON Schema shipped in the package (jsonschema, a test extra)."""
    import jsonschema

    from windowfinder.export.files import window_schema

    schema = window_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def check_window_document(doc: dict, where: str = "window") -> None:
    errors = sorted(window_validator().iter_errors(doc), key=lambda e: list(e.path))
    assert not errors, f"{where}: {errors[0].message} at {list(errors[0].path)}"


@pytest.fixture(autouse=True)
def _validate_written_windows(monkeypatch):
    """Wrap the JSON writer: a window.json (or a record's window) written in-process must validate."""
    from windowfinder.export import files

    original = files.write_json

    def checked(path, data):
        out = original(path, data)
        name = Path(path).name
        if name in WINDOW_FILES:
            check_window_document(json.loads(Path(out).read_text()), str(path))
            WINDOWS_CHECKED.append(str(path))
        elif name == "record.json":
            for e in json.loads(Path(out).read_text())["history"]:
                if e["window"] is not None:
                    check_window_document(e["window"], f"{path} entry {e['verified_utc']}")
        return out

    monkeypatch.setattr(files, "write_json", checked)
