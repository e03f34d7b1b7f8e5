"""Bad input is refused, never crashes: generated study files and run tables through the command line.

Property-based tests (Hypothesis) build malformed ``study.toml`` and ``runs.csv`` files — wrong types,
missing and unknown keys, NaN/inf, huge values, binary bytes, duplicate ids and names, contradictory
limits, latin-1 / UTF-16 / BOM encodings, ';'-separated CSV, decimal commas, ragged rows, stray quotes,
very long lines, unicode names — and run ``check``, ``fit`` and ``window`` on them in-process. The
design's file contracts (DESIGN.md, "CLI verbs" and "runs.csv") are the expectation: exit 0, or exit 2
with a short message naming the file; never exit 1 or a traceback; input files byte-identical; ``out/``
only on success; JSON output strict (no NaN / Infinity tokens).

A second group drives numerically awkward but valid data through the Python API (duplicate settings, a
constant response, a factor held at one level, values at 1e-9 and 1e9, strongly correlated factors, all
runs failed, one usable run) and checks each against a closed form or an exact invariance.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import re
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.linear_model import LinearRegression
from threadpoolctl import threadpool_limits

from windowfinder.answers import build_window
from windowfinder.cli import main
from windowfinder.errors import InputError
from windowfinder.inputs.spec import Factor, StudySpec
from windowfinder.study import Study
from conftest import check_window_document

INPUTS = ("study.toml", "runs.csv")


@pytest.fixture(autouse=True, scope="module")
def one_blas_thread():
    """Run as the console script does: windowfinder/__init__.py asks for single-threaded BLAS, but only
    takes effect when it is imported before NumPy, which pytest does not guarantee; multi-threaded BLAS on
    these tiny matrices makes every fit several times slower on a busy machine."""
    with threadpool_limits(1, user_api="blas"):
        yield

FUZZ = settings(deadline=None, derandomize=True, database=None, print_blob=False,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

# ------------------------------------------------------------------------------------------------
# running a verb and checking the outcome against the CLI contract
# ------------------------------------------------------------------------------------------------


def run_verb(d: Path, verb: str, *opts: str):
    """``windowfinder VERB d [opts]`` in-process: exit code, stdout, stderr, numeric-warning texts."""
    out, err = io.StringIO(), io.StringIO()
    with warnings.catch_warnings(record=True) as caught, \
            contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        warnings.simplefilter("always", RuntimeWarning)
        code = main([verb, str(d), *opts])
    numeric = [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)]
    return code, out.getvalue(), err.getvalue(), numeric


def input_bytes(d: Path) -> dict:
    return {n: (d / n).read_bytes() for n in INPUTS if (d / n).exists()}


def strict_json(path: Path):
    """Parse JSON refusing the non-standard NaN / Infinity tokens Python would otherwise accept."""
    def refuse(token):
        raise AssertionError(f"{path.name} holds the non-JSON number {token}")
    return json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)


def check_outcome(d: Path, verb: str, result, before: dict) -> int:
    """Assert the contract of one CLI call; returns its exit code."""
    code, out, err, numeric = result
    assert code in (0, 2), f"{verb}: exit {code}; stderr: {err[-600:]}"
    assert "Traceback" not in err and "Traceback" not in out
    assert input_bytes(d) == before, f"{verb} changed an input file"
    extra = {p.relative_to(d).as_posix() for p in d.rglob("*")} - set(INPUTS)
    if code == 2:
        lines = err.strip().splitlines()
        assert 1 <= len(lines) <= 3, f"{verb}: {len(lines)} stderr lines: {err[-600:]}"
        assert lines[-1].startswith("windowfinder: "), lines
        assert "study.toml" in lines[-1] or "runs.csv" in lines[-1], f"{verb}: names no file: {lines[-1]}"
        assert not extra, f"{verb} failed but wrote {sorted(extra)}"
    else:
        assert all(e == "out" or e.startswith("out/") for e in extra), sorted(extra)
        assert not numeric, f"{verb}: numeric warnings {numeric[:3]}"
        if verb == "fit":
            check_fit_json(strict_json(d / "out" / "fit.json"))
        if verb == "window":
            check_window_json(strict_json(d / "out" / "window.json"))
    return code


def check_fit_json(fit: dict):
    for r in fit["responses"]:
        for key in ("n", "loo_rmse", "coverage95", "noise_sd"):
            assert isinstance(r[key], (int, float)), (r["response"], key, r[key])
        # Q2 = 1 - PRESS/SS_tot is undefined only when SS_tot = 0 (Allen 1974), i.e. all values equal
        if r["loo_q2"] is None:
            assert np.ptp(r["measured"]) == 0, r["response"]


def check_window_json(win: dict):
    check_window_document(win)  # the shipped JSON Schema (draft 2020-12)
    assert isinstance(win["found"], bool)
    assert 0 < win["confidence"] < 1
    assert isinstance(win["min_probability"], (int, float)) and 0 <= win["min_probability"] <= 1
    for f in win["factors"]:
        assert isinstance(f["low"], (int, float)) and isinstance(f["high"], (int, float))
        assert f["low"] <= f["high"], f
    for p in win["predicted"]:
        assert all(isinstance(p[k], (int, float)) for k in ("low", "high", "pi95_low", "pi95_high")), p


def exercise(files: dict, verb: str) -> list[int]:
    """Write ``files`` to a fresh folder and run check, then (on a share) fit or window.

    When ``check`` refuses the input, ``fit`` and ``window`` must refuse it too (they fail at loading,
    so this costs nothing); when it passes, ``verb`` decides whether the expensive steps run.
    """
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        for name, data in files.items():
            (d / name).write_bytes(data)
        before = input_bytes(d)
        codes = [check_outcome(d, "check", run_verb(d, "check"), before)]
        if codes[0] == 2:
            codes += [check_outcome(d, v, run_verb(d, v), before) for v in ("fit", "window")]
            assert codes == [2, 2, 2]
        elif verb == "fit":
            codes.append(check_outcome(d, "fit", run_verb(d, "fit", "--restarts", "0"), before))
        elif verb == "window":
            codes.append(check_outcome(d, "window", run_verb(d, "window"), before))
        return codes


# ------------------------------------------------------------------------------------------------
# a small valid study and run table, serialised by hand so that the fuzzer can break them anywhere
# ------------------------------------------------------------------------------------------------

BASE_STUDY = {
    "study": {"name": "fuzz", "confidence": 0.9, "seed": 5},
    "factor": [
        {"name": "temperature", "unit": "degC", "low": 40.0, "high": 90.0, "step": 0.5, "tolerance": 1.0},
        {"name": "time", "unit": "min", "low": 30.0, "high": 180.0},
    ],
    "response": [
        {"name": "yield", "unit": "%", "goal": "maximize", "min": 80.0, "transform": "logit",
         "bounds": [0, 100]},
        {"name": "exotherm", "unit": "K", "max": 50.0, "kind": "safety"},
    ],
}
BASE_HEADER = ["run", "temperature", "time", "yield", "exotherm", "status", "note"]
BASE_ROWS = [
    ["R001", "50", "60", "78.1", "20.5", "done", ""],
    ["R002", "60", "90", "82.3", "30.1", "done", ""],
    ["R003", "70", "120", "85.0", "41.2", "done", "first try"],
    ["R004", "80", "150", "88.5", "55.0", "done", ""],
    ["R005", "45", "170", "79.0", "26.0", "done", ""],
]


def _toml_key(k) -> str:
    return _toml_value(str(k))


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
    if isinstance(v, str):  # TOML basic string: JSON escapes plus DEL, which TOML also forbids raw
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007F")
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(a)} = {_toml_value(b)}" for a, b in v.items()) + "}"
    return v.isoformat()  # date / datetime: TOML local date(-time) literal


def toml_text(doc: dict) -> str:
    """A TOML document for ``doc`` (keys whose value is None are left out)."""
    head, tables = [], []
    for k, v in doc.items():
        if v is None:
            continue
        if k == "study" and isinstance(v, dict):
            tables.append(f"[{_toml_key(k)}]")
            tables += [f"{_toml_key(a)} = {_toml_value(b)}" for a, b in v.items() if b is not None]
        elif isinstance(v, list) and v and all(isinstance(t, dict) for t in v):
            for t in v:
                tables.append(f"\n[[{_toml_key(k)}]]")
                tables += [f"{_toml_key(a)} = {_toml_value(b)}" for a, b in t.items() if b is not None]
        else:
            head.append(f"{_toml_key(k)} = {_toml_value(v)}")
    return "\n".join(head + tables) + "\n"


def csv_text(table: list[list[str]], sep: str = ",", eol: str = "\n") -> str:
    """Rows joined by hand (no quoting added), so malformed quoting survives."""
    return eol.join(sep.join(r) for r in table) + eol


BASE_CODED = [[0.2, 0.2], [0.4, 0.4], [0.6, 0.6], [0.8, 0.8], [0.1, 14 / 15]]  # BASE_ROWS factors, coded


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _bounds(t) -> tuple[float, float] | None:
    lo, hi = (t.get("low"), t.get("high")) if isinstance(t, dict) else (None, None)
    ok = all(_is_number(v) and abs(v) < 1e100 and math.isfinite(v) for v in (lo, hi))
    return (float(lo), float(hi)) if ok and lo < hi else None


def runs_for(doc: dict, scales=(1.0, 1.0)) -> str:
    """The base run table for ``doc``: its factor and response names, the base runs' coded settings
    placed inside its factor bounds, response values multiplied by ``scales``."""
    header = list(BASE_HEADER)
    rows = [list(r) for r in BASE_ROWS]
    for kind, first in (("factor", 1), ("response", 3)):
        tables = doc.get(kind)
        if not isinstance(tables, list):
            continue
        for i, t in enumerate(tables[:2]):
            if isinstance(t, dict) and isinstance(t.get("name"), str):
                header[first + i] = t["name"].strip()
            b = _bounds(t) if kind == "factor" else None
            for k, r in enumerate(rows):
                if b is not None:
                    r[first + i] = repr(b[0] + BASE_CODED[k][i] * (b[1] - b[0]))
                elif kind == "response" and r[first + i]:
                    r[first + i] = repr(float(r[first + i]) * scales[i])
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows([header, *rows])
    return buf.getvalue()


# ------------------------------------------------------------------------------------------------
# strategies
# ------------------------------------------------------------------------------------------------

NASTY_NAMES = ["run", "Status", "note", " ", "", "yield", "time", "a,b", 'q"uote', "tab\tname",
               "line\nbreak", "ünïcödé", "温度", "température", "😀", "=cmd|' /C calc'!A0", "x" * 3000,
               "\u200b", "ß", "Ω-resistance", "\x01ctrl"]
names = st.one_of(st.sampled_from(NASTY_NAMES), st.text(max_size=12))
weird_values = st.one_of(
    st.booleans(),
    st.integers(-3, 3),
    st.integers(min_value=-2**63, max_value=2**63 - 1),
    st.sampled_from([10**30, 10**400, -10**400, 2**64]),
    st.floats(),
    st.sampled_from([math.nan, math.inf, -math.inf, 0.0, -0.0, 5e-324, 1e-320, 1e-9, 1e9, 1e300,
                     -1e308, 1.7976931348623157e308, 0.5, 0.95, 1.0, 100.0]),
    names,
    st.sampled_from(["maximize", "minimize", "target", "none", "safety", "quality", "log", "logit",
                     "MAXIMIZE", " none", "nan", "1e3", "40"]),
    st.lists(st.one_of(st.integers(-5, 200), st.floats(), st.text(max_size=3)), max_size=3),
    st.dictionaries(st.text(max_size=4), st.integers(), max_size=2),
    st.dates(),
    st.datetimes(),
)
STUDY_KEYS = ["name", "confidence", "seed", "description", "nmae", "seeds"]
FACTOR_KEYS = ["name", "unit", "low", "high", "step", "tolerance", "hihg", "Low", "levels"]
RESPONSE_KEYS = ["name", "unit", "goal", "min", "max", "target", "kind", "transform", "bounds", "maximum",
                 "weight"]

# a contradiction or a known-bad combination: (table, index, {key: value})
CONTRADICTIONS = [
    ("factor", 0, {"low": 90.0, "high": 40.0}), ("factor", 1, {"low": 30.0, "high": 30.0}),
    ("factor", 0, {"step": 60.0}), ("factor", 0, {"step": 0.0}), ("factor", 0, {"tolerance": 25.0}),
    ("factor", 0, {"tolerance": -1.0}), ("factor", 1, {"low": -1e308, "high": 1e308}),
    ("factor", 1, {"low": 0.0, "high": 5e-324}), ("factor", 1, {"low": 1e9, "high": 1e9 + 1e-6}),
    ("response", 0, {"min": 90.0, "max": 10.0}), ("response", 0, {"goal": "target"}),
    ("response", 1, {"target": 10.0}), ("response", 0, {"goal": "target", "target": 200.0}),
    ("response", 1, {"goal": "none", "max": None}), ("response", 0, {"bounds": [100, 0]}),
    ("response", 0, {"bounds": None}), ("response", 1, {"transform": "log", "max": -5.0}),
    ("response", 0, {"bounds": [0, 50]}), ("response", 1, {"transform": "log", "bounds": [30, 90]}),
    ("study", None, {"confidence": 1.0}), ("study", None, {"confidence": 0}),
    ("study", None, {"seed": -1}), ("study", None, {"seed": 10**30}), ("study", None, {"seed": 2**32}),
    ("study", None, {"seed": 2.5}),
]


SCALES = [1e-9, 1e-6, 1e6, 1e9, 1e50]
BENIGN = {  # valid values that are unusual: they should reach the models
    "study": [("confidence", 0.5), ("confidence", 0.999), ("seed", 0), ("seed", 2**32 - 1),
              ("description", "x" * 5000), ("name", "Ämination 温度 😀")],
    "factor": [("unit", "°C"), ("step", None), ("tolerance", 0.0), ("unit", ""), ("tolerance", None)],
    "response": [("transform", "log"), ("transform", "none"), ("kind", "quality"), ("goal", "minimize"),
                 ("goal", "none"), ("unit", "µg/L"), ("bounds", None)],
}


@st.composite
def study_docs(draw):
    """The base study dict changed by one to three mutations, and the scale of each response."""
    doc = json.loads(json.dumps(BASE_STUDY))
    scales = [1.0, 1.0]
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["set", "set", "drop", "dup_name", "contradiction", "name", "tables",
                                   "rescale", "rescale", "name", "benign"]))
        kind = draw(st.sampled_from(["study", "factor", "response"]))
        tables = doc.get(kind)
        if kind == "study":
            target = tables if isinstance(tables, dict) else None
            keys = STUDY_KEYS
        else:
            ok = isinstance(tables, list) and tables and all(isinstance(t, dict) for t in tables)
            target = tables[draw(st.integers(0, len(tables) - 1))] if ok else None
            keys = FACTOR_KEYS if kind == "factor" else RESPONSE_KEYS
        if op == "contradiction":
            where, i, change = draw(st.sampled_from(CONTRADICTIONS))
            t = doc.get(where)
            t = t if where == "study" else (t[i] if isinstance(t, list) and len(t) > i else None)
            if isinstance(t, dict):
                t.update(change)
        elif op == "tables":
            choice = draw(st.sampled_from(["no_factor", "empty_list", "not_table", "extra", "top_key",
                                           "study_scalar", "copy"]))
            if choice == "no_factor":
                doc.pop(kind, None)
            elif choice == "empty_list":
                doc[kind] = []
            elif choice == "not_table":
                doc[kind] = draw(weird_values)
            elif choice == "top_key":
                doc[draw(st.sampled_from(["factors", "responses", "Study", "extra"]))] = draw(weird_values)
            elif choice == "study_scalar":
                doc["study"] = draw(weird_values)
            elif target is not None and kind != "study":  # copy a table (duplicate name) or a new one
                new = dict(target)
                if choice == "extra":
                    new["name"] = draw(names)
                tables.append(new)
        elif target is None:
            continue
        elif op == "rescale" and kind != "study":
            f = draw(st.sampled_from(SCALES))
            keys = ("low", "high", "step", "tolerance") if kind == "factor" else ("min", "max", "target")
            for k in keys:
                if _is_number(target.get(k)):
                    target[k] = target[k] * f
            if kind == "response":
                if isinstance(target.get("bounds"), list):
                    target["bounds"] = [b * f if _is_number(b) else b for b in target["bounds"]]
                scales[tables.index(target) % 2] *= f
        elif op == "benign":
            key, value = draw(st.sampled_from(BENIGN[kind]))
            target[key] = value
        elif op == "set":
            target[draw(st.sampled_from(keys))] = draw(weird_values)
        elif op == "drop":
            target.pop(draw(st.sampled_from(keys)), None)
        elif op == "name":
            target["name"] = draw(names)
        elif op == "dup_name":
            others = [t for k in ("factor", "response") if isinstance(doc.get(k), list)
                      for t in doc[k] if isinstance(t, dict) and t is not target]
            if others:
                target["name"] = draw(st.sampled_from(others)).get("name")
    return doc, scales


def encode(text: str, how: str, junk: bytes, cut: int) -> bytes:
    """Bytes of ``text`` spoilt in one of the ways files reach a user."""
    if how == "bom":
        return b"\xef\xbb\xbf" + text.encode()
    if how == "latin-1":
        return text.replace("degC", "°C").replace("first try", "première").encode("latin-1", "replace")
    if how == "utf-16":
        return text.encode("utf-16")
    if how == "crlf":
        return text.replace("\n", "\r\n").encode()
    if how == "cr":
        return text.replace("\n", "\r").encode()
    if how == "junk":
        raw = text.encode()
        at = cut % (len(raw) + 1)
        return raw[:at] + junk + raw[at:]
    if how == "truncate":
        return text.encode()[: cut % (len(text) + 1)]
    if how == "empty":
        return b"" if cut % 2 else b" \n\t\n"
    if how == "long":  # a comment / note line of 200 000 characters
        first, _, rest = text.partition("\n")
        return (first + "\n# " + "x" * 200_000 + "\n" + rest).encode() if "[" in text else \
            (first + "\n" + "R999,50,60,80,20,done," + "x" * 200_000 + "\n" + rest).encode()
    return text.encode()


# half the files keep plain UTF-8 so that the structural mutations are reached
encodings = st.one_of(st.just("utf-8"), st.sampled_from(["bom", "latin-1", "utf-16", "crlf", "cr", "junk",
                                                        "truncate", "empty", "long"]))
# what runs after a passing check: nothing more, fit or window (about a third each)
verbs = st.integers(0, 2).map(lambda i: ("check", "fit", "window")[i])


@settings(FUZZ, max_examples=150)
@given(drawn=study_docs(), how=encodings, junk=st.binary(min_size=1, max_size=8),
       cut=st.integers(0, 10_000), verb=verbs)
def test_malformed_study_files_are_refused_cleanly(drawn, how, junk, cut, verb):
    doc, scales = drawn
    text = toml_text(doc)
    exercise({"study.toml": encode(text, how, junk, cut), "runs.csv": runs_for(doc, scales).encode()}, verb)


CELLS = ["", " ", "nan", "NaN", "inf", "-inf", "1e400", "1e308", "-1e308", "1e-320", "abc", "1,5", "60,5",
         "1.2.3", "0x1F", "１２", "٣", "∞", "None", "NULL", "#N/A", "=1+2", '"', "'", '"60"', "\x00",
         "é", "9" * 400, "DONE", "Failed ", "planned", "failed", "done", "R001", "1_000", "+5", "-0",
         "50 ", "\t70"]
cells = st.one_of(st.sampled_from(CELLS), st.text(max_size=10), st.floats().map(repr),
                  st.integers().map(str))
row_ix, col_ix = st.integers(0, 30), st.integers(0, 12)
run_ops = st.one_of(
    st.tuples(st.just("cell"), row_ix, col_ix, cells),
    st.tuples(st.just("drop_cell"), row_ix, col_ix),
    st.tuples(st.just("add_cell"), row_ix, cells),
    st.tuples(st.just("dup_row"), row_ix),
    st.tuples(st.just("drop_row"), row_ix),
    st.tuples(st.just("drop_col"), col_ix),
    st.tuples(st.just("dup_col"), col_ix),
    st.tuples(st.just("rename_col"), col_ix, names),
    st.tuples(st.just("add_col"), names, cells),
    st.tuples(st.just("quote"), row_ix, col_ix, st.booleans()),
    st.tuples(st.just("blank_line"), row_ix),
    st.tuples(st.just("header_only")),
    st.tuples(st.just("wide_row"), row_ix, st.integers(10, 10_000)),
)
# valid but unusual edits: they should reach the models
EXTREME = ["95", "1000", "-40", "0", "1e-9", "1e9", "1e99", "-1e99", "1e300", "-1e300", "5e-324", "1e-300"]
NOTES = ['"a, b"', '"say ""hi"""', "温度 ok", "=SUM(A1)", "x" * 100_000, '"multi\nline"', "µ"]
benign_ops = st.one_of(
    st.tuples(st.just("fmt"), row_ix, st.integers(1, 4), st.sampled_from(["exp", "pad", "plus", "zeros",
                                                                           "quoted", "dec"])),
    st.tuples(st.just("status"), row_ix, st.sampled_from(["DONE", " failed", "planned", "", "Done ",
                                                          "failed"])),
    st.tuples(st.just("blank"), row_ix, st.integers(3, 4)),
    st.tuples(st.just("note"), row_ix, st.sampled_from(NOTES)),
    st.tuples(st.just("replicate"), row_ix,
              st.sampled_from(["R001b", "rep 1", "温度-1", '"R\nb"', "R" * 300])),
    st.tuples(st.just("value"), row_ix, st.integers(1, 4), st.sampled_from(EXTREME)),
)
BENIGN_KINDS = ("fmt", "status", "blank", "note", "replicate", "value")
FORMATS = {"exp": lambda c: f"{float(c):e}", "pad": lambda c: f"  {c} ", "plus": lambda c: "+" + c,
           "zeros": lambda c: "00" + c, "quoted": lambda c: f'"{c}"', "dec": lambda c: c + ".000"}


