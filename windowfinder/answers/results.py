"""The answer an engineer takes to scale-up, in natural units: the process window.

This module turns the coded-unit result of :mod:`windowfinder.answers.window` into natural units with
units attached, adds the predicted response ranges and the cautions, and says plainly when the models
behind an answer should not be trusted. The trade-off answer, built on the same limits, feasibility and
cautions, is in :mod:`windowfinder.answers.tradeofftable`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
from scipy.stats import qmc

from windowfinder.errors import InputError
from windowfinder.answers.feasibility import Feasibility
from windowfinder.answers.levelwindow import allowed_combinations, at_levels, merge_ranges, window_boxes
from windowfinder.answers.support import judge_extent, study_folder, support_of
from windowfinder.inputs.constraints import box_range
from windowfinder.inputs.spec import StudySpec

CAUTION_GENERAL = ("A window is a statistical estimate from limited tests, not a safety assessment; "
                   "confirm it with verification runs before relying on it.")
CAUTION_SAFETY = ("Safety limit involved ({names}): settings near it need the site's hazard review and "
                  "process-safety procedures; scale-up changes heat and mass transfer, so confirm with "
                  "verification runs at scale; local codes and a qualified, licensed engineer decide.")


def limits_of(spec: StudySpec) -> list[tuple]:
    """``(response, min, max)`` for every limited response, safety limits first."""
    return [(r.name, r.min, r.max) for r in spec.limited]


def feasibility_of(spec: StudySpec, fit, mean_only: bool = False) -> Feasibility:
    return Feasibility(limits_of(spec), fit.surrogates, fit.X_runs, mean_only=mean_only)


def cautions(spec: StudySpec, fit, untrusted_share: float | None = None,
             mean_only: bool = False) -> list[str]:
    """Plain-language cautions; the safety caution comes first when a safety limit is involved."""
    out = []
    safety = [r.name for r in spec.limited if r.is_safety]
    if safety:
        out.append(CAUTION_SAFETY.format(names=", ".join(safety)))
    out.append(CAUTION_GENERAL)
    for d in fit.diagnostics:
        r = spec.response(d.response)
        if r.has_limits and d.loo_q2 < 0.5:
            out.append(f"The model of {d.response} is poor (LOO Q2 = {d.loo_q2:.2f}): its limit is "
                       "judged mostly by wide uncertainty; add runs before trusting this window.")
        elif r.has_limits and not np.isfinite(d.loo_q2):
            out.append(f"The model of {d.response} could not be checked (leave-one-out Q2 undefined): "
                       "its probabilities are unverified.")
        elif r.has_limits and d.n >= 10 and not 0.8 <= d.coverage95 <= 1.0:
            out.append(f"The 95 % intervals of {d.response} covered {d.coverage95:.0%} of held-out runs: "
                       "its probabilities are miscalibrated.")
    if untrusted_share is not None and untrusted_share > 0:
        out.append(f"{untrusted_share:.0%} of the window is far from every run or too uncertain to "
                   "trust; place verification runs there.")
    if mean_only:
        out.append("Probabilities are for the process mean (--mean), not for each new batch: "
                   "run-to-run scatter can still break a limit.")
    return out


@dataclass
class ProcessWindow:
    """The largest window at the stated confidence, in natural units."""

    found: bool
    confidence: float
    min_probability: float
    factors: list[dict]
    predicted: list[dict]
    cautions: list[str]
    message: str = ""
    worst_point: dict = field(default_factory=dict)
    best_probability: float | None = None
    best_point: dict = field(default_factory=dict)
    set_point: dict | None = None
    untrusted_share: float | None = None
    volume_share: float = 0.0
    mean_only: bool = False
    diagnostics: list[dict] = field(default_factory=list)
    safety: bool = False
    supported: bool = True
    advice: str = ""
    constraints: list[dict] = field(default_factory=list)
    fixed_levels: dict | None = None   # window --level: {categorical factor: level}

    def to_dict(self) -> dict:
        return asdict(self)

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame(self.factors)

    def coded_box(self, spec: StudySpec, guard: bool = False):
        """Coded ranges of the window (categorical columns at the first level it names)."""
        return window_boxes(spec, self.factors, guard)[0][:2]


def _point(spec: StudySpec, u) -> dict:
    if u is None:
        return {}
    x = spec.to_natural(np.asarray(u, dtype=float))[0]
    # 12 significant digits: coded -> natural arithmetic leaves 26.000000000000004 on a step grid
    return {f.name: f.label(v) if f.is_categorical else float(f"{v:.12g}") for f, v in zip(spec.factors, x)}


def predicted_ranges(spec: StudySpec, surrogates, lo, hi, seed: int = 0, n: int = 256) -> list[dict]:
    """Range of each response's predicted median, and of its 95 % prediction interval, over a box."""
    d = spec.d
    U = qmc.Sobol(d, scramble=True, seed=seed).random(n)
    corners = np.array(np.meshgrid(*[[0.0, 1.0]] * d)).reshape(d, -1).T if d <= 8 else np.empty((0, d))
    U = lo + np.vstack([U, corners, np.full((1, d), 0.5)]) * (hi - lo)
    out = []
    for r in spec.responses:
        med, lo95, hi95 = surrogates.models[r.name].predict_interval(U, level=0.95, noise=True)
        out.append({"response": r.name, "unit": r.unit, "low": float(np.min(med)),
                    "high": float(np.max(med)), "pi95_low": float(np.min(lo95)),
                    "pi95_high": float(np.max(hi95)), "limit": r.limit_text(), "kind": r.kind})
    return out


