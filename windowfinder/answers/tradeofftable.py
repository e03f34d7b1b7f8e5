"""The trade-off answer in natural units: the constrained Pareto set with its balanced pick.

This module turns the coded-unit front of :func:`windowfinder.answers.tradeoff.find_tradeoff` into
settings in natural units rounded to the factor steps, with each response's predicted median and 95 %
interval, the joint probability of meeting every limit, and the cautions of
:func:`windowfinder.answers.results.cautions`; it says plainly when the runs cannot carry the answer.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial.distance import cdist

from windowfinder.errors import InputError
from windowfinder.answers.feasibility import extrapolation_threshold
from windowfinder.answers.results import cautions, feasibility_of
from windowfinder.answers.support import runs_needed, study_folder, support_of
from windowfinder.inputs.spec import StudySpec


def objectives_of(spec: StudySpec, surrogates):
    """Goals as one vectorised function to minimise: maximize -> -Y, minimize -> Y, target -> |Y - t|.

    Y is the model's predicted median in natural units (the inverse transform of the latent mean).
    """
    goals = spec.goals
    if not goals:
        raise InputError(f"{spec.source}: no response has a goal; set goal = 'maximize', 'minimize' "
                         "or 'target' on at least one")

    def fn(X):
        cols = []
        for r in goals:
            y = _median(surrogates.models[r.name], X)
            cols.append(-y if r.goal == "maximize" else y if r.goal == "minimize"
                        else np.abs(y - r.target))
        return np.column_stack(cols)

    return fn, [r.name for r in goals]


@dataclass
class TradeoffTable:
    """The constrained trade-off set in natural units, with a marked balanced pick."""

    frame: pd.DataFrame
    found: bool
    pick_method: str
    message: str
    confidence: float
    cautions: list[str]
    supported: bool = True
    advice: str = ""

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()

    def to_dict(self) -> dict:
        return {"found": self.found, "pick_method": self.pick_method, "message": self.message,
                "confidence": self.confidence, "cautions": self.cautions, "supported": self.supported,
                "advice": self.advice, "points": self.frame.to_dict("records")}

    @property
    def pick(self) -> pd.Series | None:
        p = self.frame[self.frame["balanced_pick"]]
        return p.iloc[0] if len(p) else None


def build_tradeoff(spec: StudySpec, fit, confidence: float | None = None, mean_only: bool = False,
                   pick: str = "knee", seed: int | None = None, **search) -> TradeoffTable:
    """Constrained multi-objective search on the models (see :func:`tradeoff.find_tradeoff`).

    Constraints between factors enter the search as pymoo inequality constraints; offspring are moved
    onto the factor steps by a pymoo repair before they are evaluated. Front settings are rounded to
    each factor's step once more afterwards (a no-op unless a step was absent from the search); a rounded setting whose probability falls below the
    confidence, or that rounding moved across a constraint, is dropped, and the balanced pick is chosen
    among the rest.
    """
    from windowfinder.answers.desirability import desirability
    from windowfinder.answers.tradeoff import find_tradeoff, knee_point

    confidence = spec.confidence if confidence is None else float(confidence)
    seed = spec.seed if seed is None else seed
    obj_fn, names = objectives_of(spec, fit.surrogates)
    sup = support_of(spec, fit, [r.name for r in spec.limited] + names)
    if not sup.supported:
        return TradeoffTable(pd.DataFrame(columns=[*spec.factor_names, "balanced_pick"]), False, pick,
                             "no trade-off: " + sup.message, confidence,
                             cautions(spec, fit, None, mean_only), False, sup.advice)
    prob_fn = feasibility_of(spec, fit, mean_only).joint if spec.limited else \
        (lambda X: np.ones(len(X)))
    lin = spec.linear
    goals = _desirability_goals(spec, fit)

    def desir(X):
        values = np.column_stack([_median(fit.surrogates.models[r.name], X) for r in spec.goals])
        return desirability(values, goals)

    res = find_tradeoff(obj_fn, prob_fn, spec.d, confidence, len(names), seed=seed, pick=pick,
                        desirability=desir if pick == "desirability" else None,
                        constraints=(lin.A, lin.b) if lin else None,
                        snap=spec.snap_coded if spec.has_steps else None, **search)
    X = spec.round_to_step(spec.to_natural(res.X)) if len(res.X) else np.empty((0, spec.d))
    if len(X):  # rounding can merge neighbours: keep each setting once, in front order
        _, first = np.unique(X, axis=0, return_index=True)
        X = X[np.sort(first)]
    U = spec.to_coded(X) if len(X) else np.empty((0, spec.d))
    p = prob_fn(U) if len(U) else np.empty(0)
    runs = np.unique(fit.X_runs, axis=0)   # settings far from every run: no claim (answers.support)
    far = cdist(U, runs).min(axis=1) > extrapolation_threshold(runs) if len(U) else np.zeros(0, bool)
    keep = (p >= confidence) & ~far & lin.feasible(U)
    X, U, p = X[keep], U[keep], p[keep]
    frame = pd.DataFrame(X, columns=spec.factor_names)
    chosen = -1
    if len(X):
        for r in spec.responses:
            med, lo, hi = fit.surrogates.models[r.name].predict_interval(U, level=0.95, noise=True)
            frame[f"{r.name}_pred"], frame[f"{r.name}_lo95"], frame[f"{r.name}_hi95"] = med, lo, hi
        frame["p_all_limits"] = p
        chosen = knee_point(obj_fn(U)) if pick == "knee" else int(np.argmax(desir(U)))
    frame["balanced_pick"] = np.arange(len(frame)) == chosen
    frame = spec.labelled(frame)   # categorical factors by level name
    found = bool(res.found and len(frame))
    if found:
        message = (f"{len(frame)} settings on the trade-off front meet all limits with probability "
                   f">= {confidence:g}; balanced pick by {res.pick_method}")
        if (~keep & ~far).any():
            message += (f" ({int((~keep & ~far).sum())} dropped after rounding to the factor steps: below "
                        "the confidence or breaking a constraint)")
        if far.any():
            message += (f" ({int(far.sum())} dropped: farther than {extrapolation_threshold(runs):.2g} "
                        "coded units from every run)")
    elif res.found and far.all():
        n = runs_needed(spec.d, len(runs))
        message = (f"no trade-off: the runs do not support it: every setting on the front is farther than "
                   f"{extrapolation_threshold(runs):.2g} coded units from every run; run a space-filling "
                   f"design of {n} runs: windowfinder design {study_folder(spec)} --method space-filling "
                   f"--runs {n}")
    elif res.found:
        message = "no setting on the step grid keeps the confidence; refine the factor steps"
    else:
        message = res.message
    unsupported = bool(res.found and len(far) and far.all())
    return TradeoffTable(frame, found, res.pick_method, message, confidence,
                         cautions(spec, fit, None, mean_only), not unsupported,
                         message.rsplit("; ", 1)[-1] if unsupported else "")


def _median(model, X):
    """Predicted median in natural units (inverse transform of the latent mean)."""
    mean = model.predict(X, return_std=False)
    mean = mean[0] if isinstance(mean, tuple) else mean
    return model.transform_.inverse(np.asarray(mean, dtype=float))


def _desirability_goals(spec: StudySpec, fit) -> list[dict]:
    """Derringer & Suich (1980) ranges for each goal: limits where given, else the observed range."""
    goals = []
    for r in spec.goals:
        m = fit.surrogates.models[r.name]
        seen = m.transform_.inverse(np.asarray(m.z_train_))
        low = r.min if r.min is not None else float(np.min(seen))
        high = r.max if r.max is not None else float(np.max(seen))
        goals.append({"goal": r.goal, "low": low, "high": high, "target": r.target, "weight": 1.0})
    return goals