def apply_benign_op(table: list[list[str]], op) -> None:
    kind, args = op[0], op[1:]
    if len(table) < 2:
        return
    r = table[1 + args[0] % (len(table) - 1)]
    if len(r) < len(BASE_HEADER):
        return
    if kind == "fmt" and re.fullmatch(r"-?\d+(\.\d+)?", r[args[1]]):
        r[args[1]] = FORMATS[args[2]](r[args[1]])
    elif kind == "status":
        r[5] = args[1]
    elif kind == "blank":
        r[args[1]] = ""
    elif kind == "note":
        r[6] = args[1]
    elif kind == "replicate":
        table.append([f"{args[1]}-{len(table)}", *r[1:]])
    elif kind == "value":
        r[args[1]] = args[2]


def apply_run_op(table: list[list[str]], op) -> None:
    kind, args = op[0], op[1:]
    n = len(table)
    if kind == "header_only":
        del table[1:]
    elif kind == "cell":
        r = table[args[0] % n]
        if r:
            r[args[1] % len(r)] = args[2]
    elif kind == "drop_cell":
        r = table[args[0] % n]
        if r:
            del r[args[1] % len(r)]
    elif kind == "add_cell":
        table[args[0] % n].append(args[1])
    elif kind == "dup_row" and n > 1:
        table.append(list(table[1 + args[0] % (n - 1)]))
    elif kind == "drop_row":
        del table[args[0] % n]
    elif kind in ("drop_col", "dup_col"):
        for r in table:
            if r:
                j = args[0] % len(r)
                if kind == "drop_col":
                    del r[j]
                else:
                    r.append(r[j])
    elif kind == "rename_col" and table and table[0]:
        table[0][args[0] % len(table[0])] = args[1]
    elif kind == "add_col":
        for i, r in enumerate(table):
            r.append(args[0] if i == 0 else args[1])
    elif kind == "quote":
        r = table[args[0] % n]
        if r:
            j = args[1] % len(r)
            r[j] = '"' + r[j] + ('"' if args[2] else "")
    elif kind == "blank_line":
        table.insert(args[0] % (n + 1), [])
    elif kind == "wide_row":
        table[args[0] % n].extend(["1"] * args[1])


