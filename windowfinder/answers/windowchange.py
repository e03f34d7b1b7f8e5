"""Why a window shrank: one line comparing a new window with an earlier one (campaign batch or refit).

The line gives the volume ratio (volumes as in :func:`windowfinder.answers.window.volume_text`), the limit
that binds where the new models cut the old window (the per-limit probabilities at the lowest-probability
point of the old guard box: corners, face centres, centre and a Sobol set), and the run(s) in or near the
old guard box with the lowest measured margin on that limit (margin = value - min or max - value).
"""

from __future__ import annotations

import numpy as np
from scipy.stats import qmc

from windowfinder.answers.window import volume_text

NEAR = 0.05  # coded distance counted as "near" the old guard box (common practice, no source)


def shrink_note(spec, feas, old_volume: float, old_guard, new_volume: float, runs=None,
                seed: int = 0) -> str | None:
    """One line when ``new_volume < old_volume`` (else None).

    Parameters
    ----------
    spec : StudySpec
    feas : Feasibility
        The new models' feasibility.
    old_volume, new_volume : float
        Window volumes (share of the studied factor space; 0 when no window).
    old_guard : (ndarray, ndarray)
        The old window's guard box, coded.
    runs : DataFrame or None
        Runs to blame (e.g. the latest batch), natural units, with the response columns.
    """
    if not old_volume > 0 or new_volume >= old_volume * (1.0 - 1e-9):
        return None
    lo, hi = (np.asarray(v, dtype=float) for v in old_guard)
    d = spec.d
    corners = (np.arange(2 ** d)[:, None] >> np.arange(d)) & 1 if d <= 8 else np.empty((0, d))
    U = lo + np.vstack([corners, np.full((1, d), 0.5),
                        qmc.Sobol(d, scramble=True, seed=seed).random(256)]) * (hi - lo)
    p_each, joint = feas.probabilities(U)
    i = int(np.argmin(joint))
    k = int(np.argmin(p_each[i]))
    resp = spec.limited[k]
    x = spec.to_natural(U[i])[0]
    at = ", ".join(f"{f.name} = {v:.4g}" for f, v in zip(spec.factors, x))
    how = (f"{old_volume / new_volume:.3g}x" if new_volume > 0 else "to no window")
    line = (f"window shrank {how} ({volume_text(old_volume)} -> {volume_text(new_volume)}): "
            f"{resp.name} {resp.limit_text()} binds in the old window (P = {p_each[i, k]:.2f} at {at})")
    return line + _blame(spec, resp, runs, lo, hi)


def _blame(spec, resp, runs, lo, hi) -> str:
    if runs is None or not len(runs) or resp.name not in runs:
        return ""
    X = spec.to_coded(runs[spec.factor_names].to_numpy(float))
    near = np.all((X >= lo - NEAR) & (X <= hi + NEAR), axis=1)
    y = runs[resp.name].to_numpy(float)
    margin = np.where(near & np.isfinite(y), resp.margin(y), np.inf)
    if not np.isfinite(margin).any():
        return "; no latest run lies in or near it (the refit moved the models)"
    j = int(np.argmin(margin))
    return (f"; lowest-margin latest run there: {runs['run'].iloc[j]} ({resp.name} = {y[j]:.4g}, "
            f"margin {margin[j]:.3g})")
