"""Why a window shrank: one line comparing a new window with an earlier one (a campaign batch, or a refit
against the previous out/window.json).

The line gives the volume ratio (volumes as in :func:`windowfinder.answers.window.volume_text`), the limit
that binds where the new models cut the old window (the per-limit probabilities at the lowest-probability
point of the old guard box: corners, face centres, centre and a Sobol set), and the run(s) in or near the
old guard box with the lowest measured margin on that limit (margin = value - min or max - value).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy.stats import qmc

from windowfinder.answers.window import volume_text
from windowfinder.errors import InputError

NEAR = 0.05  # coded distance counted as "near" the old guard box (common practice, no source)


def shrink_note(spec, feas, old_volume: float, old_guard, new_volume: float, runs=None,
                seed: int = 0, who: str = "latest run") -> str | None:
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
    who : str
        What the runs are called in the line.
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
    at = spec.point_text({f.name: f.label(v) for f, v in zip(spec.factors, x)})
    how = (f"{old_volume / new_volume:.3g}x" if new_volume > 0 else "to no window")
    line = (f"window shrank {how} ({volume_text(old_volume)} -> {volume_text(new_volume)}): "
            f"{resp.name} {resp.limit_text()} binds in the old window (P = {p_each[i, k]:.2f} at {at})")
    return line + _blame(spec, resp, runs, lo, hi, who)


def previous_note(spec, feas, path, win, runs) -> str | None:
    """:func:`shrink_note` against an earlier ``window.json`` at ``path`` written at the same confidence,
    basis (``--mean``) and set point as ``win`` (a :class:`~windowfinder.answers.results.ProcessWindow`);
    None when there is none, it differs in those, or it cannot be read."""
    try:
        old = json.loads(Path(path).read_text())
        if not (old.get("found") and old.get("confidence") == win.confidence
                and bool(old.get("mean_only")) == win.mean_only and old.get("set_point") == win.set_point
                and old.get("fixed_levels") == getattr(win, "fixed_levels", None)):
            return None
        from windowfinder.answers.levelwindow import window_boxes

        lo, hi, _ = window_boxes(spec, old["factors"], guard=True)[0]
        old_volume = float(old["volume_share"])
    except (OSError, ValueError, KeyError, TypeError, InputError):
        return None
    new_volume = win.volume_share if win.found else 0.0
    return shrink_note(spec, feas, old_volume, (lo, hi), new_volume, runs, spec.seed, who="run")


def _blame(spec, resp, runs, lo, hi, who) -> str:
    if runs is None or not len(runs) or resp.name not in runs:
        return ""
    X = spec.to_coded(runs[spec.factor_names].to_numpy(float))
    near = np.all((X >= lo - NEAR) & (X <= hi + NEAR), axis=1)
    y = runs[resp.name].to_numpy(float)
    margin = np.where(near & np.isfinite(y), resp.margin(y), np.inf)
    if not np.isfinite(margin).any():
        return f"; no {who} lies in or near it (the refit moved the models)"
    j = int(np.argmin(margin))
    return (f"; lowest-margin {who} there: {runs['run'].iloc[j]} ({resp.name} = {y[j]:.4g}, "
            f"margin {margin[j]:.3g})")