@settings(FUZZ, max_examples=150)
@given(ops=st.lists(st.one_of(benign_ops, run_ops), min_size=1, max_size=3),
       sep=st.integers(0, 7).map(lambda i: {0: ";", 1: "\t"}.get(i, ",")),
       decimal_comma=st.sampled_from([False, False, False, True]), how=encodings,
       junk=st.binary(min_size=1, max_size=8),
       cut=st.integers(0, 10_000), verb=verbs)
def test_malformed_run_tables_are_refused_cleanly(ops, sep, decimal_comma, how, junk, cut, verb):
    table = [list(BASE_HEADER), *[list(r) for r in BASE_ROWS]]
    for op in ops:
        if table:
            (apply_benign_op if op[0] in BENIGN_KINDS else apply_run_op)(table, op)
    if decimal_comma:
        table = [[re.sub(r"^(-?\d+)\.(\d+)$", r"\1,\2", c) for c in r] for r in table]
    text = csv_text(table, sep)
    exercise({"study.toml": toml_text(BASE_STUDY).encode(), "runs.csv": encode(text, how, junk, cut)}, verb)


# ------------------------------------------------------------------------------------------------
# numerically awkward but valid data, through the Python API and the JSON the CLI writes
# ------------------------------------------------------------------------------------------------

