"""The report's sections, in page order, each as escaped HTML built from the study's results."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from windowfinder.answers.window import volume_text
from windowfinder.models.diagnostics import COVERAGE_MIN, COVERAGE_MIN_RUNS, Q2_MIN
from windowfinder.report import tables
from windowfinder.report.figures import figure_png, influence_figure, loo_figure, tradeoff_figure
from windowfinder.report.maps import map_pairs, slice_centre, slice_figure, slice_grid
from windowfinder.report.page import bullets, esc, html_table, image, para


@dataclass
class Content:
    """Everything the sections draw from (natural units at the edges, as exported)."""

    study: object
    fit: object
    window: object = None
    tradeoff: object = None
    suggestions: pd.DataFrame | None = None
    influence: object = None
    cautions: list = field(default_factory=list)
    record: dict | None = None       # entry of the window of record (export.record), if any
    provenance: dict | None = None   # provenance of the refit (to name why it differs)

    @property
    def spec(self):
        return self.study.spec


# -------------------------------------------------------------------------------------------- summary
def of_record(c: Content) -> list[str]:
    """The window of record and its verdict, with the refit beside it when they differ."""
    from windowfinder.export.files import window_document
    from windowfinder.export.record import compare

    e = c.record
    if e is None:
        return []
    w = e["window"]
    out = [para(f"Window of record — verified {e['verified_utc']} with {e['runs']} verification runs "
                f"(plan {e['plan']}, sha256 {str(e['plan_sha256'])[:12]}…). Verdict: {e['verdict']}.",
                "headline"),
           para(f"Confidence {w['confidence']:g} for {w['provenance']['confidence_applies_to']}; lowest "
                f"P(all limits met) inside {w['min_probability']:.3f} when it was planned.")]
    if c.window is None:
        return out + [html_table(tables.factor_frame(w["factors"]), "Window of record")]
    doc = window_document(c.window, c.provenance)
    cmp = compare(e, doc, c.spec)
    frame = pd.DataFrame([{"factor": r["name"], "of record: low": r["record_low"],
                           "of record: high": r["record_high"], "refit: low": r["refit_low"],
                           "refit: high": r["refit_high"], "unit": r["unit"],
                           "same": "yes" if r["same"] else "no"} for r in cmp.rows])
    out.append(html_table(frame, "Window of record beside the refit on all runs"))
    out.append(para(cmp.reason[0].upper() + cmp.reason[1:] + "."))
    return out


def summary(c: Content) -> str:
    spec, win = c.spec, c.window
    out = []
    if spec.has_safety and c.cautions:
        out.append("<div class=\"caution\" role=\"note\"><p><strong>Caution — safety limit "
                   "involved.</strong></p>" + "".join(para(t) for t in c.cautions) + "</div>")
    out += of_record(c)
    if c.record is not None and win is not None:
        out.append("<h3>Refit on all runs (not the window of record)</h3>")
    if win is None:
        out.append(para("No response has a limit, so there is no window to find; the trade-off below "
                        "shows the best settings for the goals.", "headline"))
    elif not win.found:
        out.append(para(f"No window reaches the confidence {win.confidence:g} ({win.message}).", "headline"))
        if win.best_point:
            out.append(para("Most probable setting found: " + ", ".join(
                (f"{k} = {v}" if isinstance(v, str) else f"{k} = {v:.4g} {spec.factor(k).unit}".rstrip())
                for k, v in win.best_point.items())
                + f" (P(all limits met) = {win.best_probability:.3f})."))
    else:
        basis = ("the process mean (model uncertainty only)" if win.mean_only
                 else "each new run (model uncertainty and run-to-run scatter)")
        out.append(para(f"Window at confidence {win.confidence:g}: every setting inside these ranges "
                        f"(widened by each factor's tolerance) meets all limits with probability at least "
                        f"{win.min_probability:.3f}, for {basis}. The window covers "
                        f"{volume_text(win.volume_share)}.", "headline"))
        out.append(html_table(tables.window_frame(win), "Process window"))
        if win.worst_point:
            out.append(para("Lowest probability at: " + spec.point_text(win.worst_point) + "."))
    if spec.limited:
        out.append(html_table(tables.limit_status(spec, win),
                              "Limits: predicted range inside the window (guard band included)"))
    pick = tables.pick_frame(spec, c.tradeoff)
    if len(pick):
        method = esc(c.tradeoff.pick_method)
        out.append(f"<h3>Balanced pick from the trade-off ({method})</h3>" + html_table(pick))
    if c.fit.warnings:
        out.append("<h3>Warnings from the data and models</h3>" + bullets(c.fit.warnings))
    if not spec.has_safety and c.cautions:
        out.append("<h3>Cautions</h3>" + bullets(c.cautions))
    return "\n".join(out)


# ----------------------------------------------------------------------------------------------- data
def data(c: Content) -> str:
    spec, runs = c.spec, c.study.runs
    frame = spec.labelled(runs.frame)   # categorical factors by level name
    outside = runs.outside()
    n = {k: int((frame["status"] == k).sum()) for k in ("done", "failed", "planned")}
    out = [para(f"{len(frame)} runs: {n['done']} done, {n['failed']} failed, {n['planned']} planned; "
                f"{int(outside.sum())} outside the study bounds. Units: " + ", ".join(
                    f"{f.name} in {f.unit}" for f in spec.factors if f.unit) + ".")]
    cols = ["run", *spec.factor_names, *spec.response_names, "status", "note"]
    shown = frame[cols].copy()
    shown.insert(len(cols) - 1, "outside bounds", outside.to_numpy())
    classes = ["outside" if o else s if s in ("failed", "planned") else ""
               for s, o in zip(frame["status"], outside)]
    out.append(html_table(shown, "All runs (natural units; – = not measured)", classes))
    failed = frame[frame["status"] == "failed"]
    out.append("<h3>Failed runs</h3>" + (
        html_table(failed[["run", *spec.factor_names, "note"]]) +
        para("A failed run gave no usable product; it feeds the failure model, which lowers the "
             "probability near such settings.") if len(failed) else para("No run failed.")))
    out.append("<h3>Runs outside the study bounds</h3>" + (
        html_table(frame.loc[outside, ["run", *spec.factor_names, "status", "note"]]) +
        para("They are kept in the models; maps and windows cover the study bounds only.")
        if outside.any() else para("None.")))
    if spec.constraints:
        breaking = runs.breaking()
        bad = breaking.map(bool)
        out.append("<h3>Constraints between factors</h3>" + para(
            "Settings that must never be run; designs, suggestions, the trade-off and the window with "
            "its guard band stay inside: " + "; ".join(f"{k.name}: {k.text()}" for k in spec.constraints)
            + "."))
        if bad.any():
            shown = frame.loc[bad, ["run", *spec.factor_names, "status"]].copy()
            shown["breaks"] = [", ".join(b) for b in breaking[bad]]
            out.append(html_table(shown) + para("These runs are kept in the models; never repeat them."))
    groups, pooled = tables.replicates(frame, spec, c.fit.diagnostics)
    out.append("<h3>Replicates and run-to-run scatter</h3>")
    if len(groups):
        out.append(html_table(groups, "Done runs at identical settings"))
        out.append(html_table(pooled, "Pooled standard deviation of replicates vs the models' noise"))
        out.append(para("The pooled sd is the scatter the replicates show directly; the model's noise sd "
                        "is what the Gaussian process estimated from all runs. Far apart, they point to "
                        "drift, an unmodelled factor or a poor model."))
    else:
        out.append(para("No done runs share identical settings, so the run-to-run scatter is known "
                        "only through the models' noise estimate; a few replicates would show it directly."))
    return "\n".join(out)


# --------------------------------------------------------------------------------------------- models
def verdict(diag) -> tuple[str, bool]:
    """Plain-words verdict on a model and whether it should not be trusted."""
    q2, cov = diag.loo_q2, diag.coverage95
    if q2 is None or not np.isfinite(q2) or q2 < Q2_MIN:
        shown = "n/a" if q2 is None or not np.isfinite(q2) else f"{q2:.2f}"
        return (f"Do not trust this model yet: it predicts little of {diag.response} for runs it has not "
                f"seen (leave-one-out Q² = {shown}, below {Q2_MIN}). Probabilities for its limits rest "
                "mostly on wide uncertainty; add runs.", True)
    if diag.n >= COVERAGE_MIN_RUNS and cov < COVERAGE_MIN:
        return (f"Do not trust this model's probabilities: only {cov:.0%} of runs fall inside their 95 % "
                f"leave-one-out interval (expected about 95 %, warning below {COVERAGE_MIN:.0%}); its "
                "intervals are too narrow.", True)
    return (f"No warning from the leave-one-out check: Q² = {q2:.2f}, {cov:.0%} of runs inside their "
            "95 % interval.", False)


def models(c: Content) -> str:
    spec = c.spec
    out = [para("Each run is predicted from all the others (closed-form leave-one-out at fixed "
                "hyperparameters). Q² is the share of the variation predicted for unseen runs, on the "
                "model's own scale (the log or logit of a transformed response); the RMSE is given on that "
                "scale and in the response's units; coverage is the share of runs inside their 95 % "
                "interval.")]
    for d in c.fit.diagnostics:
        r = spec.response(d.response)
        shown = "" if d.scale == "natural" else f" on the {d.scale} scale"
        row = {"model": d.model, "runs": d.n, f"LOO Q²{shown}": d.loo_q2}
        if d.scale != "natural":
            row[f"LOO RMSE{shown}"] = d.loo_rmse
        row.update({f"LOO RMSE ({r.unit})": d.loo_rmse_natural, "95 % coverage": d.coverage95,
                    f"noise sd ({r.unit})": d.noise_sd})
        units = {f.name: f" ({f.unit})" for f in spec.factors}   # supplier[A]: a level's, no unit
        row.update({f"length scale {k}{units.get(k, '')}": v for k, v in d.length_scales.items()})
        text, bad = verdict(d)
        out.append(f"<h3>{esc(r.name)}{' (safety)' if r.is_safety else ''}</h3>")
        out.append(html_table(pd.DataFrame([row])))
        if d.choice and len(d.choice.get("scores", {})) > 1:
            out.append(html_table(tables.choice_frame(d), "Model choice: the candidate with the highest "
                                  "leave-one-out log density is used (the Gaussian process on ties)."))
        if d.terms:
            out.append(html_table(tables.term_frame(d), f"Terms of the {d.model} polynomial, least "
                                  "squares, in coded units (each factor's low at -1, high at +1) on the "
                                  "model's scale; p-values from Student t with "
                                  f"{d.n - len(d.terms)} degrees of freedom."))
        fig = image(figure_png(loo_figure(d, response=r)),
                    f"Measured {r.name} against its leave-one-out prediction with 95 % bars for {d.n} runs.",
                    "Dashed: prediction equals measurement. Squares: runs outside their 95 % bar.")
        if d.block_offsets:
            out.append(html_table(pd.DataFrame({"block": list(d.block_offsets),
                                                f"offset ({r.unit})": list(d.block_offsets.values())}),
                                  f"Block offsets of {r.name}: shift of each block against the average "
                                  f"block (sd {d.block_sd:.3g} {r.unit}); the model removes them, so a "
                                  "shift between blocks is read neither as noise nor as a factor effect"))
        out.append(f"<div class=\"side\">{fig}<div>{para(text, 'verdict bad' if bad else 'verdict')}"
                   f"{bullets(d.warnings)}</div></div>")
    return "\n".join(out)


# ----------------------------------------------------------------------------------------------- maps
def maps(c: Content) -> str:
    spec, win = c.spec, c.window
    if spec.d < 2:
        return para("Maps need two factors; this study has one. See the window table and trade-off.")
    centre = slice_centre(spec, win)
    feas = None
    if spec.limited:
        from windowfinder.answers.results import feasibility_of
        feas = feasibility_of(spec, c.fit, bool(getattr(win, "mean_only", False)))
    conf = win.confidence if win is not None else spec.confidence
    pairs = [p for p in map_pairs(spec, c.influence) if not set(p) & set(spec.categorical)]
    if spec.categorical and len(spec.numeric) < 2:
        return para("Maps need two numeric factors; this study has one besides its categorical factors. "
                    "See the window table and trade-off.")
    out = [para("Per pair of factors, first the probability that a "
                + ("run meets every limit on average (process mean)" if getattr(win, "mean_only", False)
                   else "new run meets every limit") + "; hatched //: uncertain class (between "
                f"{1 - conf:.2g} and {conf:g}); hatched xx: untrusted (far from every run, or a model too "
                "unsure against its limit). Then, for each limit, its margin map: how many predictive "
                "standard deviations the prediction stays inside the limit (orange) or beyond it (purple); "
                "solid line: the predicted median on the limit; dashed: 2 sd, about 98 % for that limit "
                "alone. Box: the window as exported to window.json (dashed: widened by the tolerance)"
                + ("; blue dash-dot box: the window of record (the last verified window), beside the "
                   "refit on all runs" if c.record is not None else "") + ". "
                "Circles: done runs; crosses: failed runs; diamonds: suggested runs.")]
    if len(spec.numeric) > 2:   # only then is a numeric factor off a map's axes
        out.append(para("With more than two numeric factors each map is a slice: the numeric factors not "
                        "on its axes are held at the " + ("window centre" if win is not None and win.found
                                                          else "most probable point found" if win is not None
                                                          and win.best_point else "middle of their ranges")
                        + " (named under each map; the cross marks the slice point), and runs are "
                        "projected onto the slice."))
    if spec.linear:
        out.append(para("Grey hatched: settings a [[constraint]] forbids ("
                        + "; ".join(con.text() for con in spec.linear.constraints)
                        + "), with the factors off the axes at the slice values."))
    if spec.categorical:
        out.append(para("Categorical factors are never an axis: every pair is mapped at each level (level "
                        "combination) in turn, with the runs made at that level; the window box is drawn "
                        "at the levels the window names."))
    if len(pairs) < spec.d * (spec.d - 1) // 2:
        out.append(para(f"{spec.d} factors: maps shown for the pairs among the {len(set(sum(pairs, ())))} "
                        "factors of largest total influence."))
    for pair in pairs:
        for combo, at, runs, sug, win_at in _level_slices(c, centre):
            out.append(_map_html(c, pair, at, runs, sug, win_at, conf, feas, combo))
    return "\n".join(out)


def _level_slices(c: Content, centre):
    """``(combo, centre, runs, suggestions, window)`` per level combination of the categorical factors:
    the slice point at that level, the runs and suggestions made there, the window where it holds."""
    spec, win = c.spec, c.window
    runs = c.study.runs.completed()
    if not spec.categorical:
        yield (), centre, runs, c.suggestions, win
        return
    from windowfinder.answers.levelwindow import window_boxes

    held = ({b[2] for b in window_boxes(spec, win.factors)} if win is not None and win.found else set())
    sug = c.suggestions
    for combo in spec.level_combinations():
        at = centre.copy()
        at[spec.categorical] = spec.level_codes(combo)
        names = [spec.factors[j].levels[k] for j, k in zip(spec.categorical, combo)]
        cat = [spec.factor_names[j] for j in spec.categorical]
        here = np.all(runs[cat].to_numpy(float) == np.array(combo, float), axis=1) if len(runs) else []
        sug_here = None
        if sug is not None and len(sug):
            sug_here = sug[np.all(sug[cat].astype(str).to_numpy() == np.array(names), axis=1)]
        shown = win if combo in held else (None if win is None or win.found else win)
        yield combo, at, runs[here] if len(runs) else runs, sug_here, shown


def _map_html(c: Content, pair, centre, runs, suggestions, win, conf, feas, combo) -> str:
    spec = c.spec
    i, j = pair
    grid = slice_grid(spec, c.fit, pair, centre, confidence=conf, feasibility=feas,
                      mean_only=bool(getattr(win, "mean_only", False)))
    fig = slice_figure(spec, c.fit, win, pair, runs, suggestions, grid, record=c.record)
    fx, fy = spec.factors[i], spec.factors[j]
    shown = [r.name for r in (spec.limited or spec.goals or spec.responses)]
    alt = (f"Maps over {fx.name} and {fy.name}: predicted {', '.join(shown)}"
           + (": the probability of meeting all limits with hatched uncertain and untrusted "
              "regions, then each limit's margin in predictive standard deviations" if spec.limited
              else "")
           + "; window box and runs marked.")
    level = ", ".join(f"{spec.factors[k].name} = {spec.factors[k].levels[v]}"
                      for k, v in zip(spec.categorical, combo))
    alt += f" At {level}." if level else ""
    held = spec.to_natural(centre)[0]   # only the factors off the axes: the numeric ones, then the level
    off = [f"{f.name} = {v:.4g} {f.unit}".rstrip() for k, (f, v) in enumerate(zip(spec.factors, held))
           if k not in pair and not f.is_categorical] + ([level] if level else [])
    caption = "Held: " + ", ".join(off) + "." if off else ""
    return (f"<h3>{esc(fx.name)} × {esc(fy.name)}{(' at ' + esc(level)) if level else ''}</h3>"
            + image(figure_png(fig), alt, caption))


# ------------------------------------------------------------------------------------------ trade-off
def tradeoff(c: Content) -> str:
    spec, tr = c.spec, c.tradeoff
    if tr is None:
        return para("No response has a goal (maximize, minimize or target), so there is no trade-off.")
    out = [para(tr.message)]
    if tr.frame.empty:
        return "\n".join(out)
    front = tables.distinct_front(spec, tr.frame)
    if len(front) < len(tr.frame):
        out.append(para(f"{len(front)} distinct settings after rounding to each factor's step."))
    tr = replace(tr, frame=front)
    goals = [r.name for r in spec.goals]
    alt = (f"Trade-off front of {len(tr.frame)} settings for the goals {', '.join(goals)}, with 95 % "
           "prediction intervals" + (" as parallel coordinates" if len(goals) >= 3 else "")
           + "; the balanced pick is highlighted.")
    out.append(image(figure_png(tradeoff_figure(spec, tr)), alt,
                     "Every setting shown meets all limits with at least the stated confidence. Star: "
                     "balanced pick."))
    if len(tr.frame):
        classes = ["pick" if p else "" for p in tr.frame["balanced_pick"]]
        out.append(html_table(tr.frame, f"Trade-off settings (natural units, pick marked; "
                                         f"confidence {tr.confidence:g})", classes))
    return "\n".join(out)


# ------------------------------------------------------------------------------------------ influence
def influence(c: Content) -> str:
    ind = c.influence
    if ind is None:
        return para("Not computed.")
    evals = ind.n * (c.spec.d + 2)
    out = [para("How much of each model's predicted variation over the study bounds each factor explains "
                "(factors taken as independent and uniform between low and high). First order: the factor "
                "alone. Total: including its interactions with the others; a total near 0 means the "
                f"factor hardly matters within its range. Estimated from {evals} model evaluations; ± is "
                "a 95 % bootstrap half-width. These indices describe the models, not the process: an "
                "effect smaller than the run-to-run scatter, or outside the tested ranges, does not show.")]
    out.append(image(figure_png(influence_figure(ind)),
                     "Bar charts of first-order and total Sobol indices per factor for "
                     + ", ".join(ind.outputs or ["the response"]) + "."))
    frame = ind.to_frame().round(3).rename(columns={"output": "response", "first_conf": "first ±",
                                           "total_conf": "total ±"})
    out.append(html_table(frame, "Sobol' indices of each model's predicted median"))
    return "\n".join(out)


# ------------------------------------------------------------------------------------------ next runs
def next_runs(c: Content) -> str:
    s = c.suggestions
    out = [para(f"{len(s)} proposed runs (natural units); they are drawn as diamonds on the maps.")]
    out.append(html_table(s.reset_index(drop=True), "Proposed next runs"))
    if c.spec.has_safety and c.cautions:
        out.append(para(c.cautions[0], "verdict bad"))
    return "\n".join(out)
