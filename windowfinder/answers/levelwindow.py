"""The window of a study with categorical factors: one numeric box, and the levels on which it holds.

A categorical factor's coded column takes only its level codes, so a box along it is no window. The
search fixes the categorical columns at each level combination in turn and runs the numeric box search
there (:func:`windowfinder.answers.window.find_window`); the largest box found is then checked at every
other combination with the same adversarial verification (:class:`~windowfinder.answers.verifier.
BoxVerifier`: corners, faces, centre, Sobol points, local search over its guard box). A box found at one
level is tight there, so it seldom holds at another even when the levels behave alike; hence one more
search runs on the lowest probability over all combinations, ``min_c P(x, c)``, whose boxes hold on every
combination; with three or more combinations also on the ``k`` combinations with the largest own boxes,
for each ``k`` whose bound (``k`` times the smallest of those boxes) could beat the best so far, so that
a bad level in the middle of a list (``A``, ``B`` bad, ``C``) does not cost ``A`` and ``C`` their shared
box. The window is the candidate of largest volume, together with every combination on which its
guard box meets the confidence. Its volume is the numeric box's share of the numeric factor space times
the share of level combinations it holds on.
"""

from __future__ import annotations

import itertools
from typing import TYPE_CHECKING

import numpy as np

from windowfinder.answers.verifier import BoxVerifier, Recorder, volume
from windowfinder.answers.window import WindowResult, find_window
from windowfinder.errors import InputError, nearest

if TYPE_CHECKING:
    from windowfinder.inputs.spec import StudySpec


def _embed(spec, U_num, codes):
    """Full coded settings from numeric columns and the categorical columns' codes."""
    U_num = np.atleast_2d(np.asarray(U_num, dtype=float))
    U = np.empty((U_num.shape[0], spec.d))
    U[:, spec.numeric] = U_num
    U[:, spec.categorical] = codes
    return U


def _full(spec, v, codes):
    return None if v is None else _embed(spec, v, codes)[0]


def find_level_window(spec, prob_fn, confidence, snap, set_point=None, seed=0, combos=None,
                      n_check=256) -> WindowResult:
    """Largest numeric box at ``confidence`` and the level combinations on which it holds.

    Parameters
    ----------
    spec : StudySpec
        With at least one categorical factor.
    prob_fn : callable
        Joint probability of full coded settings ``(n, d) -> (n,)`` (constraints already masked in).
    confidence : float
    snap : callable
        ``snap(lower, upper)`` of the numeric columns (coded), as for ``find_window``.
    set_point : ndarray (d_num,) or None
        Coded set point of the numeric factors.
    combos : list of tuple or None
        Level combinations to search (default: all); ``--level`` fixes some.

    Returns
    -------
    WindowResult
        In full coded units; the categorical columns of ``lower``..``upper`` hold the combination the box
        was found on, ``levels`` lists every combination it holds on (that one first).
    """
    combos = list(spec.level_combinations() if combos is None else combos)
    sub = spec.numeric_part()
    t = sub.tolerances_coded

    def at(combo):
        codes = spec.level_codes(combo)
        return lambda U_num: prob_fn(_embed(spec, U_num, codes))

    search = dict(tolerance=t, set_point=set_point, seed=seed, nested=True, snap=snap, n_check=n_check)
    results = [find_window(at(c), sub.d, confidence, **search) for c in combos]
    found = [i for i, r in enumerate(results) if r.found]
    if not found:   # the combination that came closest speaks for all
        i = int(np.argmax([r.best_probability for r in results]))
        return _embedded(spec, results[i], combos[i], [])
    best = _spread(spec, results, combos, found, confidence, t, seed, n_check, set_point, at)
    # boxes holding on several combinations: min P over the k combinations with the largest own boxes
    # (k = 2 .. all); such a box is no larger than the smallest own box among them, which prunes k
    order = sorted(found, key=lambda i: -results[i].volume)
    total = len(spec.level_combinations())
    for k in range(2, len(combos) + 1):
        group = combos if k == len(combos) else [combos[i] for i in order[:k]]
        if k < len(combos) and (k > len(order) or results[order[k - 1]].volume * k / total <= best.volume):
            continue
        cand = _joint(spec, group, at, confidence, search, total)
        if cand is not None and cand.volume > best.volume:
            best = cand
    return best


def _joint(spec, group, at, confidence, search, total):
    """The box of ``min_c P(x, c)`` over the combinations ``group`` (None when none is found)."""
    fns = [at(c) for c in group]
    joint = find_window(lambda U: np.min([f(U) for f in fns], axis=0), spec.numeric_part().d, confidence,
                        **search)
    if not joint.found:
        return None
    x = joint.worst_point
    c = group[int(np.argmin([f(x[None, :])[0] for f in fns]))]
    out = _embedded(spec, joint, group[0], group)
    out.worst_point = _full(spec, x, spec.level_codes(c))
    out.volume = float(volume(joint.lower, joint.upper)) * len(group) / total
    out.message = _message(spec, group, joint.min_probability, confidence)
    return out