def two_factor_study(d: Path, rows, *, lows=(0.0, 0.0), highs=(1.0, 1.0), limit="min = 0.5",
                     bounds: str = "", header=("run", "a", "b", "y", "status")) -> Path:
    d.mkdir(parents=True, exist_ok=True)
    (d / "study.toml").write_text(
        '[study]\nname = "numerics"\nconfidence = 0.8\nseed = 2\n'
        f'[[factor]]\nname = "a"\nlow = {lows[0]!r}\nhigh = {highs[0]!r}\n'
        f'[[factor]]\nname = "b"\nlow = {lows[1]!r}\nhigh = {highs[1]!r}\n'
        f'[[response]]\nname = "y"\ngoal = "maximize"\n{limit}\n{bounds}\n')
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows([header, *rows])
    (d / "runs.csv").write_text(buf.getvalue())
    return d


def fit_and_window(d: Path):
    """CLI fit + window on ``d``: exit codes and the strict-parsed fit.json / window.json."""
    before = input_bytes(d)
    codes = [check_outcome(d, v, run_verb(d, v), before) for v in ("fit", "window")]
    if codes != [0, 0]:
        return codes, None, None
    return codes, strict_json(d / "out" / "fit.json"), strict_json(d / "out" / "window.json")


GRID = [(a, b) for a in (0.0, 0.5, 1.0) for b in (0.0, 0.5, 1.0)]  # 3^2 full factorial


