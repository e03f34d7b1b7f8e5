"""Tables for the report, as pandas DataFrames in natural units: the window, the balanced pick, the
status of every limit, replicate runs and the run-to-run scatter they show, and the model choice and
polynomial terms of each response (coded units)."""

from __future__ import annotations

import numpy as np
import pandas as pd


def window_frame(window) -> pd.DataFrame:
    """Factor ranges of a found window, with tolerance and guard band (see :func:`factor_frame`)."""
    return factor_frame(window.factors)


def factor_frame(factors) -> pd.DataFrame:
    """Rows of window.json ``factors``: a numeric factor's range, unit, tolerance and guard band; a
    categorical factor's levels in a column of their own (no range, unit or tolerance: "–"). The
    ``levels`` column is there only when some factor is categorical."""
    blank = None   # shown as "–"
    rows = [{"factor": f["name"], "levels": ", ".join(f["levels"]), "low": blank, "high": blank, "unit": "",
             "tolerance (±)": blank, "guard band": blank} if "levels" in f else
            {"factor": f["name"], "levels": blank, "low": f["low"], "high": f["high"], "unit": f.get("unit", ""),
             "tolerance (±)": f.get("tolerance") or 0.0,
             "guard band": (f"{f['guard_low']:.4g} – {f['guard_high']:.4g}" if "guard_low" in f else blank)}
            for f in factors]
    cols = ["factor", "levels", "low", "high", "unit", "tolerance (±)", "guard band"]
    if not any("levels" in f for f in factors):
        cols.remove("levels")
    return pd.DataFrame(rows, columns=cols)


def pick_frame(spec, tradeoff) -> pd.DataFrame:
    """The balanced pick: each factor setting, then each response's prediction and 95 % interval."""
    pick = tradeoff.pick if tradeoff is not None else None
    if pick is None:
        return pd.DataFrame(columns=["item", "value", "95 % prediction interval", "unit"])
    rows = [{"item": f.name, "value": pick[f.name], "95 % prediction interval": "", "unit": f.unit}
            for f in spec.factors]
    for r in spec.responses:
        if f"{r.name}_pred" in pick:
            interval = f"{pick[r.name + '_lo95']:.4g} – {pick[r.name + '_hi95']:.4g}"
            rows.append({"item": f"{r.name} (predicted)", "value": pick[f"{r.name}_pred"],
                         "95 % prediction interval": interval,
                         "unit": r.unit})
    if "p_all_limits" in pick:
        rows.append({"item": "P(all limits met)", "value": pick["p_all_limits"],
                     "95 % prediction interval": "", "unit": ""})
    return pd.DataFrame(rows)


def distinct_front(spec, frame: pd.DataFrame) -> pd.DataFrame:
    """Trade-off rows with distinct factor settings (rounding to each step can repeat a setting); the
    balanced pick is kept when it has twins."""
    if frame.empty:
        return frame
    order = frame.assign(_later=~frame["balanced_pick"].astype(bool)).sort_values("_later", kind="stable")
    keep = order.drop_duplicates(subset=spec.factor_names).index
    return frame.loc[sorted(keep)].reset_index(drop=True)


def limit_status(spec, window) -> pd.DataFrame:
    """Each limit against what the models predict inside the window (guard band included).

    Status: ``all 95 % intervals inside`` when even the 95 % prediction intervals stay within the limit;
    ``predictions inside, intervals cross`` when the medians do but some intervals reach past it;
    ``some predictions outside`` otherwise. Without a window: ``no window``.
    """
    pred = {p["response"]: p for p in (window.predicted if window is not None and window.found else [])}
    rows = []
    for r in spec.limited:
        p = pred.get(r.name)
        row = {"response": r.name, "kind": r.kind, "limit": r.limit_text(), "predicted in window": "",
               "95 % interval in window": "", "status": "no window"}
        if p is not None:
            lo_ok = r.min is None or p["low"] >= r.min
            hi_ok = r.max is None or p["high"] <= r.max
            pi_ok = (r.min is None or p["pi95_low"] >= r.min) and (r.max is None or p["pi95_high"] <= r.max)
            row.update({"predicted in window": f"{p['low']:.4g} – {p['high']:.4g} {r.unit}".rstrip(),
                        "95 % interval in window": f"{p['pi95_low']:.4g} – {p['pi95_high']:.4g}",
                        "status": ("all 95 % intervals inside" if pi_ok else
                                   "predictions inside, intervals cross" if lo_ok and hi_ok else
                                   "some predictions outside")})
        rows.append(row)
    return pd.DataFrame(rows, columns=["response", "kind", "limit", "predicted in window",
                                       "95 % interval in window", "status"])


def replicates(frame: pd.DataFrame, spec, diagnostics=()) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Replicate groups (done runs at identical settings) and the pooled run-to-run sd per response.

    Returns
    -------
    groups : DataFrame
        One row per group of two or more done runs at the same settings: run ids, the settings, and
        per response the mean and sample sd of the measured values.
    pooled : DataFrame
        Per response: pooled sd ``sqrt(sum (n_g - 1) s_g^2 / sum (n_g - 1))`` over the groups, its
        degrees of freedom ``sum (n_g - 1)`` (Montgomery, Design and Analysis of Experiments, 2013,
        §2.4.1, pooled estimator of a common variance), and the model's noise sd for comparison.
    """
    names = spec.factor_names
    done = frame[frame["status"] == "done"]
    key = done[names].round(9).astype(str).agg("|".join, axis=1)
    noise = {d.response: d.noise_sd for d in diagnostics}
    rows = []
    ss = {r: 0.0 for r in spec.response_names}
    dof = {r: 0 for r in spec.response_names}
    for _, g in done.groupby(key, sort=False):
        if len(g) < 2:
            continue
        row = {"runs": ", ".join(g["run"].astype(str)), "count": len(g)}
        row.update({f: g[f].iloc[0] for f in names})
        for r in spec.response_names:
            v = g[r].dropna().to_numpy(float)
            row[f"{r} mean"] = v.mean() if len(v) else np.nan
            row[f"{r} sd"] = v.std(ddof=1) if len(v) > 1 else np.nan
            if len(v) > 1:
                ss[r] += float(np.sum((v - v.mean()) ** 2))
                dof[r] += len(v) - 1
        rows.append(row)
    groups = pd.DataFrame(rows)
    pooled = pd.DataFrame([{"response": r.name, "unit": r.unit,
                            "pooled sd": np.sqrt(ss[r.name] / dof[r.name]) if dof[r.name] else np.nan,
                            "degrees of freedom": dof[r.name],
                            "model noise sd": noise.get(r.name, np.nan)} for r in spec.responses])
    return groups, pooled


def choice_frame(diag) -> pd.DataFrame:
    """Each candidate model's leave-one-out log density and which one the response got."""
    choice = diag.choice or {}
    chosen = choice.get("chosen")
    return pd.DataFrame([{"candidate": k, "LOO log density (latent scale)": v,
                          "used": "yes" if k == chosen else ""}
                         for k, v in choice.get("scores", {}).items()],
                        columns=["candidate", "LOO log density (latent scale)", "used"])


def term_frame(diag) -> pd.DataFrame:
    """A polynomial model's terms: coefficient, standard error, t and p-value (coded units)."""
    frame = pd.DataFrame(diag.terms, columns=["term", "coefficient", "std_error", "t", "p_value"])
    return frame.rename(columns={"std_error": "standard error", "p_value": "p-value"})
