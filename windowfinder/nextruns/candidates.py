"""Candidate settings for the next runs and the choice of one pick.

The criterion of :mod:`windowfinder.nextruns.suggestions` is scored on a base set (a scrambled Sobol set, or one
weighted towards the current window), on Gaussian perturbations around the best few, and the best is
polished by a short Nelder-Mead search (scipy); every setting is snapped to the factor steps. A
setting closer than ``min_distance`` to a completed run or an earlier pick of the batch is refused. A
completed run may be repeated (replicate) only when its score beats the best new setting by a factor
of :data:`REPLICATE_MARGIN` (common practice, no source).
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize
from scipy.spatial.distance import cdist

N_CENTRES, N_LOCAL, LOCAL_STEP = 4, 32, 0.05   # local perturbations around the best candidates
REPLICATE_MARGIN = 2.0


def on_grid(snap, U):
    """Clip to the unit cube, snap to the steps, drop rows the snap moved outside or marked NaN.

    ``snap`` returns NaN in a row for a setting that must never be run (it breaks a constraint between
    factors), so no candidate, polished pick or replicate can land there.
    """
    U = np.clip(np.asarray(U, dtype=float), 0.0, 1.0)
    V = np.asarray(snap(U), dtype=float).reshape(U.shape)
    inside = np.all(np.isfinite(V) & (V >= -1e-12) & (V <= 1.0 + 1e-12), axis=1)
    return np.clip(V[inside], 0.0, 1.0)


def allowed(snap, U):
    """Rows of ``U`` that the snap keeps (not marked NaN): completed runs that may be repeated."""
    U = np.asarray(U, dtype=float)
    if not len(U):
        return U
    return U[np.all(np.isfinite(np.asarray(snap(U), dtype=float).reshape(U.shape)), axis=1)]


def _distance(C, blocked):
    return np.full(len(C), np.inf) if len(blocked) == 0 else cdist(C, blocked).min(axis=1)


def _polish(score_fn, x0, s0, snap, blocked, min_distance):
    """Short bounded Nelder-Mead on the negative score; keeps the snapped result only if it is better."""
    d = len(x0)
    simplex = np.clip(np.vstack([x0, x0 + 0.5 * LOCAL_STEP * np.eye(d)]), 0.0, 1.0)
    res = minimize(lambda u: -score_fn(np.clip(u, 0.0, 1.0)[None])[0], x0, method="Nelder-Mead",
                   bounds=[(0.0, 1.0)] * d,
                   options={"maxfev": 20 + 20 * d, "xatol": 1e-3, "fatol": 1e-9, "initial_simplex": simplex})
    xp = on_grid(snap, res.x[None])
    if len(xp) and _distance(xp, blocked)[0] >= min_distance:
        sp = score_fn(xp)[0]
        if sp > s0:
            return xp[0], sp
    return x0, s0


def pick(score_fn, base, X_runs, picks, min_distance, snap, rng):
    """One pick: best free candidate (polished), or a replicate of a completed run if far better."""
    s = score_fn(base)
    centres = base[np.argsort(-s, kind="stable")[:N_CENTRES]]
    d = base.shape[1]
    jitter = LOCAL_STEP * rng.standard_normal((len(centres), N_LOCAL, d))
    local = on_grid(snap, (centres[:, None, :] + jitter).reshape(-1, d))
    C, S = np.vstack([base, local]), np.concatenate([s, score_fn(local)])
    blocked = np.vstack([X_runs, *picks]) if picks else X_runs
    dist = _distance(C, blocked)
    free = dist >= min_distance
    x, sx = None, -np.inf
    if free.any():
        best = np.max(S[free])
        ties = free & (S >= best - 1e-12 * max(1.0, abs(best)))
        i = np.flatnonzero(ties)[np.argmax(dist[ties])]   # equal scores: farthest from all runs
        x, sx = _polish(score_fn, C[i], S[i], snap, blocked, min_distance)
    runs = allowed(snap, np.unique(X_runs, axis=0)) if len(X_runs) else X_runs
    if picks and len(runs):
        runs = runs[_distance(runs, np.vstack(picks)) >= min_distance]
    if len(runs):
        sr = score_fn(runs)
        j = int(np.argmax(sr))
        if x is None or (sr[j] > 0 and sr[j] > REPLICATE_MARGIN * max(sx, 0.0)):
            return runs[j], sr[j], True
    if x is None:      # nothing free and nothing to repeat: the best candidate regardless of distance
        return C[np.argmax(S)], np.max(S), True
    return x, sx, False