def plane(a, b):  # closed-form response used as ground truth
    return 0.2 + 0.6 * a + 0.3 * b


def test_exact_duplicate_settings_interpolate_the_plane(tmp_path):
    # Each setting of a 3^2 factorial run twice with the same result: a GP with a white-noise term
    # (Rasmussen & Williams 2006, eq. 2.20) stays positive definite and its mean reproduces the data;
    # the expectation is the closed-form plane itself.
    rows = [(f"R{i}{k}", a, b, plane(a, b), "done") for i, (a, b) in enumerate(GRID) for k in "ab"]
    d = two_factor_study(tmp_path / "s", rows)
    fit = Study.load(d).fit()
    model = fit.surrogates.models["y"]
    U = np.array(GRID)
    np.testing.assert_allclose(model.predict(U, return_std=False), plane(U[:, 0], U[:, 1]), atol=1e-3)
    dg = fit.diagnostics[0]
    assert dg.n == 18 and math.isfinite(dg.loo_q2) and dg.loo_q2 > 0.99
    codes, fj, wj = fit_and_window(d)
    assert codes == [0, 0]
    # the plane meets y >= 0.5 where 0.6 a + 0.3 b >= 0.3: the corner a = b = 1 holds by a margin of 0.6
    assert wj["found"] and wj["factors"][0]["high"] == pytest.approx(1.0, abs=0.05)


