"""Overall desirability of several goals (Derringer & Suich 1980) and the pick it makes on a front.

Each goal's value is mapped to a desirability in ``[0, 1]`` (one-sided for maximise / minimise,
two-sided for a target) and the goals are combined by a weighted geometric mean (Derringer & Suich,
"Simultaneous optimization of several response variables", J. Quality Technology 12(4), 1980;
importances after Derringer, "A balancing act: optimizing a product's properties", Quality Progress
27(6), 1994). :func:`windowfinder.answers.tradeoff.find_tradeoff` uses it for ``pick="desirability"``.
"""

from __future__ import annotations

import numpy as np

from windowfinder.errors import InputError

__all__ = ["desirability"]

_GOALS = ("maximize", "minimize", "target")


def _one_desirability(y, goal):
    """Derringer & Suich (1980) desirability of one goal: one-sided (maximize, minimize) or two-sided."""
    kind = goal.get("goal")
    if kind not in _GOALS:
        raise InputError(f"desirability goal {kind!r}: use one of {', '.join(_GOALS)}")
    try:
        low, high = float(goal["low"]), float(goal["high"])
    except KeyError as exc:
        raise InputError(f"desirability goal {kind!r} needs 'low' and 'high'") from exc
    if not high > low:
        raise InputError(f"desirability goal {kind!r}: high ({high}) must exceed low ({low})")
    r = float(goal.get("weight", 1.0))
    if kind == "maximize":
        return np.clip((y - low) / (high - low), 0.0, 1.0) ** r
    if kind == "minimize":
        return np.clip((high - y) / (high - low), 0.0, 1.0) ** r
    t = float(goal.get("target", np.nan))
    if not low < t < high:
        raise InputError(f"desirability target {t}: must lie strictly between low ({low}) and high ({high})")
    s = float(goal.get("weight_low", r))
    u = float(goal.get("weight_high", r))
    below = np.clip((y - low) / (t - low), 0.0, 1.0) ** s
    above = np.clip((high - y) / (high - t), 0.0, 1.0) ** u
    return np.where(y <= t, below, above)


def desirability(values, goals, each=False) -> np.ndarray:
    """Overall desirability: geometric mean of Derringer & Suich one- and two-sided desirabilities.

    Derringer & Suich, "Simultaneous optimization of several response variables", J. Quality
    Technology 12(4), 1980. For a response ``y`` with acceptable range ``[low, high]``:

    * maximise: ``d = ((y - low) / (high - low))**r`` clipped to ``[0, 1]``
      (0 below ``low``, 1 above ``high``);
    * minimise: ``d = ((high - y) / (high - low))**r`` clipped to ``[0, 1]``;
    * target ``T``: ``((y - low) / (T - low))**s`` for ``y <= T``, ``((high - y) / (high - T))**t``
      for ``y >= T``, 0 outside ``[low, high]``.

    The overall desirability is ``D = (prod_i d_i**w_i) ** (1 / sum_i w_i)`` with importances
    ``w_i`` (default 1, which gives the plain geometric mean of the 1980 paper; unequal importances
    follow Derringer, "A balancing act: optimizing a product's properties", Quality Progress 27(6),
    1994).

    Parameters
    ----------
    values : array (n, m)
        Response values in natural units, one column per goal.
    goals : list of m dict
        ``{"goal": "maximize"|"minimize"|"target", "low", "high", "target" (for target),
        "weight" (shape exponent r; default 1), "weight_low"/"weight_high" (s, t for target;
        default ``weight``), "importance" (default 1)}``.
    each : bool
        Return the per-goal ``d`` of shape (n, m) instead of ``D``.

    Returns
    -------
    ndarray (n,) or (n, m)
    """
    Y = np.asarray(values, dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None] if len(goals) == 1 else Y[None, :]
    if Y.shape[1] != len(goals):
        raise InputError(f"desirability: {Y.shape[1]} value column(s) but {len(goals)} goal(s)")
    D_each = np.column_stack([_one_desirability(Y[:, i], g) for i, g in enumerate(goals)])
    return D_each if each else _geometric_mean(D_each, goals)


def _geometric_mean(D_each, goals):
    """``(prod_i d_i**w_i) ** (1 / sum_i w_i)`` with importances ``w_i`` (default 1); 0 if any d_i is 0."""
    w = np.array([float(g.get("importance", 1.0)) for g in goals])
    if np.any(w <= 0):
        raise InputError("desirability: every importance must be positive")
    with np.errstate(divide="ignore"):
        logd = np.where(D_each > 0, np.log(np.where(D_each > 0, D_each, 1.0)), -np.inf)
    return np.exp((logd * w).sum(axis=1) / w.sum())


def _desirability_pick(X, F, spec) -> int:
    """Index of the highest overall desirability; ``spec`` is goal dicts or a callable on ``X``.

    Goal dicts are in the natural units of each goal, so the value is recovered from the
    minimisation form: ``y = -F`` (maximize), ``y = F`` (minimize). For a target ``F = |y - T|`` loses
    the side, so the lower of ``d(T - F)`` and ``d(T + F)`` is scored (exact when the two sides of
    the two-sided desirability are symmetric); pass a callable for an exact score.
    """
    if callable(spec):
        D = np.asarray(spec(X), dtype=float).reshape(len(X))
    else:
        if len(spec) != F.shape[1]:
            raise InputError(f"desirability: {len(spec)} goal(s) given for {F.shape[1]} trade-off goal(s)")
        cols = []
        for j, goal in enumerate(spec):
            if goal.get("goal") == "target":
                t = float(goal.get("target", np.nan))
                cols.append(np.minimum(*(_one_desirability(t + sign * F[:, j], goal) for sign in (-1, 1))))
            else:
                y = -F[:, j] if goal.get("goal") == "maximize" else F[:, j]
                cols.append(_one_desirability(y, goal))
        D = _geometric_mean(np.column_stack(cols), spec)
    return int(np.argmax(D))
