"""Verification plan: runs inside the window to confirm it before scale-up, and the verdict on them.

The plan replicates the window's centre (or set point) and visits its corners — all ``2^d`` for
``d <= 4``, a spread-out (greedy maximin) subset above — in randomised order, with each response's
predicted median and 95 % prediction interval and blank columns to fill in. ``verify`` reads the filled
plan back, checks every result against its prediction interval and against the limits, appends the runs
to the run table, and gives a one-line verdict.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import qmc

from windowfinder.errors import InputError
from windowfinder.inputs.cells import _number, _raw_rows, level_value
from windowfinder.inputs.runs import next_ids
from windowfinder.inputs.spec import StudySpec

PLAN_FILE = "testplan.csv"


def _corners(d: int, k: int | None, seed: int) -> np.ndarray:
    """All 2^d corners of the unit cube, or a greedy maximin subset of ``k`` of them."""
    if d <= 4 or k is None:
        C = np.array(np.meshgrid(*[[0.0, 1.0]] * d, indexing="ij")).reshape(d, -1).T
        return C if k is None or k >= len(C) else C[np.random.default_rng(seed).permutation(len(C))[:k]]
    rng = np.random.default_rng(seed)
    pool = rng.integers(0, 2, size=(min(4096, 2 ** min(d, 12)), d)).astype(float)
    pool = np.unique(pool, axis=0)
    chosen = [pool[rng.integers(len(pool))]]
    dist = np.abs(pool - chosen[0]).sum(axis=1)
    while len(chosen) < min(k, len(pool)):
        i = int(np.argmax(dist))
        chosen.append(pool[i])
        dist = np.minimum(dist, np.abs(pool - pool[i]).sum(axis=1))
    return np.array(chosen)


@dataclass
class TestPlan:
    """Verification runs inside the window, with predictions to compare against."""

    frame: pd.DataFrame
    message: str

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()

    def to_dict(self) -> dict:
        return {"message": self.message, "runs": self.frame.to_dict("records")}


def build_testplan(spec: StudySpec, fit, window, existing_ids, runs: int | None = None,
                   centre: int = 3, seed: int | None = None) -> TestPlan:
    """Plan verification runs inside ``window`` (a found :class:`answers.ProcessWindow`)."""
    if not window.found:
        raise InputError("no window at this confidence, so nothing to verify; run 'windowfinder window' "
                         "with a lower --confidence or add runs first")
    seed = spec.seed if seed is None else seed
    if spec.categorical:   # the plan of the numeric ranges at every level the window names
        X, kinds, centre, n_corner, extra = _by_level(spec, window, runs, centre, seed)
    else:
        lo = np.array([f["low"] for f in window.factors])
        hi = np.array([f["high"] for f in window.factors])
        mid = (np.array([window.set_point[f] for f in spec.factor_names]) if window.set_point
               else (lo + hi) / 2)
        X, kinds, centre, n_corner, extra = _points(spec, lo, hi, mid, runs, centre, seed)
    order = np.random.default_rng(seed).permutation(len(X))
    X, kinds = X[order], [kinds[i] for i in order]
    frame = pd.DataFrame(X, columns=spec.factor_names)
    frame.insert(0, "run", next_ids(existing_ids, len(X), prefix="V"))
    frame.insert(1, "point", kinds)
    U = spec.to_coded(X)
    for r in spec.responses:
        med, plo, phi = fit.surrogates.models[r.name].predict_interval(U, level=0.95, noise=True)
        frame[r.name] = np.nan
        frame[f"{r.name}_pred"], frame[f"{r.name}_lo95"], frame[f"{r.name}_hi95"] = med, plo, phi
    frame = spec.labelled(frame)
    n_combo = len(X) // max(1, centre + n_corner + max(extra, 0))
    per = "" if not spec.categorical else (
        f" at each of {n_combo} level combinations" if n_combo > 1 else " at one level combination")
    msg = (f"{len(frame)} verification runs inside the window ({centre} at the centre, "
           f"{n_corner} corners{f', {extra} inside' if extra > 0 else ''}{per}), in randomised order")
    return TestPlan(frame, msg)


def _points(spec: StudySpec, lo, hi, mid, runs, centre, seed):
    """Centre replicates, corners (and Latin hypercube points inside) of the box ``lo..hi`` (natural)."""
    d = spec.d
    n_corner = 2 ** d if d <= 4 else max(2 * d, 8)
    if runs is not None:
        if runs < 2:
            raise InputError(f"--runs {runs}: a verification plan needs at least 2 runs")
        centre = min(centre, max(1, runs // 4))
        n_corner = min(n_corner, runs - centre)
    C = _corners(d, n_corner if (d > 4 or n_corner < 2 ** d) else None, seed)
    parts = [np.repeat(mid[None, :], centre, axis=0), lo + C * (hi - lo)]
    kinds = ["centre"] * centre + ["corner"] * len(C)
    extra = 0 if runs is None else runs - centre - len(C)
    if extra > 0:
        U = qmc.LatinHypercube(d, seed=seed).random(extra)
        parts.append(lo + U * (hi - lo))
        kinds += ["inside"] * extra
    X = np.clip(spec.round_to_step(np.vstack(parts)), lo, hi)
    return X, kinds, centre, len(C), extra


def _by_level(spec: StudySpec, window, runs, centre, seed):
    """:func:`_points` of the numeric factors once per level combination the window names (``runs``
    counts per combination)."""
    from windowfinder.answers.levelwindow import window_boxes

    sub, num, cat = spec.numeric_part(), spec.numeric, spec.categorical
    Xs, kinds = [], []
    for lo_c, hi_c, combo in window_boxes(spec, window.factors):
        lo, hi = spec.to_natural(lo_c)[0][num], spec.to_natural(hi_c)[0][num]
        mid = (np.array([window.set_point[spec.factor_names[j]] for j in num]) if window.set_point
               else (lo + hi) / 2)
        Xn, k, c, n_corner, extra = _points(sub, lo, hi, mid, runs, centre, seed)
        X = np.empty((len(Xn), spec.d))
        X[:, num], X[:, cat] = Xn, np.array(combo, dtype=float)
        Xs.append(X)
        kinds += k
    return np.vstack(Xs), kinds, c, n_corner, extra


@dataclass
class Verification:
    """Per run and response: inside the 95 % prediction interval? inside the limits? And a verdict."""

    frame: pd.DataFrame
    confirmed: bool
    verdict: str
    results: pd.DataFrame  # rows to append to the run table

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()

    def to_dict(self) -> dict:
        return {"confirmed": self.confirmed, "verdict": self.verdict,
                "checks": self.frame.to_dict("records")}


def read_filled_plan(path, spec: StudySpec) -> pd.DataFrame:
    """The filled plan: run, factors, measured responses, prediction intervals (validated)."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found; give the filled-in {PLAN_FILE}")
    header, rows, lines = _raw_rows(path)
    need = ["run", *spec.factor_names, *spec.response_names]
    need += [f"{r}_{s}" for r in spec.response_names for s in ("lo95", "hi95")]
    missing = [c for c in need if c not in header]
    if missing:
        raise InputError(f"{path.name}: missing column '{missing[0]}'; use the plan written by "
                         "'windowfinder testplan'")
    if not rows:
        raise InputError(f"{path.name}: no runs in the plan")
    col = {c: i for i, c in enumerate(header)}
    recs = []
    for cells, line in zip(rows, lines):
        cells = cells + [""] * (len(header) - len(cells))
        run = cells[col["run"]].strip()
        where = f"{path.name} line {line} (run {run or '?'})"
        rec = {"run": run}
        for c in need[1:]:
            f = next((f for f in spec.factors if f.name == c and f.is_categorical), None)
            rec[c] = (level_value(cells[col[c]], where, f) if f is not None
                      else _number(cells[col[c]], where, c, allow_blank=c in spec.response_names))
        recs.append(rec)
    frame = pd.DataFrame(recs)
    if frame["run"].duplicated().any():
        raise InputError(f"{path.name}: duplicate run id '{frame.loc[frame['run'].duplicated(), 'run'].iloc[0]}'")
    return frame