def test_active_factors_are_not_called_inactive(tmp_path):
    # y = 0.2 + 0.6 a + 0.3 b on a 3^2 factorial: both factors change y (closed form: slopes 0.6, 0.3).
    rows = [(f"R{i}", a, b, plane(a, b), "done") for i, (a, b) in enumerate(GRID)]
    fit = Study.load(two_factor_study(tmp_path / "s", rows)).fit()
    assert not [w for w in fit.warnings if "inactive" in w], fit.warnings


def test_replicates_give_noise_close_to_pooled_pure_error(tmp_path):
    # Three replicates at each of 4 settings. The pooled pure-error variance
    # s_pe^2 = sum (y_ij - ybar_i)^2 / (N - m) (Montgomery 2013, DAE 8th ed., §10.? lack-of-fit test,
    # from memory for the section number) estimates the run-to-run noise; the GP noise sd must be of
    # the same order (within a factor of 2 either way; common practice, no source).
    offsets = np.array([-0.04, 0.01, 0.03, 0.02, -0.03, 0.01, -0.01, 0.04, -0.03, 0.03, 0.0, -0.03])
    pts = [(0.0, 0.0), (1.0, 0.0), (0.0, 1.0), (1.0, 1.0)]
    rows, ys = [], []
    for i, (a, b) in enumerate(pts):
        for k in range(3):
            y = plane(a, b) + offsets[3 * i + k]
            rows.append((f"R{i}{k}", a, b, y, "done"))
            ys.append(y)
    ys = np.array(ys).reshape(4, 3)
    s_pe = math.sqrt(((ys - ys.mean(axis=1, keepdims=True)) ** 2).sum() / (12 - 4))
    fit = Study.load(two_factor_study(tmp_path / "s", rows)).fit()
    noise = fit.surrogates.models["y"].noise_std_
    assert s_pe / 2 <= noise <= 2 * s_pe, (noise, s_pe)


