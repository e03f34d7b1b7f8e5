"""Writers: window spec (json, md), trade-off table and test plan (csv). They never fit models.

Every file is written atomically; CSV cells (header included) are neutralised against spreadsheet
formula injection; names and texts in window.md are escaped for Markdown.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from windowfinder.answers.window import volume_text
from windowfinder.inputs.runs import format_table
from windowfinder.inputs.storage import ensure_folder, write_atomic


def _clean(obj):
    """JSON-safe copy: numpy scalars to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(float(obj)) else None
    return obj


def write_json(path, data) -> Path:
    write_atomic(path, json.dumps(_clean(data), indent=2, allow_nan=False) + "\n")
    return Path(path)


def write_csv(path, frame: pd.DataFrame) -> Path:
    """An exported table (design, next runs, trade-off, test plan): header and text cells neutralised
    against spreadsheet formulas (:func:`~windowfinder.inputs.runs.safe_cell`)."""
    write_atomic(path, format_table(frame, guard=True))
    return Path(path)


_MD_ENTITIES = {"&": "&amp;", "<": "&lt;", ">": "&gt;"}
_MD_PUNCT = set("\\`*_[]|~#$!")


def md(text) -> str:
    """``text`` as literal Markdown on one line: ``& < >`` as HTML entities (no raw HTML reaches the page)
    and the Markdown punctuation ``\\ ` * _ [ ] | ~ # $ !`` backslash-escaped (CommonMark spec 0.30,
    §2.4 "Backslash escapes": any ASCII punctuation may be escaped), so a name cannot open emphasis,
    a link, a table cell or an HTML tag."""
    s = " ".join(str(text).split())
    return "".join(_MD_ENTITIES.get(c) or ("\\" + c if c in _MD_PUNCT else c) for c in s)


def _g(v, digits: int = 4) -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:.{digits}g}"


def window_table(win) -> str:
    """Plain-text table of the window's factor ranges (for the terminal)."""
    if not win.found:
        return f"no window: {win.message}"
    lines = [f"{'factor':<16} {'low':>10} {'high':>10}  {'unit':<8} guard band (with tolerance)"]
    for f in win.factors:
        if "levels" in f:
            lines.append(f"{f['name']:<16} levels: {', '.join(f['levels'])}")
            continue
        guard = (f"{_g(f['guard_low'])} .. {_g(f['guard_high'])}" if f.get("tolerance") else "-")
        lines.append(f"{f['name']:<16} {_g(f['low']):>10} {_g(f['high']):>10}  {f['unit']:<8} {guard}")
    lines.append(f"lowest P(all limits met) inside: {win.min_probability:.3f} "
                 f"(confidence {win.confidence:g}); volume {volume_text(win.volume_share)}")
    return "\n".join(lines)