def fixed_levels(spec: StudySpec, set_point: dict | None, levels: dict | None) -> dict:
    """``{categorical factor: level}`` fixed by ``levels`` (``--level``) and by a set point's levels.

    A level given both ways must agree: ``--set-point resin=alpha --level resin=beta`` is refused
    (one line) rather than one of them silently winning.
    """
    fixed = dict(levels or {})
    for j in spec.categorical if set_point is not None else []:
        f = spec.factors[j]
        if f.name not in set_point:
            continue
        value = set_point[f.name]
        level = f.levels[f.index_of(value)] if isinstance(value, str) else f.label(value)
        if f.name in fixed and fixed[f.name] != level:
            raise InputError(f"--set-point {f.name}={level} and --level {f.name}={fixed[f.name]} disagree; "
                             f"give the level of '{f.name}' once (in the set point or with --level)")
        fixed[f.name] = level
    return fixed


def build_window(spec: StudySpec, fit, confidence: float | None = None, set_point: dict | None = None,
                 mean_only: bool = False, seed: int | None = None, levels: dict | None = None) -> ProcessWindow:
    """Find the largest window and express it in natural units (see :func:`search_window`).

    ``levels``: ``{categorical factor: level name}`` fixes those factors' levels (``window --level``); a
    set point may name a categorical factor's level too.
    """
    confidence = spec.confidence if confidence is None else float(confidence)
    if not 0.0 < confidence < 1.0:
        raise InputError(f"--confidence {confidence:g}: must lie strictly between 0 and 1, e.g. 0.95")
    seed = spec.seed if seed is None else seed
    sup = support_of(spec, fit, [r.name for r in spec.limited])
    if not sup.supported:
        return ProcessWindow(found=False, confidence=confidence, min_probability=0.0, factors=[],
                             predicted=[], cautions=cautions(spec, fit, None, mean_only),
                             message=sup.message, mean_only=mean_only,
                             diagnostics=[d.to_dict() for d in fit.diagnostics], safety=spec.has_safety,
                             set_point=set_point, supported=False, advice=sup.advice)
    feas = feasibility_of(spec, fit, mean_only)
    fixed = dict(levels or {})
    sp = None
    if set_point is not None:
        missing = [f for f in spec.factor_names if f not in set_point]
        if missing:
            raise InputError(f"--set-point: give every factor (missing: {', '.join(missing)})")
        fixed = fixed_levels(spec, set_point, levels)
        sp = spec.to_coded([spec.factors[j].index_of(fixed[f]) if spec.factors[j].is_categorical
                            else set_point[f] for j, f in enumerate(spec.factor_names)])[0]
        if ((sp < 0) | (sp > 1)).any():
            raise InputError("--set-point: a value lies outside the factor's low..high in study.toml")
    if sp is not None and not spec.linear.feasible(sp)[0]:
        raise InputError("--set-point: it breaks a [[constraint]] in study.toml; choose an allowed set point")
    res = search_window(spec, feas, confidence, sp, seed, combos=allowed_combinations(spec, fixed))
    diags = [d.to_dict() for d in fit.diagnostics]
    common = dict(confidence=confidence, diagnostics=diags, mean_only=mean_only, safety=spec.has_safety,
                  fixed_levels=dict(levels) if levels else None,
                  best_probability=float(res.best_probability) if res.best_probability is not None
                  else None, best_point=_point(spec, res.best_point), set_point=set_point)
    if not res.found:
        common["best_point"], common["best_probability"], note = _settable_best(spec, feas, res)
        msg = (_not_found(spec, res, common["best_point"], common["best_probability"], note)
               + _failure_blocks(spec, feas, confidence, res.best_point, seed))
        return ProcessWindow(found=False, min_probability=float(res.best_probability or 0.0), factors=[],
                             predicted=[], cautions=cautions(spec, fit, None, mean_only),
                             message=msg, **common)
    lo_n, hi_n = spec.to_natural(res.lower)[0], spec.to_natural(res.upper)[0]
    num = spec.numeric
    box = _inward(spec.numeric_part(), lo_n[num], hi_n[num])  # already on the grid: clears float noise
    if box is not None:
        lo_n[num], hi_n[num] = box
    glo_n, ghi_n = guard_band(spec, lo_n, hi_n)
    held = res.levels or [()]
    factors = [{"name": f.name, "levels": sorted({f.levels[c[spec.categorical.index(j)]] for c in held},
                                                 key=f.levels.index)}
               if f.is_categorical else
               {"name": f.name, "unit": f.unit, "low": float(a), "high": float(b),
                "guard_low": float(f"{c:.12g}"), "guard_high": float(f"{e:.12g}"), "tolerance": f.tolerance}
               for j, (f, a, b, c, e) in enumerate(zip(spec.factors, lo_n, hi_n, glo_n, ghi_n))]
    glo, ghi = spec.to_coded(glo_n)[0], spec.to_coded(ghi_n)[0]
    in_guard = glo + qmc.Sobol(spec.d, scramble=True, seed=seed).random(512) * (ghi - glo)
    inside = np.vstack([at_levels(spec, in_guard, c) for c in held])
    fmap = feas.evaluate(inside, max(confidence, 0.5 + 1e-9))
    share = float(fmap.untrusted.mean())
    extent = judge_extent(float(np.mean(fmap.distance > fmap.extrapolation_distance)),
                          fmap.extrapolation_distance, spec.d, len(np.unique(fit.X_runs, axis=0)),
                          study_dir=study_folder(spec))
    if not extent.supported:
        return ProcessWindow(found=False, min_probability=float(res.min_probability), factors=[],
                             predicted=[], cautions=cautions(spec, fit, share, mean_only),
                             message=extent.message, untrusted_share=share, supported=False,
                             advice=extent.advice, **common)
    predicted = merge_ranges([predicted_ranges(spec, fit.surrogates, at_levels(spec, glo, c)[0],
                                                at_levels(spec, ghi, c)[0], seed) for c in held])
    return ProcessWindow(found=True, min_probability=float(res.min_probability), factors=factors,
                         constraints=constraint_margins(spec, glo_n, ghi_n),
                         predicted=predicted,
                         cautions=(cautions(spec, fit, share, mean_only)
                                   + clipped_guard_notes(spec, lo_n, hi_n)), message=res.message,
                         worst_point=_point(spec, res.worst_point), untrusted_share=share,
                         volume_share=float(res.volume), **common)


