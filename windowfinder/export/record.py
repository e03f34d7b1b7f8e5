"""The window of record: the window a verification judged, frozen with its verdict.

``testplan`` writes ``out/testplan.window.json`` (the window the plan was drawn in, window.json format).
``verify`` reads it back, and appends an entry — verdict, time, the plan's SHA-256, the judged window
— to ``out/record.json``. The latest *confirmed* entry is the window of record: later commands refit
with the verification runs and may find another window, but they show the window of record beside it,
with the reason they differ, and never replace it. Only a later confirmed verification (of a window
planned by ``testplan``) supersedes it, and the history keeps every entry.

record.json::

    {"of_record": ENTRY | null, "history": [ENTRY, ...]}
    ENTRY = {"confirmed", "verdict", "verified_utc", "plan", "plan_sha256", "runs", "window",
             "provenance"}
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from windowfinder.errors import InputError

RECORD_FILE = "record.json"
PLAN_WINDOW_FILE = "testplan.window.json"


def _read(path: Path, what: str):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise InputError(f"{path}: cannot read {what} ({type(e).__name__}); it is written by windowfinder "
                         "and should not be edited — restore it from your files") from None


def read_record(out_dir) -> dict | None:
    """record.json of a study's out/ folder, or None when no verification was recorded."""
    path = Path(out_dir) / RECORD_FILE
    if not path.exists():
        return None
    rec = _read(path, "the window of record")
    if not isinstance(rec, dict) or "history" not in rec:
        raise InputError(f"{path}: not a window record (no 'history'); restore it from your files")
    return rec


def of_record(out_dir) -> dict | None:
    """The entry of the window of record (latest confirmed verification), or None."""
    rec = read_record(out_dir)
    return None if rec is None else rec.get("of_record")


def read_plan_window(plan_path, out_dir) -> dict | None:
    """The window a test plan was drawn in: ``testplan.window.json`` beside the plan, else in out/."""
    for folder in (Path(plan_path).parent, Path(out_dir)):
        path = folder / PLAN_WINDOW_FILE
        if path.exists():
            return _read(path, "the window of the test plan")
    return None


def add_entry(out_dir, entry: dict) -> dict:
    """Append ``entry`` to record.json; a confirmed entry becomes the window of record. Returns the record."""
    from windowfinder.export.files import write_json

    rec = read_record(out_dir) or {"of_record": None, "history": []}
    rec["history"].append(entry)
    if entry.get("confirmed") and entry.get("window") is not None:
        rec["of_record"] = entry
    write_json(Path(out_dir) / RECORD_FILE, rec)
    return rec


@dataclass
class Comparison:
    """The window of record beside a refit window: per factor both ranges, agreement and the reason."""

    agree: bool
    rows: list[dict] = field(default_factory=list)
    reason: str = ""

    def to_dict(self) -> dict:
        return {"agree": self.agree, "reason": self.reason, "factors": self.rows}

    def text(self) -> str:
        head = f"{'factor':<16} {'of record':>21} {'refit':>21}"
        lines = [head] + [f"{r['name']:<16} {_rng(r['record_low'], r['record_high']):>21} "
                          f"{_rng(r['refit_low'], r['refit_high']):>21}" for r in self.rows]
        return "\n".join(lines + [self.reason])


def _rng(lo, hi) -> str:
    return "-" if lo is None else f"{lo:.5g} .. {hi:.5g}"


def compare(entry: dict, window: dict, spec) -> Comparison:
    """Compare the window of record (``entry``) with a refit ``window`` (window.json content).

    Ranges agree when every bound is within half a settable step of the other (1 % of the factor's span
    when it has no step; common practice, no source).
    """
    old = {f["name"]: f for f in entry["window"].get("factors", [])}
    new = {f["name"]: f for f in window.get("factors", [])} if window.get("found") else {}
    rows, agree = [], window.get("found", False)
    for f in spec.factors:
        a, b = old.get(f.name, {}), new.get(f.name, {})
        if f.is_categorical:   # the same levels named
            same = bool(a and b) and a.get("levels") == b.get("levels")
            agree = agree and same
            rows.append({"name": f.name, "unit": "", "record_low": ", ".join(a.get("levels", [])),
                         "record_high": None, "refit_low": ", ".join(b.get("levels", [])),
                         "refit_high": None, "same": same})
            continue
        tol = f.step / 2 if f.step else 0.01 * f.span
        same = bool(a and b) and all(abs(a[k] - b[k]) <= tol + 1e-12 for k in ("low", "high"))
        agree = agree and same
        rows.append({"name": f.name, "unit": f.unit, "record_low": a.get("low"), "record_high": a.get("high"),
                     "refit_low": b.get("low"), "refit_high": b.get("high"), "same": same})
    if agree:
        return Comparison(True, rows, "the refit agrees with the window of record")
    return Comparison(False, rows, _reason(entry, window))


def _reason(entry: dict, window: dict) -> str:
    then, now = entry.get("window", {}).get("provenance", {}), window.get("provenance", {})
    why = []
    n0, n1 = then.get("runs_completed"), now.get("runs_completed")
    if n0 is not None and n1 is not None and n0 != n1:
        why.append(f"the refit uses {n1} completed runs, the window of record {n0} (verification and later "
                   "runs change the models)")
    if then.get("inputs", {}).get("study.toml") != now.get("inputs", {}).get("study.toml"):
        why.append("study.toml changed since the verification")
    if then.get("confidence") != now.get("confidence"):
        why.append(f"confidence {now.get('confidence')} instead of {then.get('confidence')}")
    if then.get("confidence_applies_to") != now.get("confidence_applies_to"):
        why.append(f"confidence applies to {now.get('confidence_applies_to')}")
    if not window.get("found"):
        why.insert(0, "the refit finds no window")
    lead = ("the refit differs from the window of record, which stays the window of record until a new "
            "window is verified ('windowfinder testplan' then 'verify')")
    return lead + (": " + "; ".join(why) if why else "")


def record_block(entry: dict | None, window: dict, spec) -> dict | None:
    """The ``record`` key of a later window.json: the verified window, its verdict and the comparison."""
    if entry is None:
        return None
    cmp = compare(entry, window, spec)
    return {"confirmed": entry["confirmed"], "verdict": entry["verdict"],
            "verified_utc": entry["verified_utc"], "factors": entry["window"]["factors"],
            "agree": cmp.agree, "reason": cmp.reason}
