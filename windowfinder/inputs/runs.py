"""The run table (runs.csv): one row per run, validated against the study.

Columns: ``run`` (unique id), one per factor, one per response, optional ``status``
(``done`` | ``planned`` | ``failed``), optional ``block`` (day, lot, operator: a label; runs of one block
share a random offset, :mod:`windowfinder.models.blocks`), optional ``failed_limit`` and optional ``note``.
Units live in study.toml. Empty response cells on a ``done`` run mean "not measured"; a ``failed`` run gave
no usable product and feeds the failure model, unless its ``failed_limit`` names the limit it broke
(``response``, or ``response:min`` / ``response:max`` when the response has both): then it is a censored
value of that response beyond its limit and not a failure-model run. A response cell ``<10`` reads "below
10" (a value under the detection limit), and so does a ``0`` when the response has a ``detection_limit``:
such values are censored observations too, not numbers. Every problem is refused with one line naming
the file, the row (line number and run id)
and the column (the file read as text cells and each cell parsed in :mod:`windowfinder.inputs.cells`). The
file is only ever appended to or rewritten atomically (temporary file, fsync, rename): a command that fails
leaves it byte-identical.
"""

from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.cells import _measured, _number, _raw_rows, _read_text, level_value, row_cells
from windowfinder.inputs.spec import StudySpec
from windowfinder.inputs.storage import readable_file, write_atomic

STATUSES = ("done", "planned", "failed")
BLOCK = "block"
FAILED_LIMIT = "failed_limit"


def below_column(name: str) -> str:
    """Frame column holding, per run, the bound a censored value of response ``name`` lies below."""
    return f"<{name}"
# A setting more than this many factor ranges outside low..high is taken for a typo, not an old run from a
# wider range (common practice, no source).
FAR_OUTSIDE = 10.0
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def plain_cell(v) -> str:
    """Text of a cell as it is: blank for None/NaN, numbers as numbers, text verbatim."""
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool):
        f = float(v)
        return str(int(f)) if f.is_integer() and abs(f) < 1e15 else repr(f)
    return str(v)


def safe_cell(v) -> str:
    """Text for a cell of an exported table, neutralised against spreadsheet formula injection.

    A text cell starting with = + - @ (or a tab / carriage return) is prefixed with an apostrophe, as
    recommended by the OWASP "CSV Injection" guidance; numbers are written as numbers. Used for the
    tables written for spreadsheets (design, next runs, trade-off, test plan), never for runs.csv, the
    user's own data, which is written verbatim.
    """
    s = plain_cell(v)
    if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool):
        return s
    return "'" + s if s.startswith(_FORMULA_START) else s


@dataclass
class RunTable:
    """Validated runs of one study (natural units), plus the warnings found while reading."""

    frame: pd.DataFrame
    spec: StudySpec
    path: Path | None = None
    warnings: list[str] = field(default_factory=list)

    @property
    def status(self) -> pd.Series:
        return self.frame["status"]

    def done(self) -> pd.DataFrame:
        return self.frame[self.status == "done"]

    def failed(self) -> pd.DataFrame:
        return self.frame[self.status == "failed"]

    def broken_limits(self, frame: pd.DataFrame | None = None) -> pd.Series:
        """``"response:min"`` / ``"response:max"`` for failed runs that name the limit they broke, else ""."""
        frame = self.frame if frame is None else frame
        return frame[FAILED_LIMIT].fillna("").astype(str)

    def planned(self) -> pd.DataFrame:
        return self.frame[self.status == "planned"]

    def completed(self) -> pd.DataFrame:
        """Runs that carry information: done and failed."""
        return self.frame[self.status.isin(["done", "failed"])]

    def blocks(self, frame: pd.DataFrame | None = None) -> np.ndarray | None:
        """Block label of each run, or None when the table has no block labels."""
        frame = self.frame if frame is None else frame
        if BLOCK not in self.frame.columns or not (self.frame[BLOCK].fillna("").astype(str) != "").any():
            return None
        return frame[BLOCK].fillna("").astype(str).to_numpy()

    def below(self, name: str, frame: pd.DataFrame | None = None) -> np.ndarray:
        """Per run, the bound response ``name`` is known to lie below (``<10`` cells); NaN elsewhere."""
        frame = self.frame if frame is None else frame
        col = below_column(name)
        return frame[col].to_numpy(dtype=float) if col in frame.columns else np.full(len(frame), np.nan)

    def X(self, frame: pd.DataFrame | None = None) -> np.ndarray:
        frame = self.frame if frame is None else frame
        return frame[self.spec.factor_names].to_numpy(dtype=float)

    def X_coded(self, frame: pd.DataFrame | None = None) -> np.ndarray:
        return self.spec.to_coded(self.X(frame)).reshape(-1, self.spec.d)

    def outside(self) -> pd.Series:
        """Runs whose settings lie outside the study bounds (kept; flagged as extrapolation)."""
        U = self.X_coded()
        out = ((U < -1e-9) | (U > 1 + 1e-9)).any(axis=1)
        return pd.Series(out, index=self.frame.index)

    def breaking(self) -> pd.Series:
        """Names of the constraints between factors each run breaks (kept; empty list when none)."""
        return pd.Series(self.spec.linear.broken(self.X_coded()), index=self.frame.index, dtype=object)

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()

    def __len__(self) -> int:
        return len(self.frame)