def search_window(spec: StudySpec, feas: Feasibility, confidence: float, set_point=None,
                  seed: int | None = None, combos=None):
    """The coded-unit window search behind every window figure (``window``, report, campaign log).

    Nested over the confidence ladder (never smaller at a lower confidence) and rounded inward to the
    factor steps, each range at least one step wide (:func:`windowfinder.answers.window.find_window`).
    With categorical factors: one numeric box searched per level combination (``combos``: the ones
    allowed, default all) and the combinations it holds on (:mod:`windowfinder.answers.levelwindow`).
    """
    from windowfinder.answers.window import find_window

    if spec.categorical:
        from windowfinder.answers.levelwindow import find_level_window

        sub = spec.numeric_part()

        def snap_num(lower, upper):
            box = _inward(sub, *_inside_constraints(sub, sub.to_natural(lower)[0], sub.to_natural(upper)[0]))
            return None if box is None else (sub.to_coded(box[0])[0], sub.to_coded(box[1])[0])

        sp = None if set_point is None else np.asarray(set_point, float)[spec.numeric]
        return find_level_window(spec, spec.linear.masked(feas.joint), confidence, snap_num, sp,
                                 spec.seed if seed is None else seed, combos)

    def snap(lower, upper):   # guard band inside every constraint between factors, then the step grid
        box = _inward(spec, *_inside_constraints(spec, spec.to_natural(lower)[0], spec.to_natural(upper)[0]))
        return None if box is None else (spec.to_coded(box[0])[0], spec.to_coded(box[1])[0])

    # a setting that breaks a constraint between factors counts as P = 0: the search keeps it out of the
    # guard box (all 2^d guard-box corners are verified for d <= 10, which suffices for a convex region);
    # the snap then checks every d in closed form (_inside_constraints)
    return find_window(spec.linear.masked(feas.joint), spec.d, confidence, tolerance=spec.tolerances_coded,
                       set_point=set_point, seed=spec.seed if seed is None else seed, nested=True,
                       snap=snap)