def _message(spec, held, worst_p, confidence) -> str:
    names = ["/".join(spec.factors[j].levels[i] for j, i in zip(spec.categorical, c)) for c in held]
    return (f"window found on level(s) {', '.join(names)}: lowest P = {worst_p:.3g} over the guard box "
            f"(confidence {confidence:g})")


def _spread(spec, results, combos, found, confidence, t, seed, n_check, set_point, at) -> WindowResult:
    """The largest single-combination box, with every other combination its guard box holds on."""
    sub = spec.numeric_part()
    k = max(found, key=lambda i: results[i].volume)
    best = results[k]
    held, worst_p, worst_x = [combos[k]], best.min_probability, _full(spec, best.worst_point,
                                                                        spec.level_codes(combos[k]))
    for i, c in enumerate(combos):
        if i == k:
            continue
        rec = Recorder(at(c))
        check = BoxVerifier(rec, sub.d, confidence, t, seed, n_check, 4, 2 ** -4, set_point is not None)
        if len(check.verify(best.lower, best.upper)):
            continue
        held.append(c)
        X_in, P_in = rec.inside(best.guard_lower, best.guard_upper)
        j = int(np.argmin(P_in))
        if P_in[j] < worst_p:
            worst_p, worst_x = float(P_in[j]), _full(spec, X_in[j], spec.level_codes(c))
    out = _embedded(spec, best, combos[k], held)
    out.min_probability, out.worst_point = float(worst_p), worst_x
    out.volume = float(volume(best.lower, best.upper)) * len(held) / len(spec.level_combinations())
    out.message = _message(spec, held, worst_p, confidence)
    return out


def _embedded(spec, r: WindowResult, combo, held) -> WindowResult:
    """``r`` (numeric columns) in full coded units with the categorical columns at ``combo``."""
    codes = spec.level_codes(combo)
    return WindowResult(
        r.found, _full(spec, r.lower, codes), _full(spec, r.upper, codes), _full(spec, r.guard_lower, codes),
        _full(spec, r.guard_upper, codes), r.min_probability, _full(spec, r.worst_point, codes), r.volume,
        r.confidence, r.best_probability, _full(spec, r.best_point, codes), r.message,
        _full(spec, r.set_point, codes), _full(spec, r.tolerance, np.zeros(len(spec.categorical))),
        r.n_evaluations, _full(spec, r.verified_lower, codes), _full(spec, r.verified_upper, codes),
        list(held))


# -- level combinations of a window (window.json entries, --level) ------------------------------
def window_boxes(spec: StudySpec, factors: list[dict], guard: bool = False) -> list[tuple]:
    """``(lower, upper, combo)`` in coded units for every level combination a window names (window.json
    ``factors`` entries: numeric ``low``/``high``, categorical ``levels``); one box without categorical
    factors (``combo = ()``)."""
    by_name = {f["name"]: f for f in factors}
    lo = np.zeros(spec.d)
    hi = np.zeros(spec.d)
    for j, f in enumerate(spec.factors):
        if not f.is_categorical:
            e = by_name[f.name]
            lo[j] = f.to_coded(e["guard_low"] if guard and "guard_low" in e else e["low"])
            hi[j] = f.to_coded(e["guard_high"] if guard and "guard_high" in e else e["high"])
    choices = [[spec.factors[j].index_of(v) for v in by_name[spec.factors[j].name]["levels"]]
               for j in spec.categorical]
    out = []
    for combo in itertools.product(*choices):
        a, b = at_levels(spec, lo, combo)[0], at_levels(spec, hi, combo)[0]
        out.append((a, b, tuple(combo)))
    return out


def allowed_combinations(spec: StudySpec, fixed: dict | None):
    """Level combinations of the categorical factors left by ``fixed`` ``{factor: level name}``; None
    when the study has no categorical factor."""
    if not spec.categorical:
        if fixed:
            raise InputError(f"--level {next(iter(fixed))}: the study has no categorical factor")
        return None
    fixed = fixed or {}
    cat = [spec.factors[j] for j in spec.categorical]
    for name in fixed:
        if name not in [f.name for f in cat]:
            raise InputError(f"--level {name}=...: '{name}' is not a categorical factor; "
                             + nearest(name, [f.name for f in cat], "categorical factors are"))
    want = {spec.categorical.index(spec.factor_names.index(n)): spec.factor(n).index_of(v)
            for n, v in fixed.items()}
    return [c for c in spec.level_combinations() if all(c[k] == i for k, i in want.items())]


def at_levels(spec: StudySpec, U, combo):
    """Coded settings ``U`` with the categorical columns set to a level combination."""
    U = np.array(np.atleast_2d(U), dtype=float)
    if spec.categorical:
        U[:, spec.categorical] = spec.level_codes(combo)
    return U


def merge_ranges(per_level: list[list[dict]]) -> list[dict]:
    """Predicted ranges over several level combinations: the widest of each bound."""
    out = [dict(p) for p in per_level[0]]
    for other in per_level[1:]:
        for p, q in zip(out, other):
            for k, pick in (("low", min), ("high", max), ("pi95_low", min), ("pi95_high", max)):
                p[k] = pick(p[k], q[k])
    return out
