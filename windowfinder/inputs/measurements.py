"""Measured results typed in or returned in a file, merged into the planned runs by run id.

A results table has a ``run`` column and any of: response columns, ``status`` (``done`` or ``failed``),
``note`` (replaces the run's planning note when given), and factor columns (which must repeat the planned settings; they are checked, never changed).
Every row must name a run of runs.csv, once. A measured value already in runs.csv is only overwritten
with ``replace``; writing the same value again is not an overwrite, so recording one file twice is
harmless. A row without a status becomes ``done`` when it gives a value, and a row that gives neither
a value nor a status is refused. Every problem is one line naming the file, line and run; the merge
builds a new table in memory and the caller writes it atomically only when every row passed, so the
run table is byte-identical after any refusal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.cells import _number, row_cells
from windowfinder.inputs.runs import RunTable, check_transforms

RESULT_STATUSES = ("done", "failed")


@dataclass
class Recorded:
    """What a merge changed: the new table and counts for the summary."""

    frame: pd.DataFrame
    runs: list[str] = field(default_factory=list)
    values: int = 0
    failed: int = 0

    def to_dict(self) -> dict:
        return {"runs": self.runs, "values": self.values, "failed": self.failed}

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()


def _columns(header, table: RunTable, source: str) -> None:
    spec = table.spec
    allowed = ["run", *spec.response_names, "status", "note", *spec.factor_names]
    if "" in header:
        raise InputError(f"{source}: column {header.index('') + 1} has no name; name it or remove it")
    for c in header:
        if header.count(c) > 1:
            raise InputError(f"{source}: column '{c}' appears twice; keep one")
        if c not in allowed:
            hint = nearest(c, allowed, "allowed columns")
            raise InputError(f"{source}: column '{c}' is not a response of the study; {hint}")
    if "run" not in header:
        raise InputError(f"{source}: missing column 'run'; results are matched to runs.csv by run id")
    if not any(c in header for c in [*spec.response_names, "status"]):
        raise InputError(f"{source}: no response column and no status column; nothing to record "
                         "(responses are " + ", ".join(spec.response_names) + ")")


def merge_results(table: RunTable, header, rows, lines, source: str, replace: bool = False) -> Recorded:
    """Merge results rows (text cells) into ``table``; returns the new table, nothing is written.

    Parameters
    ----------
    table : the validated run table.
    header, rows, lines : column names, rows of text cells and each row's line number (for messages).
    source : file name used in messages.
    replace : allow overwriting a measured value or a done/failed status already in runs.csv.
    """
    spec = table.spec
    header = [str(c).strip() for c in header]
    _columns(header, table, source)
    if not rows:
        raise InputError(f"{source}: no result rows; add one row per measured run")
    frame = table.frame.copy()
    index = {run: i for i, run in zip(frame.index, frame["run"].astype(str))}
    col = {c: k for k, c in enumerate(header)}
    seen, out = {}, Recorded(frame)
    for cells, line in zip(rows, lines):
        cells, run, where = row_cells(cells, len(header), col["run"], source, line,
                                      "give the run id from runs.csv")
        if run in seen:
            raise InputError(f"{where}: run id '{run}' appears twice in the results (also line "
                             f"{seen[run]}); keep one row per run")
        seen[run] = line
        if run not in index:
            hint = nearest(run, list(index), otherwise="plan it first (windowfinder design)")
            raise InputError(f"{where}: run id '{run}' is not in "
                             f"{table.path.name if table.path else 'runs.csv'}; {hint}")
        i = index[run]
        _merge_row(frame, i, cells, col, spec, where, replace, out)
        out.runs.append(run)
    check_transforms(spec, frame, lambda i: f"{source} (run {frame.loc[i, 'run']})")
    return out


def _merge_row(frame, i, cells, col, spec, where, replace, out) -> None:
    old_status = frame.at[i, "status"]
    for f in spec.factors:  # factor columns are a check that the right run is meant, never a change
        if f.name in col and cells[col[f.name]].strip() and f.is_categorical:
            given_level, planned_level = cells[col[f.name]].strip(), f.label(frame.at[i, f.name])
            if given_level != cells[col[f.name]]:   # names never begin or end with a space
                raise InputError(f"{where}: '{f.name}' = '{cells[col[f.name]]}' has a space before or after "
                                 f"the level name; write '{given_level}' (level names are matched exactly)")
            if given_level not in f.levels and given_level.casefold() != planned_level.casefold():
                raise InputError(f"{where}: '{f.name}' = '{given_level}' is not a level of {f.name}; "
                                 f"{nearest(given_level, f.levels, 'levels are')}; the run was planned at "
                                 f"'{planned_level}'")
            if given_level != planned_level:
                hint = (f" (level names are case-sensitive: write '{planned_level}')"
                        if given_level.casefold() == planned_level.casefold() else "")
                raise InputError(f"{where}: '{f.name}' = '{given_level}' differs from the planned "
                                 f"'{planned_level}' in runs.csv{hint}; a result is recorded for the settings "
                                 "of its run (plan a new run for other settings)")
        elif f.name in col and cells[col[f.name]].strip():
            v = _number(cells[col[f.name]], where, f.name, allow_blank=False)
            planned = float(frame.at[i, f.name])
            if not math.isclose(v, planned, rel_tol=1e-9, abs_tol=1e-12 * f.span):
                raise InputError(f"{where}: '{f.name}' = {v:g} differs from the planned {planned:g} in "
                                 "runs.csv; a result is recorded for the settings of its run (plan a new "
                                 "run for other settings)")
    given = 0
    for r in spec.response_names:
        if r not in col:
            continue
        v = _number(cells[col[r]], where, r, allow_blank=True)
        if math.isnan(v):
            continue
        old = float(frame.at[i, r])
        if math.isfinite(old) and old != v and not replace:
            raise InputError(f"{where}: '{r}' already holds {old:g} in runs.csv; give --replace to "
                             f"overwrite it with {v:g}")
        frame.at[i, r] = v
        given += 1
    status = cells[col["status"]].strip().lower() if "status" in col else ""
    if status and status not in RESULT_STATUSES:
        raise InputError(f"{where}: status '{status}' unknown for a result; use done or failed")
    if not status:
        if not given:
            raise InputError(f"{where}: no measured value and no status; fill a response or give "
                             "status failed")
        status = "done" if old_status == "planned" else old_status
    if old_status != "planned" and status != old_status and not replace:
        raise InputError(f"{where}: run is already '{old_status}' in runs.csv; give --replace to make it "
                         f"'{status}'")
    frame.at[i, "status"] = status
    note = cells[col["note"]].strip() if "note" in col else ""
    if note:  # a note given with the result replaces the planning note
        frame.at[i, "note"] = note
    out.values += given
    out.failed += status == "failed"


def frame_rows(results: pd.DataFrame):
    """A results DataFrame as header, text rows and row numbers (numbers written so they read back
    exactly), for :func:`merge_results`."""
    def cell(v):
        if v is None or (np.ndim(v) == 0 and pd.isna(v)):
            return ""
        if isinstance(v, (float, np.floating)):
            return repr(float(v))
        return str(v)

    header = [str(c) for c in results.columns]
    rows = [[cell(v) for v in rec] for rec in results.itertuples(index=False)]
    return header, rows, list(range(1, len(rows) + 1))