def _settable_best(spec: StudySpec, feas, res):
    """The search's most probable point as settings the user can make: rounded to each factor's step
    (:meth:`Factor.round`) with P recomputed there; kept as the model's point (and said so) when the
    rounded one breaks a [[constraint]]. Returns ``(point, P, note)``."""
    if res.best_point is None:
        return {}, res.best_probability, ""
    u = np.asarray(res.best_point, float).reshape(1, -1)
    if not spec.has_steps:
        return _point(spec, u[0]), res.best_probability, ""
    r = np.clip(spec.snap_coded(u), 0.0, 1.0)
    if not spec.linear.feasible(r)[0]:
        return _point(spec, u[0]), res.best_probability, " (a model point between the steps: the nearest " \
            "settings on the steps break a [[constraint]])"
    return _point(spec, r[0]), float(spec.linear.masked(feas.joint)(r)[0]), ""


def _not_found(spec: StudySpec, res, best_point: dict, best_p: float, note: str = "") -> str:
    if res.verified_lower is not None and np.all(np.isfinite(res.verified_lower)):
        lo = spec.to_natural(res.verified_lower)[0]
        hi = spec.to_natural(res.verified_upper)[0]
        narrow = [f"{f.name} {a:.4g} .. {b:.4g} (step {f.step:g})" for f, a, b in zip(spec.factors, lo, hi)
                  if f.step and not f.is_categorical and _inward_range(f, a, b) is None]
        if narrow:
            return (f"every region reaching P >= {res.confidence:g} is narrower than one step: "
                    f"{'; '.join(narrow)}; refine the step in study.toml or lower --confidence")
    where = ", ".join(f"{k} = {v}" if isinstance(v, str) else   # on a step grid: every digit of the step
                      f"{k} = {v:.12g}" if spec.factor(k).step else f"{k} = {v:.4g}"
                      for k, v in best_point.items()) + note
    if res.best_probability >= res.confidence:
        return (f"no box (with its tolerance band) reaches P >= {res.confidence:g}: it holds only at and "
                f"very near {where} (P = {best_p:.3f}); add runs around there or lower --confidence")
    return (f"no region (with its tolerance band) reaches P >= {res.confidence:g}; the best found is "
            f"P = {best_p:.3f} at {where}; add runs there or lower --confidence")


def _inward_range(f, lo: float, hi: float):
    """``lo..hi`` rounded inward to the factor's step, or None when that leaves less than one step."""
    if not f.step:
        return (lo, hi) if hi > lo else None
    a = float(np.round(np.ceil(lo / f.step - 1e-9) * f.step, 10))
    b = float(np.round(np.floor(hi / f.step + 1e-9) * f.step, 10))
    return (a, b) if b - a >= f.step * (1.0 - 1e-9) else None