def empty_table(spec: StudySpec) -> pd.DataFrame:
    cols = ["run", *spec.factor_names, *spec.response_names, "status", BLOCK, FAILED_LIMIT, "note"]
    df = pd.DataFrame({c: pd.Series(dtype=float) for c in cols})
    df["run"] = df["run"].astype(str)
    df["status"] = df["status"].astype(str)
    df[BLOCK] = df[BLOCK].astype(str)
    df[FAILED_LIMIT] = df[FAILED_LIMIT].astype(str)
    for r in spec.response_names:
        df[below_column(r)] = pd.Series(dtype=float)
    df["note"] = df["note"].astype(str)
    return df


def read_runs(path, spec: StudySpec) -> RunTable:
    """Read and validate a run table (CSV, or XLSX when openpyxl is installed)."""
    path = Path(path)
    if not readable_file(path, "run table"):  # absent: an empty table (a dangling link is refused)
        return RunTable(empty_table(spec), spec, path)
    header, rows, line_nos = _raw_rows(path)
    name = path.name
    if "" in header:
        raise InputError(f"{name}: column {header.index('') + 1} has no name; name it or remove the "
                         "stray comma in the header line")
    if len(set(header)) != len(header):
        dup = next(c for c in header if header.count(c) > 1)
        raise InputError(f"{name}: column '{dup}' appears twice; keep one")
    known = ["run", *spec.factor_names, *spec.response_names, "status", BLOCK, FAILED_LIMIT, "note"]
    for c in header:
        if c not in known:
            hint = nearest(c, known, "allowed")
            raise InputError(f"{name}: unknown column '{c}'; {hint} (put remarks in 'note')")
    for c in ["run", *spec.factor_names]:
        if c not in header:
            raise InputError(f"{name}: missing column '{c}'; the table needs run, "
                             + ", ".join(spec.factor_names) + " and response columns")
    col = {c: i for i, c in enumerate(header)}
    records, seen, warnings, lines_of = [], {}, [], []
    for cells, line in zip(rows, line_nos):
        cells, run, where = row_cells(cells, len(header), col["run"], name, line,
                                      "give every run a unique id")
        if run in seen:
            raise InputError(f"{where}: duplicate run id '{run}' (also on line {seen[run]}); "
                             "make ids unique")
        seen[run] = line
        status = cells[col["status"]].strip().lower() if "status" in col else ""
        status = status or "done"
        if status not in STATUSES:
            raise InputError(f"{where}: status '{status}' unknown; use done, planned or failed")
        broke = cells[col[FAILED_LIMIT]].strip() if FAILED_LIMIT in col else ""
        rec = {"run": run, "status": status, BLOCK: cells[col[BLOCK]].strip() if BLOCK in col else "",
               FAILED_LIMIT: _failed_limit(broke, status, spec, where),
               "note": cells[col["note"]].strip() if "note" in col else ""}
        if BLOCK in col and not rec[BLOCK] and status != "planned":
            raise InputError(f"{where}: '{BLOCK}' is empty; give every run made its block label (day, lot, "
                             f"operator) or remove the {BLOCK} column")
        for f in spec.factors:
            if f.is_categorical:
                rec[f.name] = level_value(cells[col[f.name]], where, f)
                continue
            rec[f.name] = v = _number(cells[col[f.name]], where, f.name, allow_blank=False)
            if not -FAR_OUTSIDE <= f.to_coded(v) <= 1 + FAR_OUTSIDE:
                raise InputError(f"{where}: '{f.name}' = {v:g} lies far outside the study range "
                                 f"{f.low:g} .. {f.high:g} (more than {FAR_OUTSIDE:g} times its width); "
                                 "check the cell or widen low/high in study.toml")
        for r in spec.responses:
            rec[r.name], rec[below_column(r.name)] = _measured(cells[col[r.name]] if r.name in col else "",
                                                               where, r)
        records.append(rec)
        lines_of.append(line)
    frame = pd.DataFrame.from_records(records, columns=known + [below_column(r) for r in spec.response_names])
    if frame.empty:
        frame = empty_table(spec)
    table = RunTable(frame, spec, path, warnings)
    out = table.outside()
    if out.any():
        ids = ", ".join(frame.loc[out, "run"].astype(str).tolist()[:10])
        warnings.append(f"{name}: runs outside the study bounds (kept, treated as extrapolation): {ids}")
    if spec.constraints and len(frame):
        broken = table.breaking()
        for con in spec.constraints:
            ids = frame.loc[[con.name in b for b in broken], "run"].astype(str).tolist()
            if ids:
                more = f" and {len(ids) - 10} more" if len(ids) > 10 else ""
                warnings.append(f"{name}: runs breaking constraint '{con.name}' ({con.text()}), kept and "
                                f"flagged; never repeat them: {', '.join(ids[:10])}{more}")
    warnings += _spread_warnings(table, name)
    check_transforms(spec, frame, lambda i: f"{name} line {lines_of[i]} (run {frame.loc[i, 'run']})")
    return table