def constant_study(tmp_path, value=0.9):
    return two_factor_study(tmp_path / "s", [(f"R{i}", a, b, value, "done") for i, (a, b) in enumerate(GRID)])


def test_constant_response_predicts_the_constant_and_writes_no_nan(tmp_path):
    # Every run measured 0.9 with limit y >= 0.5: the limit holds everywhere, so the window is the whole
    # factor range (closed form: a constant above the limit).
    d = constant_study(tmp_path)
    fit = Study.load(d).fit()
    mean = fit.surrogates.models["y"].predict(np.random.default_rng(0).random((20, 2)), return_std=False)
    np.testing.assert_allclose(mean, 0.9, atol=1e-9)
    codes, fj, wj = fit_and_window(d)
    assert codes == [0, 0]
    assert wj["found"]
    assert [(f["low"], f["high"]) for f in wj["factors"]] == [pytest.approx((0.0, 1.0), abs=1e-6)] * 2


def test_constant_response_has_undefined_q2(tmp_path):
    # Q2 = 1 - PRESS/SS_tot (Allen 1974) is undefined when SS_tot = 0, i.e. all measured values equal;
    # diagnostics.py documents NaN (null in fit.json) for this case. 0.7 happens to average exactly and
    # gives NaN today; 0.9 does not.
    for value in (0.7, 0.9):
        dg = Study.load(constant_study(tmp_path / str(value), value)).fit().diagnostics[0]
        assert math.isnan(dg.loo_q2), (value, dg.loo_q2)


def test_factor_held_at_one_level_is_named_in_a_warning(tmp_path):
    # b = 0.5 in every run: the runs carry no information about b, so any claim along b is a guess.
    rows = [(f"R{i}", a, 0.5, plane(a, 0.5), "done") for i, a in enumerate((0.0, 0.2, 0.4, 0.6, 0.8, 1.0))]
    d = two_factor_study(tmp_path / "s", rows)
    study = Study.load(d)
    assert any("'b'" in w and "one level" in w for w in study.runs.warnings), study.runs.warnings
    fit = study.fit()
    assert any("'b'" in w and "one level" in w for w in fit.warnings)
    codes, fj, wj = fit_and_window(d)
    assert codes == [0, 0]
    assert any("'b'" in w for w in fj["warnings"])


@pytest.mark.parametrize("scale", [1e-9, 1e9, 1e-15])
def test_results_do_not_depend_on_the_units(tmp_path, scale):
    # Coded inputs and standardised outputs make the fit invariant to a change of units: factors and
    # response multiplied by `scale` must give the same leave-one-out predictions (divided by `scale`)
    # and the same window in coded units (exact invariance of an affine rescaling of inputs and output;
    # Rasmussen & Williams 2006, §2.7 on standardised outputs). The reference is the same study at scale 1.
    ys = [0.1, 0.35, 0.5, 0.3, 0.55, 0.8, 0.5, 0.75, 0.95]
    ref = two_factor_study(tmp_path / "ref", [(f"R{i}", a, b, y, "done") for i, ((a, b), y)
                                              in enumerate(zip(GRID, ys))])
    lows = (scale, 2 * scale)
    big = two_factor_study(tmp_path / "big", [(f"R{i}", scale * (1 + a), scale * (2 + b), scale * y, "done")
                                              for i, ((a, b), y) in enumerate(zip(GRID, ys))],
                           lows=lows, highs=(2 * scale, 3 * scale), limit=f"min = {0.5 * scale!r}")
    s_ref = Study.load(ref)
    f_ref = s_ref.fit()
    w_ref = build_window(s_ref.spec, f_ref)
    codes, fj, wj = fit_and_window(big)
    assert codes == [0, 0]
    d_ref, d_big = f_ref.diagnostics[0], fj["responses"][0]
    np.testing.assert_allclose(np.array(d_big["loo_median"]) / scale, d_ref.loo_median, rtol=1e-4, atol=1e-6)
    assert d_big["loo_q2"] == pytest.approx(d_ref.loo_q2, abs=1e-4)
    assert not d_big["warnings"]
    assert wj["found"] == w_ref.found
    if w_ref.found:
        for f_big, f_ref_, low in zip(wj["factors"], w_ref.factors, lows):
            assert (f_big["low"] - low) / scale == pytest.approx(f_ref_["low"], abs=1e-3)
            assert (f_big["high"] - low) / scale == pytest.approx(f_ref_["high"], abs=1e-3)