def _failure_blocks(spec: StudySpec, feas, confidence: float, best_point, seed: int) -> str:
    """A sentence when P(process works) is what keeps every setting below ``confidence``, else "".

    Checked on the best point and 2048 Sobol points: the limits alone reach ``confidence`` somewhere,
    the joint probability (times P(works)) nowhere.
    """
    if feas.failure_ is None:
        return ""
    U = qmc.Sobol(spec.d, scramble=True, seed=seed).random(2048)
    if spec.categorical:   # only the levels exist
        U = spec.snap_coded(U)
    if best_point is not None:
        U = np.vstack([np.asarray(best_point, float).reshape(1, -1), U])
    _, p_each, p_works, joint, _ = feas._chunks(U)
    limits_only = np.prod(p_each, axis=1)
    i = int(np.argmax(np.where(limits_only >= confidence, p_works, -1.0)))
    if limits_only[i] < confidence or joint.max() >= confidence:   # limits, or the band, block it
        return ""
    where = spec.point_text(_point(spec, U[i]))
    return (f". The limits alone are met with P = {limits_only[i]:.3f} at {where}, but the failure model "
            f"gives P(process works) = {p_works[i]:.3f} there: failed runs are what blocks the window. "
            "Runs that work near there raise it; a failed run that broke a limit can say so in the "
            "failed_limit column")


def guard_band(spec: StudySpec, lo_n, hi_n):
    """The window's guard band in natural units: its ranges widened by each tolerance, kept in bounds."""
    tol = np.array([f.tolerance for f in spec.factors])
    return np.maximum(lo_n - tol, spec.lows), np.minimum(hi_n + tol, spec.lows + spec.spans)


def clipped_guard_notes(spec: StudySpec, lo_n, hi_n) -> list[str]:
    """One note per factor whose guard band :func:`guard_band` clipped at a study bound: the window's
    edge plus its tolerance lies beyond the factor's low or high, where no model was asked."""
    out = []
    for f, a, b in zip(spec.factors, lo_n, hi_n):
        if not f.tolerance:
            continue
        slack = 1e-9 * (f.high - f.low)   # float noise of the coded -> natural round trip
        sides = ([f"low {f.low:.6g}"] if a - f.tolerance < f.low - slack else []) + \
                ([f"high {f.high:.6g}"] if b + f.tolerance > f.high + slack else [])
        if sides:
            unit = f" {f.unit}" if f.unit else ""
            out.append(f"The guard band for {f.name} is clipped at the study bound ({' and '.join(sides)}"
                       f"{unit}; tolerance ± {f.tolerance:g}{unit}): the model was not asked about "
                       "settings beyond it; if operation can drift past the bound, confirm there first.")
    return out


def constraint_margins(spec: StudySpec, lo_n, hi_n) -> list[dict]:
    """Each constraint between factors with its smallest margin over the box ``lo_n..hi_n`` (natural
    units; closed form over the corners, met when >= 0)."""
    out = []
    for c in spec.constraints:
        coef = [c.terms.get(f, 0.0) for f in spec.factor_names]
        smallest, largest = box_range(coef, lo_n, hi_n)
        m = min(np.inf if c.max is None else c.max - largest, np.inf if c.min is None else smallest - c.min)
        out.append({**c.to_dict(), "text": c.text(), "smallest_margin": float(m)})
    return out


def _inside_constraints(spec: StudySpec, lo_n, hi_n):
    """Shrink the window about its centre until its guard band meets every constraint between factors.

    Closed form (support function of a box, see :mod:`windowfinder.inputs.constraints`), with the
    guard band taken unclipped, which is conservative. A sub-box of the verified window keeps its
    lowest probability. Leaves a window whose guard band is already inside unchanged.
    """
    lin = spec.linear
    if not lin or lin.box_inside(*(spec.to_coded(g)[0] for g in guard_band(spec, lo_n, hi_n))):
        return lo_n, hi_n
    lo, hi = spec.to_coded(lo_n)[0], spec.to_coded(hi_n)[0]
    m, half = (lo + hi) / 2.0, (hi - lo) / 2.0
    s = max(0.0, lin.shrink_share(m, half, spec.tolerances_coded)) * (1.0 - 1e-9)
    return spec.to_natural(m - s * half)[0], spec.to_natural(m + s * half)[0]


def _inward(spec: StudySpec, lo, hi):
    """Window ranges rounded inward to each factor's step, so every corner can be set; None when a range
    would be narrower than one step (a window of zero width is no window).

    The rounded box lies inside the verified one, so its lowest probability is at least the verified
    minimum (and it is checked again, :func:`windowfinder.answers.window.find_window`).
    """
    lo, hi = np.array(lo, dtype=float), np.array(hi, dtype=float)
    for j, f in enumerate(spec.factors):
        r = _inward_range(f, lo[j], hi[j])
        if r is None:
            return None
        lo[j], hi[j] = r
    return lo, hi