def check_transforms(spec: StudySpec, frame: pd.DataFrame, where) -> None:
    """Refuse a measured value of a done run beyond the physical bounds of its response's transform.

    ``where(i)`` names the row with frame index ``i`` for the one-line message.
    """
    for r in spec.responses:
        if r.transform != "none":
            done = frame[frame["status"] == "done"][r.name].dropna()
            lo, hi = r.bounds if r.bounds else (0.0, math.inf)
            # a value AT a bound is kept (models.transform moves it inside); beyond it is an error
            strict = done[(done < lo) | (done > hi)] if r.transform == "logit" else done[done < lo]
            if len(strict):
                raise InputError(f"{where(strict.index[0])}: '{r.name}' = {strict.iloc[0]:g} lies beyond "
                                 f"the physical bounds of transform = '{r.transform}'; check the value or "
                                 "the bounds in study.toml")


def _failed_limit(text: str, status: str, spec: StudySpec, where: str) -> str:
    """Validate a ``failed_limit`` cell; ``"response:min"`` / ``"response:max"`` or ""."""
    if not text:
        return ""
    if status != "failed":
        raise InputError(f"{where}: {FAILED_LIMIT} '{text}' is set but status is '{status}'; set status = "
                         f"failed or clear the {FAILED_LIMIT} cell")
    name, _, side = (p.strip() for p in text.partition(":"))
    names = [r.name for r in spec.responses if r.has_limits]
    if name not in spec.response_names:
        hint = nearest(name, names, "responses with limits")
        raise InputError(f"{where}: {FAILED_LIMIT} '{text}' names no response of the study; {hint}")
    r = next(r for r in spec.responses if r.name == name)
    sides = [s for s, v in (("min", r.min), ("max", r.max)) if v is not None]
    if not sides:
        raise InputError(f"{where}: {FAILED_LIMIT} '{text}': response '{name}' has no min or max in "
                         "study.toml; name a limited response or clear the cell")
    if not side:
        if len(sides) == 2:
            raise InputError(f"{where}: {FAILED_LIMIT} '{text}': '{name}' has both a min and a max; write "
                             f"{name}:min or {name}:max")
        side = sides[0]
    if side not in sides:
        raise InputError(f"{where}: {FAILED_LIMIT} '{text}': '{name}' has no {side} limit; use "
                         + " or ".join(f"{name}:{s}" for s in sides))
    return f"{name}:{side}"


VIF_MAX = 10.0  # Montgomery, Peck & Vining (2012), Introduction to Linear Regression Analysis, §9.4.2


def variance_inflation(U: np.ndarray) -> np.ndarray:
    """Variance inflation factor of each column: ``1 / (1 - R_j^2)``, ``R_j^2`` from regressing column
    ``j`` on the others with an intercept (Montgomery, Peck & Vining 2012, §9.4.2); inf when exact."""
    n, d = U.shape
    vif = np.ones(d)
    for j in range(d):
        y = U[:, j] - U[:, j].mean()
        A = np.column_stack([np.ones(n), np.delete(U, j, axis=1)])
        resid = y - A @ np.linalg.lstsq(A, y, rcond=None)[0]
        ss_res, ss_tot = float(resid @ resid), float(y @ y)
        vif[j] = np.inf if ss_res <= 1e-12 * ss_tot else ss_tot / ss_res
    return vif