def window_markdown(win, study_name: str) -> str:
    """window.md: the same content as window.json, for people."""
    out = [f"# Process window — {md(study_name)}", ""]
    if win.safety:
        out += ["> **Caution.** " + md(win.cautions[0]), ""]
    if not win.found and not getattr(win, "supported", True):
        out += [f"**No window: the runs cannot support one.** {md(win.message)}", ""]
    elif not win.found:
        out += [f"**No window reaches the confidence {win.confidence:g}.** {md(win.message)}", ""]
        if win.best_point:
            out += ["Best point found: " + ", ".join(f"{md(k)} = {md(v) if isinstance(v, str) else _g(v)}"
                                                     for k, v in win.best_point.items())
                    + f" (P = {_g(win.best_probability, 3)})", ""]
    else:
        basis = "the process mean" if win.mean_only else "each new run (model uncertainty + run-to-run noise)"
        out += [f"Confidence {win.confidence:g}: every setting inside these ranges meets all limits with "
                f"probability at least **{win.min_probability:.3f}**, for {basis}. The window covers "
                f"{volume_text(win.volume_share)}.", "",
                "| factor | low | high | unit | tolerance | guard band |", "|---|---|---|---|---|---|"]
        for f in win.factors:
            if "levels" not in f:
                out.append(f"| {md(f['name'])} | {_g(f['low'])} | {_g(f['high'])} | {md(f['unit'])} | "
                           f"± {_g(f['tolerance'])} | {_g(f['guard_low'])} – {_g(f['guard_high'])} |")
        for f in win.factors:
            if "levels" in f:
                out += ["", f"{md(f['name'])} (categorical): the ranges above hold at level(s) "
                        + ", ".join(f"**{md(v)}**" for v in f["levels"]) + "."]
        if getattr(win, "constraints", None):
            out += ["", "The whole guard band meets every constraint between factors:", ""]
            out += [f"- {c['name']}: {c['text']} (smallest margin {_g(c['smallest_margin'])})"
                    for c in win.constraints]
        out += ["", "Lowest probability at: " + ", ".join(
            f"{md(k)} = {md(v) if isinstance(v, str) else _g(v)}" for k, v in win.worst_point.items()), "",
            "## Predicted responses inside the window (guard band included)", "",
            "| response | limit | predicted | 95 % prediction interval | unit |", "|---|---|---|---|---|"]
        for p in win.predicted:
            out.append(f"| {md(p['response'])}{' (safety)' if p['kind'] == 'safety' else ''} | {md(p['limit'])} | "
                       f"{_g(p['low'])} – {_g(p['high'])} | {_g(p['pi95_low'])} – {_g(p['pi95_high'])} | "
                       f"{md(p['unit'])} |")
        if win.untrusted_share is not None:
            out += ["", f"Share of the window flagged untrusted (far from runs or too uncertain): "
                        f"{win.untrusted_share:.0%}."]
    if win.diagnostics:
        out += ["", "## Models", "", "Q² and the first RMSE on the model's scale (log or logit of a "
                "transformed response), the second RMSE in the response's units.", "",
                "| response | model | scale | runs | LOO Q² | LOO RMSE | LOO RMSE, natural units | "
                "95 % coverage |", "|---|---|---|---|---|---|---|---|"]
        for d in win.diagnostics:
            out.append(f"| {md(d['response'])} | {d['model']} | {d.get('scale', 'natural')} | {d['n']} | "
                       f"{_g(d['loo_q2'], 3)} | {_g(d['loo_rmse'], 3)} | "
                       f"{_g(d.get('loo_rmse_natural'), 3)} | {_g(100 * d['coverage95'], 3)} % |")
    out += ["", "## Cautions", ""] + [f"- {md(c)}" for c in win.cautions]
    return "\n".join(out) + "\n"


SCHEMA_FILE = "window.schema.json"  # JSON Schema (draft 2020-12) of window.json, shipped as package data


def window_schema() -> dict:
    """The JSON Schema of window.json (draft 2020-12), as shipped in the package."""
    from importlib.resources import files

    return json.loads(files("windowfinder.export").joinpath(SCHEMA_FILE).read_text(encoding="utf-8"))


# Per-run leave-one-out arrays stay in fit.json; a window carries only each model's summary.
MODEL_SUMMARY = ("response", "model", "n", "loo_q2", "loo_rmse", "coverage95", "noise_sd")


def window_document(win, provenance: dict | None = None, record: dict | None = None) -> dict:
    """The content of window.json (validates against ``window.schema.json``)."""
    data = win.to_dict()
    diags = data.pop("diagnostics")
    data = {"found": data.pop("found"), "confidence": data.pop("confidence"),
            "min_probability": data.pop("min_probability"), "factors": data.pop("factors"),
            "predicted": data.pop("predicted"), "cautions": data.pop("cautions"), **data,
            "models": [{k: d.get(k) for k in MODEL_SUMMARY} for d in diags]}
    if provenance is not None:
        data["provenance"] = provenance
    if record is not None:
        data["record"] = record
    return _clean(data)


def write_window(out_dir, win, study_name: str, provenance: dict | None = None,
                 record: dict | None = None) -> list[Path]:
    """window.json (with ``provenance`` and, when a verified window exists, ``record``) and window.md."""
    out_dir = ensure_folder(out_dir)
    p1 = write_json(out_dir / "window.json", window_document(win, provenance, record))
    p2 = out_dir / "window.md"
    write_atomic(p2, window_markdown(win, study_name))
    return [p1, p2]
