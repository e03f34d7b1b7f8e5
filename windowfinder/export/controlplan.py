"""Control-plan export: the window as the table a production or scale-up team files.

One row per factor (set point, window low/high, tolerance, guard band) and one per limited response
(limits, predicted range in the window, predicted fraction out of limit at the set point and at the
window's worst point in ppm, capability indices at the set point). The window is the window of record
when a verification confirmed one, else the current window; the predictions come from the current fit.

Capability from the predictive distribution. At a setting the model gives a latent (transformed-scale)
predictive mean ``mu`` and sd; limits are transformed the same way, so a log or logit response is judged
on the scale where its predictive distribution is normal. With ``LSL``/``USL`` the transformed limits
(Montgomery, *Introduction to Statistical Quality Control*, 7th ed., 2013, §8.3: Cp, Cpk and the
one-sided Cpu, Cpl; §8.3.6 for Ppk, section numbers from memory)::

    Cpk = min(USL - mu, mu - LSL) / (3 sigma)            (one-sided: the side that exists)
    ppm = 1e6 * (Phi((LSL - mu)/sigma) + 1 - Phi((USL - mu)/sigma))

``Cpk`` here uses the run-to-run noise sd alone (the process's own scatter, taking the model's mean as
right); ``Ppk`` uses the full predictive sd of a new run (model uncertainty plus noise). The ppm figures
use the full predictive distribution — normal for a Gaussian process, Student t for a least-squares
model (the same :func:`windowfinder.answers.feasibility.limit_probability` the window is judged with).
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd

from windowfinder.answers.feasibility import limit_probability

COLUMNS = ["item", "name", "unit", "set_point", "low", "high", "tolerance", "guard_low", "guard_high",
           "limit_min", "limit_max", "kind", "predicted_low", "predicted_high", "predicted_at_set_point",
           "ppm_out_at_set_point", "ppm_out_at_worst_point", "cpk_at_set_point", "ppk_at_set_point",
           "capability_scale"]


def capability_index(mu, sigma, lsl=None, usl=None) -> float:
    """Cpk = min(USL - mu, mu - LSL) / (3 sigma); one-sided Cpu or Cpl when one limit is open.

    Montgomery (2013), §8.3. NaN when ``sigma <= 0`` or no limit is given.
    """
    if not sigma > 0 or (lsl is None and usl is None):
        return float("nan")
    sides = [v for v in ((usl - mu) if usl is not None else None,
                         (mu - lsl) if lsl is not None else None) if v is not None]
    return float(min(sides) / (3.0 * sigma))


def ppm_out(mu, sigma, lsl=None, usl=None, dof=None) -> float:
    """Predicted fraction outside ``[lsl, usl]`` in parts per million: 1e6 * (1 - P(lsl <= Y <= usl))."""
    return float(1e6 * (1.0 - limit_probability(mu, sigma, lsl, usl, dof)))


def _latent_limits(model, r):
    tr = model.transform_
    lo = tr.forward_limit(r.min) if r.min is not None else None
    hi = tr.forward_limit(r.max) if r.max is not None else None
    lo = None if lo is not None and not math.isfinite(lo) else lo
    hi = None if hi is not None and not math.isfinite(hi) else hi
    return lo, hi


def control_plan(spec, fit, window: dict) -> pd.DataFrame:
    """The control-plan table for ``window`` (window.json content, found) with the models of ``fit``."""
    from windowfinder.answers.levelwindow import merge_ranges, window_boxes
    from windowfinder.answers.results import predicted_ranges

    factors = {f["name"]: f for f in window["factors"]}
    sp = window.get("set_point") or {}

    def natural(f, v):   # a categorical factor's level name as its index
        return float(f.index_of(v)) if f.is_categorical and isinstance(v, str) else v

    set_nat = np.array([natural(f, sp.get(f.name, factors[f.name]["levels"][0] if f.is_categorical else
                                          (factors[f.name]["low"] + factors[f.name]["high"]) / 2))
                        for f in spec.factors], dtype=float)
    set_nat = spec.round_to_step(set_nat[None, :])[0]
    worst = window.get("worst_point") or {}
    worst_nat = np.array([natural(f, worst.get(f.name, v)) for f, v in zip(spec.factors, set_nat)], dtype=float)
    rows = []
    for f, x in zip(spec.factors, set_nat):
        w = factors[f.name]
        if f.is_categorical:   # the set level; the levels the window holds on in low
            rows.append({"item": "factor", "name": f.name, "unit": "", "set_point": f.label(x),
                         "low": ", ".join(w["levels"]), "high": None, "tolerance": 0.0})
            continue
        rows.append({"item": "factor", "name": f.name, "unit": f.unit, "set_point": float(x),
                     "low": w["low"], "high": w["high"], "tolerance": w.get("tolerance", 0.0),
                     "guard_low": w.get("guard_low", w["low"]), "guard_high": w.get("guard_high", w["high"])})
    ranges = {p["response"]: p for p in merge_ranges([
        predicted_ranges(spec, fit.surrogates, glo, ghi, spec.seed)
        for glo, ghi, _ in window_boxes(spec, window["factors"], guard=True)])}
    U = spec.to_coded(np.vstack([set_nat, worst_nat]))
    for r in spec.limited:
        m = fit.surrogates.models[r.name]
        mu, sd = m.predict(U, return_std=True, noise=True)
        noise = float(getattr(m, "noise_std_", float("nan")))
        lsl, usl = _latent_limits(m, r)
        dof = getattr(m, "dof_", None)
        med = m.predict_interval(U[:1], level=0.5, noise=True)[0][0]
        rows.append({"item": "response", "name": r.name, "unit": r.unit, "limit_min": r.min,
                     "limit_max": r.max, "kind": r.kind, "predicted_low": ranges[r.name]["low"],
                     "predicted_high": ranges[r.name]["high"], "predicted_at_set_point": float(med),
                     "ppm_out_at_set_point": ppm_out(mu[0], sd[0], lsl, usl, dof),
                     "ppm_out_at_worst_point": ppm_out(mu[1], sd[1], lsl, usl, dof),
                     "cpk_at_set_point": capability_index(mu[0], noise, lsl, usl),
                     "ppk_at_set_point": capability_index(mu[0], sd[0], lsl, usl),
                     "capability_scale": "natural" if r.transform == "none" else f"{r.transform} scale"})
    return pd.DataFrame(rows, columns=COLUMNS)


def write_control_plan(out_dir, frame: pd.DataFrame, xlsx: bool = True) -> list[Path]:
    """out/controlplan.csv, and controlplan.xlsx when openpyxl is installed (text cells neutralised)."""
    from windowfinder.export.files import write_csv
    from windowfinder.inputs.runs import safe_cell

    from windowfinder.inputs.storage import ensure_folder

    out_dir = ensure_folder(out_dir)
    paths = [write_csv(out_dir / "controlplan.csv", frame)]
    if xlsx:
        try:
            import openpyxl  # noqa: F401
        except ImportError:
            return paths
        from windowfinder.inputs.storage import write_atomic

        safe = frame.astype(object).where(frame.notna(), None)
        for c in safe.columns:  # formula injection: text cells as in the CSV, numbers stay numbers
            safe[c] = [safe_cell(v) if isinstance(v, str) else v for v in safe[c]]
        buf = io.BytesIO()
        safe.to_excel(buf, index=False, sheet_name="control plan", engine="openpyxl")
        write_atomic(out_dir / "controlplan.xlsx", buf.getvalue())
        paths.append(out_dir / "controlplan.xlsx")
    return paths
