"""Table files as text cells: a CSV (or XLSX) file read into its header and rows of text, and one cell
parsed into a number or a level index, each refusal one line naming the file, the row and the column.

Shared by the run table (:mod:`windowfinder.inputs.runs`), results typed in
(:mod:`windowfinder.inputs.measurements`) and filled-in test plans (:mod:`windowfinder.answers.testplan`).
"""

from __future__ import annotations

import csv
import io
import math
import re
from pathlib import Path

import pandas as pd

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.spec import MAX_MAGNITUDE
from windowfinder.inputs.storage import read_bytes


def _read_text(path: Path) -> str:
    data = read_bytes(path, "table")
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise InputError(f"{path.name}: saved as UTF-16 text; save the table as CSV UTF-8")
    if b"\x00" in data:
        raise InputError(f"{path.name}: binary file (or UTF-16 text), not a CSV table; export the runs "
                         "as CSV UTF-8")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        line = data[:e.start].count(b"\n") + 1
        raise InputError(f"{path.name} line {line}: not UTF-8 text (byte 0x{data[e.start]:02x}); save the "
                         "table as CSV UTF-8") from None


def _raw_rows(path: Path) -> tuple[list[str], list[list[str]], list[int]]:
    """Header, rows of text cells, and each row's line number in the file."""
    if path.suffix.lower() in (".xlsx", ".xlsm"):
        read_bytes(path, "workbook")  # a folder, FIFO or dangling link is refused first
        try:
            import openpyxl  # noqa: F401
        except ImportError:
            raise InputError(f"{path.name}: reading .xlsx needs openpyxl; pip install 'windowfinder[xlsx]' "
                             "or save the sheet as CSV") from None
        try:
            df = pd.read_excel(path, dtype=str, keep_default_na=False, engine="openpyxl")
        except Exception as e:  # openpyxl raises many types for a damaged file
            raise InputError(f"{path.name}: cannot read the workbook ({type(e).__name__}); "
                             "save it again or export CSV") from None
        header = [str(c) for c in df.columns]
        rows = [[str(v) for v in r] for r in df.itertuples(index=False)]
        return header, rows, list(range(2, len(rows) + 2))
    text = _read_text(path)
    if not text.strip():
        raise InputError(f"{path.name}: empty file; it needs a header line: run, factor and response columns")
    reader = csv.reader(io.StringIO(text, newline=""))  # the csv module handles \n, \r\n and \r
    lines = []
    try:
        for rec in reader:
            lines.append((reader.line_num, rec))
    except csv.Error as e:
        raise InputError(f"{path.name} line {reader.line_num}: malformed CSV ({e}); check for an "
                         "unclosed quote") from None
    lines = [(n, r) for n, r in lines if any(c.strip() for c in r)]
    if not lines:
        raise InputError(f"{path.name}: no header line, only empty cells; it needs run, factor and "
                         "response columns")
    header = [c.strip() for c in lines[0][1]]
    for sep, word in ((";", "';'"), ("\t", "tabs")):
        if sum(c.count(sep) for c in header) >= max(1, len(header) - 1):
            raise InputError(f"{path.name}: the columns are separated by {word}; save the file "
                             "comma-separated (with '.' as decimal point)")
    return header, [r for _, r in lines[1:]], [n for n, _ in lines[1:]]


def _number(cell: str, where: str, column: str, allow_blank: bool) -> float:
    s = cell.strip()
    if s == "":
        if allow_blank:
            return math.nan
        raise InputError(f"{where}: '{column}' is empty; every run needs all factor settings")
    try:
        v = float(s)
    except ValueError:
        hint = " (decimal comma? use '.')" if re.fullmatch(r"-?\d+,\d+", s) else ""
        raise InputError(f"{where}: '{column}' = '{s}' is not a number{hint}; fix the cell") from None
    if not math.isfinite(v):
        raise InputError(f"{where}: '{column}' = '{s}' is not finite; enter a measured value or leave "
                         "it blank")
    if abs(v) > MAX_MAGNITUDE:
        raise InputError(f"{where}: '{column}' = {v:g} is out of range (magnitude above "
                         f"{MAX_MAGNITUDE:g}); check the cell or change units")
    return v


def level_value(cell: str, where: str, factor) -> float:
    """Level index (as a float, the natural value inside) of a categorical factor's cell (a level name)."""
    s = cell.strip()
    if s == "":
        raise InputError(f"{where}: '{factor.name}' is empty; every run needs all factor settings (one of "
                         + ", ".join(factor.levels) + ")")
    if s != cell and s in factor.levels:   # names never begin or end with a space (inputs/names.py)
        raise InputError(f"{where}: '{factor.name}' = '{cell}' has a space before or after the level name; "
                         f"write '{s}' (level names are matched exactly)")
    if s not in factor.levels:
        raise InputError(f"{where}: '{factor.name}' = '{s}' is not one of its levels; "
                         + nearest(s, factor.levels, "levels are") + "; fix the cell")
    return float(factor.levels.index(s))


def row_cells(cells, n_columns: int, run_column: int, name: str, line: int, empty_hint: str):
    """One table row: cells padded to the header, its run id and the ``where`` of its messages.

    Refuses a row with more cells than columns and a row without a run id (one line naming the line).
    """
    cells = [str(c) for c in cells] + [""] * (n_columns - len(cells))
    if len(cells) > n_columns:
        raise InputError(f"{name} line {line}: {len(cells)} cells but {n_columns} columns; "
                         "check for stray commas or a decimal comma")
    run = cells[run_column].strip()
    if not run:
        raise InputError(f"{name} line {line}: empty run id; {empty_hint}")
    return cells, run, f"{name} line {line} (run {run})"


def _measured(cell: str, where: str, response) -> tuple[float, float]:
    """``(value, below)`` of a response cell: ``(v, nan)`` measured, ``(nan, c)`` for ``<c`` (or for 0
    when the response has a detection limit ``c``), ``(nan, nan)`` blank."""
    s = cell.strip()
    if s.startswith("<"):
        c = _number(s[1:], where, response.name, allow_blank=False)
        floor = response.bounds[0] if response.bounds else (0.0 if response.transform == "log" else None)
        if floor is not None and c <= floor:
            raise InputError(f"{where}: '{response.name}' = '{s}': a value below {c:g} cannot be modelled "
                             f"with transform = '{response.transform}' (nothing lies below {floor:g}); write "
                             "the detection limit, e.g. <0.5")
        return math.nan, c
    v = _number(s, where, response.name, allow_blank=True)
    if response.detection_limit is not None and v == 0:
        return math.nan, float(response.detection_limit)
    return v, math.nan