def test_strongly_correlated_factors_warn_with_the_regression_vif(tmp_path):
    # b follows a almost exactly. The variance inflation factor VIF_j = 1 / (1 - R_j^2), with R_j^2 from
    # regressing factor j on the others (Montgomery, Peck & Vining, Introduction to Linear Regression
    # Analysis, 5th ed. 2012, §9.4.2; VIF > 10 signals serious multicollinearity, same source, from memory).
    # Reference R^2 from scikit-learn's LinearRegression.
    a = np.linspace(0.0, 1.0, 8)
    b = np.clip(a + np.array([0.01, -0.02, 0.015, 0.0, -0.01, 0.02, -0.015, 0.0]), 0, 1)
    rows = [(f"R{i}", x, z, plane(x, z), "done") for i, (x, z) in enumerate(zip(a, b))]
    d = two_factor_study(tmp_path / "s", rows)
    study = Study.load(d)
    r2 = LinearRegression().fit(a[:, None], b).score(a[:, None], b)
    vif = 1.0 / (1.0 - r2)
    assert vif > 10
    hits = [w for w in study.runs.warnings if "VIF" in w]
    assert hits, study.runs.warnings
    reported = float(re.search(r"VIF = ([0-9.e+]+)", hits[0]).group(1))
    assert reported == pytest.approx(vif, rel=0.01)
    codes, fj, wj = fit_and_window(d)
    assert codes == [0, 0]


def test_uncorrelated_factorial_gives_no_vif_warning(tmp_path):
    # A full factorial is orthogonal: R^2 = 0, VIF = 1 (Montgomery, Peck & Vining 2012, §9.4.2).
    rows = [(f"R{i}", a, b, plane(a, b), "done") for i, (a, b) in enumerate(GRID)]
    assert not [w for w in Study.load(two_factor_study(tmp_path / "s", rows)).runs.warnings if "VIF" in w]


def test_all_runs_failed_is_a_clear_input_error(tmp_path):
    rows = [(f"R{i}", a, b, "", "failed") for i, (a, b) in enumerate(GRID)]
    d = two_factor_study(tmp_path / "s", rows)
    with pytest.raises(InputError, match=r"runs\.csv.*'y'.*0 measured"):
        Study.load(d).fit()
    codes, _, _ = fit_and_window(d)
    assert codes == [2, 2]


def test_a_single_usable_run_is_a_clear_input_error(tmp_path):
    rows = [(f"R{i}", a, b, "", "failed") for i, (a, b) in enumerate(GRID[1:])]
    rows.append(("R9", 0.0, 0.0, 0.7, "done"))
    d = two_factor_study(tmp_path / "s", rows)
    with pytest.raises(InputError, match=r"runs\.csv.*'y'.*1 measured"):
        Study.load(d).fit()
    assert fit_and_window(d)[0] == [2, 2]


def test_a_single_run_meeting_the_limit_gives_a_finite_answer(tmp_path):
    # y = a * b on the 3^2 factorial: only the run at (1, 1) meets y >= 0.5.
    rows = [(f"R{i}", a, b, a * b, "done") for i, (a, b) in enumerate(GRID)]
    d = two_factor_study(tmp_path / "s", rows)
    codes, fj, wj = fit_and_window(d)
    assert codes == [0, 0]
    if wj["found"]:
        # a window must lie in the corner the only feasible run points at: a * b >= 0.5 needs a, b >= 0.5
        assert all(f["low"] >= 0.5 - 0.1 for f in wj["factors"]), wj["factors"]
        assert wj["min_probability"] >= 0.8


def test_factor_rounding_keeps_precision_at_nano_scale():
    # Rounding to a step of 1e-11 on a factor spanning 1e-9..3e-9: the result must be the nearest
    # multiple of the step (brute force over the multiples inside the bounds).
    f = Factor("gap", low=1e-9, high=3e-9, step=1e-11)
    x = np.array([1.234567e-9, 2.5e-9, 2.99999e-9, 1.0049e-9])
    grid = np.arange(100, 301) * 1e-11
    expect = grid[np.abs(x[:, None] - grid[None, :]).argmin(axis=1)]
    np.testing.assert_allclose(f.round(x), expect, rtol=1e-9, atol=0)
    big = Factor("pressure", low=1e9, high=3e9, step=1e7)
    xb = np.array([1.234e9, 2.996e9])
    np.testing.assert_allclose(big.round(xb), [1.23e9, 3.0e9], rtol=1e-12)


def test_spec_refuses_a_seed_the_random_generators_cannot_take():
    # scikit-learn and NumPy's legacy RandomState accept seeds in [0, 2**32 - 1] only.
    doc = json.loads(json.dumps(BASE_STUDY))
    doc["study"]["seed"] = 2**32
    with pytest.raises(InputError, match="seed"):
        StudySpec.from_dict(doc)
    np.random.RandomState(2**32 - 1)  # the largest accepted seed is valid for the reference generator
    with pytest.raises(ValueError):
        np.random.RandomState(2**32)