def verify_plan(spec: StudySpec, filled: pd.DataFrame, existing_ids) -> Verification:
    """Judge the filled verification runs against their prediction intervals and the limits."""
    clash = sorted(set(filled["run"]) & set(map(str, existing_ids)))
    if clash:
        raise InputError(f"run id '{clash[0]}' of the plan is already in runs.csv; these results were "
                         "recorded before (nothing changed)")
    checks, broken, outside, measured = [], [], 0, 0
    for rec in filled.to_dict("records"):
        for r in spec.responses:
            y = rec[r.name]
            if not np.isfinite(y):
                continue
            measured += 1
            in_pi = rec[f"{r.name}_lo95"] <= y <= rec[f"{r.name}_hi95"]
            in_lim = bool(r.margin(y) >= 0)
            outside += not in_pi
            if not in_lim:
                broken.append(f"{rec['run']} {r.name} = {y:g} ({r.limit_text()})")
            checks.append({"run": rec["run"], "response": r.name, "measured": y,
                           "lo95": rec[f"{r.name}_lo95"], "hi95": rec[f"{r.name}_hi95"],
                           "inside_interval": in_pi, "meets_limit": in_lim})
    if measured == 0:
        raise InputError("the plan has no measured results; fill in the response columns first")
    limited = [r.name for r in spec.limited]
    blanks = [f"{rec['run']} {n}" for rec in filled.to_dict("records") for n in limited
              if not np.isfinite(rec[n])]
    share_in = 1 - outside / measured
    if broken:
        verdict = f"window NOT confirmed: {len(broken)} result(s) broke a limit, e.g. {broken[0]}"
    elif blanks:
        verdict = f"window not yet confirmed: limited responses not measured ({', '.join(blanks[:3])})"
    elif share_in < 0.8:
        verdict = (f"window NOT confirmed: every limit held, but only {share_in:.0%} of results fell "
                   "inside their 95 % prediction intervals — the models are off; refit with these runs")
    else:
        verdict = (f"window confirmed: all {len(filled)} runs met every limit; {share_in:.0%} of results "
                   "inside their 95 % prediction intervals")
    results = filled[["run", *spec.factor_names, *spec.response_names]].copy()
    results["status"] = "done"
    results["note"] = "verification run"
    return Verification(pd.DataFrame(checks), not broken and not blanks and share_in >= 0.8, verdict,
                        results)