def _spread_warnings(table: RunTable, name: str) -> list[str]:
    """Factors the completed runs cannot tell apart: one level only, or strongly correlated."""
    spec = table.spec
    U = table.X_coded(table.completed())
    n = len(U)
    if n < 2:
        return []
    out, varied = [], []
    for j, f in enumerate(spec.factors):
        if np.ptp(U[:, j]) <= 1e-12:
            out.append(f"{name}: factor '{f.name}' has one level ({table.X(table.completed())[0, j]:g}) in "
                       f"all {n} completed runs; the models cannot learn its effect, so any answer along "
                       f"'{f.name}' is a guess; vary it or remove it from the study")
        else:
            varied.append(j)
    if len(varied) >= 2 and n >= len(varied) + 2:
        vif = variance_inflation(U[:, varied])
        bad = [(spec.factors[j].name, v) for j, v in zip(varied, vif) if v > VIF_MAX]
        if bad:
            worst = max(v for _, v in bad)
            size = "exactly collinear" if np.isinf(worst) else f"VIF = {worst:.4g}"
            out.append(f"{name}: factors " + ", ".join(f"'{b}'" for b, _ in bad)
                       + f" move together in the completed runs ({size}); the models cannot separate "
                       "their effects; add runs that vary them independently")
    return out


def format_rows(frame: pd.DataFrame, header: list[str], guard: bool = False) -> str:
    """CSV text (no header) of ``frame`` in ``header`` order, quoted by the csv module; with ``guard``
    text cells are neutralised against formula injection (:func:`safe_cell`), else written verbatim."""
    cell = safe_cell if guard else plain_cell
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    for rec in frame.to_dict("records"):
        w.writerow([cell(rec.get(c)) for c in header])
    return buf.getvalue()


def format_header(header, guard: bool = False) -> str:
    """The CSV header line of ``header`` (names quoted where needed; neutralised with ``guard``)."""
    cell = safe_cell if guard else plain_cell
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([cell(str(c)) for c in header])
    return buf.getvalue()


def format_table(frame: pd.DataFrame, guard: bool = True) -> str:
    """A whole CSV table, header included; ``guard`` (default) for tables exported to spreadsheets."""
    header = [str(c) for c in frame.columns]
    body = frame.copy()
    body.columns = header
    return format_header(header, guard) + format_rows(body, header, guard)


def next_ids(existing, k: int, prefix: str = "R") -> list[str]:
    """``k`` new run ids ``R001``... continuing after the largest numbered id in ``existing``."""
    nums = [int(m.group(1)) for e in existing if (m := re.fullmatch(rf"{prefix}(\d+)", str(e)))]
    start = max(nums, default=0) + 1
    width = max(3, len(str(start + k)))
    return [f"{prefix}{i:0{width}d}" for i in range(start, start + k)]


def append_runs(path, spec: StudySpec, new: pd.DataFrame) -> None:
    """Append rows to the run table, creating it when absent; the old bytes are kept verbatim."""
    path = Path(path)
    if path.suffix.lower() != ".csv":
        raise InputError(f"{path.name}: windowfinder only appends to a CSV run table; save it as runs.csv")
    if readable_file(path, "run table"):
        old = _read_text(path)
        header, _, _ = _raw_rows(path)
        missing = [c for c in new.columns if c not in header and new[c].notna().any()
                   and (new[c].astype(str) != "").any()]
        if missing:  # widen the table: rewrite it whole with the new columns
            table = read_runs(path, spec)
            frame = pd.concat([table.frame, new], ignore_index=True)
            write_runs(path, spec, frame)
            return
        if old and not old.endswith("\n"):
            old += "\n"
        write_atomic(path, old + format_rows(spec.labelled(new), header))
    else:
        write_runs(path, spec, new)


def write_runs(path, spec: StudySpec, frame: pd.DataFrame) -> None:
    """Rewrite the whole run table atomically (standard column order)."""
    header = ["run", *spec.factor_names, *spec.response_names, "status", "note"]
    if BLOCK in frame.columns and (frame[BLOCK].fillna("").astype(str) != "").any():
        header.insert(-1, BLOCK)   # only when used, so tables without blocks stay as they were
    if FAILED_LIMIT in frame.columns and (frame[FAILED_LIMIT].fillna("").astype(str) != "").any():
        header.insert(-1, FAILED_LIMIT)   # only when used, so tables without it stay as they were
    frame = spec.labelled(frame)   # categorical factors as their level names
    for r in spec.response_names:   # censored values are written back as "<bound"
        below = frame[below_column(r)].to_numpy(dtype=float) if below_column(r) in frame.columns else None
        if below is not None and np.isfinite(below).any():
            frame[r] = frame[r].astype(object)
            frame.loc[np.isfinite(below), r] = [f"<{plain_cell(v)}" for v in below[np.isfinite(below)]]
    text = format_header(header) + format_rows(frame, header)
    write_atomic(path, text)
