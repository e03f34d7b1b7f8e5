"""Largest process window: an axis-aligned box of coded settings whose lowest joint probability of
meeting every limit stays at or above a stated confidence.

Pure geometry and search; the only link to a study is ``prob_fn``, a vectorised callable mapping coded
points ``(n, d)`` to the joint probability ``(n,)``. The checks of a candidate box (guard box,
adversarial verification, settling a failing box) live in :mod:`windowfinder.answers.verifier`, the
face-expansion shape step (2 below) in :mod:`windowfinder.answers.boxshape`.

Method
------
1. **Candidates.** ``prob_fn`` on a seeded, scrambled Sobol set [1]_ of ``2^min(14, 11 + d)`` points;
   those with ``P < confidence`` are *blockers* (kept: the ``2d + 2`` nearest, max-norm, of some
   feasible candidate). A box must keep every blocker out of its *guard box* (the stated ranges widened
   by the tolerance, clipped to the unit cube; the box itself without tolerance).
2. **Shape.** Seeds are the feasible candidates with the largest max-norm clearance from the blockers.
   From the largest cube about a seed, every face is pushed out to the nearest blocker in its slab
   (greedy face expansion); then faces are traded: one is pulled in by 1/4 .. 1/100 of its width, the
   others re-expanded, and the change kept when the volume grows. With a set point both faces of a
   factor move together, so the ranges stay symmetric about it. (``method="pymoo"`` replaces this step
   by a genetic algorithm over the box bounds, :mod:`windowfinder.answers.boxevolution`.)
3. **Verification** (:class:`~windowfinder.answers.verifier.BoxVerifier`): corners, faces, centre, a
   Sobol set and an adversarial L-BFGS-B search [2]_ over the guard box; points below the confidence
   become blockers, a failing box is settled, and the shape step reruns from it (cutting-plane
   refinement). Every verified box is rechecked against all later evaluations.
4. **Nesting** (``nested=True``). A box verified at ``c'`` is valid at every ``c <= c'``. The search
   runs at every level of :data:`LADDER` above the requested confidence, highest first, and then at the
   requested one, and all verified boxes are candidates. Hence the window at a lower confidence is never
   smaller than the one at any ladder level above it (exactly: the levels above run identically), unless
   the extra search proves that window wrong (finds a point inside it below the confidence).
5. **Grid** (``snap``). Each candidate is rounded inward to the factors' step grid; a candidate with a
   range narrower than one step is dropped (so no window has zero width). The largest rounded candidate
   that passes a final adversarial verification at the requested confidence is the window; its
   ``min_probability`` and ``worst_point`` are the lowest ``P`` of all evaluations inside *its* guard
   box, so the worst point always lies in the guard band reported.

The **volume** of a window is the product of its stated ranges' widths in coded units: the share of the
studied factor space the box (after rounding to the step grid) covers; the guard band is not counted.
It is the one figure used by the json, the message, the report and the campaign log.

References
----------
.. [1] Owen, A. B. (1998). Scrambling Sobol' and Niederreiter-Xing points. Journal of Complexity 14(4),
   466-489.
.. [2] Byrd, R. H., Lu, P., Nocedal, J. and Zhu, C. (1995). A limited memory algorithm for bound
   constrained optimization. SIAM J. Sci. Comput. 16(5), 1190-1208.
"""

from __future__ import annotations

from contextlib import nullcontext
from dataclasses import dataclass, fields

import numpy as np
import pandas as pd
from scipy.stats import qmc

from windowfinder.answers.boxshape import _blockers, _largest, _Search, _seeds
from windowfinder.answers.verifier import BoxVerifier, Recorder, distinct, local_search, volume
from windowfinder.errors import InputError

try:  # installed with scikit-learn; without it the search runs unchanged, only slower under load
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    threadpool_limits = None

LADDER = (0.6, 0.7, 0.8, 0.85, 0.9, 0.95, 0.99)
"""Confidence levels searched above the requested one when ``nested`` (common practice, no source)."""

METHODS = ("faces", "pymoo")


def volume_text(v: float) -> str:
    """The one wording of a window's volume (its share of the studied factor space)."""
    return f"{100.0 * v:.3g} % of the studied factor space"


@dataclass
class WindowResult:
    """A process window in coded units (arrays of length d; NaN when not found).

    ``lower``..``upper`` are the stated ranges where the set point may be placed (rounded inward to the
    step grid when a ``snap`` was given); ``guard_lower``..``guard_upper`` widen them by the tolerance
    (clipped to [0, 1]) and are what was verified. ``min_probability`` is the lowest joint probability
    found over the guard box, at ``worst_point`` (inside it); ``best_probability`` at ``best_point`` the
    highest found anywhere. ``volume`` is the share of the coded cube the stated ranges cover.
    ``verified_lower``..``verified_upper``: the verified box before rounding (when not found because every
    box was narrower than one step: the largest such box).
    """

    found: bool
    lower: np.ndarray
    upper: np.ndarray
    guard_lower: np.ndarray
    guard_upper: np.ndarray
    min_probability: float
    worst_point: np.ndarray
    volume: float
    confidence: float
    best_probability: float
    best_point: np.ndarray
    message: str
    set_point: np.ndarray | None = None
    tolerance: np.ndarray | None = None
    n_evaluations: int = 0
    verified_lower: np.ndarray | None = None
    verified_upper: np.ndarray | None = None
    levels: list | None = None   # categorical factors: level combinations (index tuples) the box holds on

    def to_dict(self) -> dict:
        """JSON-safe dict (arrays as lists, NaN as None)."""
        return {f.name: _plain(getattr(self, f.name)) for f in fields(self)}

    def to_frame(self) -> pd.DataFrame:
        """One row per factor (coded units)."""
        d = len(self.lower)
        cols = {"lower": self.lower, "upper": self.upper, "guard_lower": self.guard_lower,
                "guard_upper": self.guard_upper}
        if self.set_point is not None:
            cols["set_point"] = self.set_point
        cols["tolerance"] = self.tolerance if self.tolerance is not None else np.zeros(d)
        return pd.DataFrame(cols, index=pd.RangeIndex(d, name="factor"))


def _plain(v):
    if isinstance(v, np.ndarray):
        return [_plain(x) for x in v.tolist()]
    if isinstance(v, float):
        return v if np.isfinite(v) else None
    return v.item() if isinstance(v, np.generic) else v


def _best(rec, C, P, d, k=4):
    """Highest probability: local maximisation (L-BFGS-B) from the best ``k`` points given."""
    starts = distinct(C[np.argsort(-P)], k, 1e-3)
    local_search(rec, starts, np.zeros(d), np.ones(d), sign=-1.0)
    X, P_all = rec.inside()
    i = int(np.argmax(P_all))
    return X[i], float(P_all[i])


def _fmt(x):
    return "(" + ", ".join(f"{v:.3f}" for v in x) + ")"


def find_window(prob_fn, d, confidence, tolerance=None, set_point=None, seed=0, n_check=256,
                n_starts=3, n_local=4, max_rounds=8, n_candidates=None, nested=False, snap=None,
                method="faces") -> WindowResult:
    """Largest axis-aligned box of coded settings whose lowest joint probability is >= ``confidence``.

    Parameters
    ----------
    prob_fn : callable
        ``prob_fn(X)``, ``X`` (n, d) in [0, 1]^d, returns the joint probability (n,).
    d : int
        Number of factors.
    confidence : float in (0, 1)
    tolerance : array_like (d,) or None
        Coded half-widths (factor tolerance / span): how far the actual setting may stray from the set
        point. The guard box (stated ranges widened by it, clipped to [0, 1]) must meet the confidence.
    set_point : array_like (d,) or None
        Coded set point: the widest symmetric ranges ``[s - h, s + h]`` around it are returned.
    seed : int
        Seed of every Sobol set.
    n_check, n_starts, n_local, max_rounds, n_candidates : int
        Sobol points per verification (a power of two), seeds, local-search starts per verification,
        failed verifications before a box is given up, candidates (default ``2^min(14, 11 + d)``).
    nested : bool
        Also search at every :data:`LADDER` level above ``confidence`` and keep the largest of all
        (the window never shrinks when the confidence is lowered; see the module notes).
    snap : callable or None
        ``snap(lower, upper) -> (lower, upper)``: the box rounded inward to the step grid (coded units), or
        None when a range is narrower than one step. Candidates are compared after snapping.
    method : {"faces", "pymoo"}
        Shape search: greedy face expansion and trading, or a genetic algorithm over the bounds.

    Returns
    -------
    WindowResult
        ``found=False``, with the best probability found and where, when no box reaches the confidence
        (or every box that does is narrower than one step).
    """
    d = int(d)
    if not 0.0 < confidence < 1.0:
        raise InputError(f"confidence = {confidence}: must lie between 0 and 1 (e.g. 0.95)")
    if method not in METHODS:
        raise InputError(f"window search method '{method}': choose one of {', '.join(METHODS)}")
    t = np.zeros(d) if tolerance is None else np.asarray(tolerance, dtype=float).reshape(-1)
    if t.shape != (d,) or np.any(t < 0) or not np.all(np.isfinite(t)):
        raise InputError(f"tolerance {tolerance}: give {d} non-negative half-widths (one per factor)")
    s = None if set_point is None else np.asarray(set_point, dtype=float).reshape(-1)
    if s is not None and (s.shape != (d,) or np.any(s < 0) or np.any(s > 1)):
        raise InputError(f"set point {set_point}: give {d} coded values inside the studied ranges [0, 1]")
    levels = [c for c in sorted(LADDER, reverse=True) if c > confidence + 1e-9] if nested else []
    opts = dict(n_check=n_check, n_starts=n_starts, n_local=n_local, max_rounds=max_rounds, method=method)
    # one BLAS thread: the optimiser's tiny matrix steps otherwise wait on thread hand-offs (measured
    # ~6x slower on a busy 2-core machine)
    with threadpool_limits(1, user_api="blas") if threadpool_limits else nullcontext():
        return _search(prob_fn, d, levels + [confidence], t, s, seed, n_candidates, snap, opts)


def _search(prob_fn, d, levels, t, s, seed, n_candidates, snap, opts):
    base = Recorder(prob_fn)
    n_cand = n_candidates or 2 ** min(14, 11 + d)
    C = qmc.Sobol(d, scramble=True, seed=seed).random(n_cand)
    P = base(C)
    spacing = n_cand ** (-1.0 / d)

    def make(rec, c):
        return BoxVerifier(rec, d, c, t, seed, opts["n_check"], opts["n_local"], spacing, s is not None)

    pool, best = [], []
    for c in levels:  # each level on its own copy of the candidates: its search is the same in every call
        rec = base.copy()
        pool += [(box, rec) for box in _level(make(rec, c), rec, C, P, s, seed, opts, best)]
    box, narrow, rec = _select(lambda r: make(r, levels[-1]), pool, snap)
    return _result(box, narrow, rec if rec is not None else base, d, levels[-1], t, s)


def _level(check, rec, C, P, s, seed, opts, best):
    """Every box verified at ``check.c``, largest first (``best`` caches the highest P found, [x, p]).

    Face expansion first; when it gives nothing although some setting reaches the confidence, the pymoo
    genetic algorithm (it finds small boxes that the candidate set's spacing hides)."""
    c, d = check.c, check.d
    feasible = bool((P >= c).any())
    if s is not None:
        seeds = [s] if rec(s[None, :])[0] >= c else []
    elif not feasible:
        if not best:
            best.extend(_best(rec.copy(), C, P, d))
        seeds = [best[0]] if best[1] >= c else []
    else:
        seeds = []
    boxes = []
    if opts["method"] == "faces":
        search = _Search(check)
        search.add_blockers(_blockers(C, P, c, seeds if s is not None or not feasible else [], d))
        if s is None and feasible:
            seeds = _seeds(C, P, c, search.BT, opts["n_starts"])
        boxes = _largest(search, seeds, opts["max_rounds"]) if seeds else []
    if not boxes and (seeds or feasible):
        from windowfinder.answers.boxevolution import evolve_box

        box = evolve_box(check, seed=seed, set_point=s)
        passed = check.settle(*box, opts["max_rounds"]) if box is not None else None
        boxes = [passed] if passed is not None else []
    return boxes


def _select(make, pool, snap):
    """The largest pool box, after snapping, that holds at the requested confidence, with the recorder
    of its check; and the largest box dropped for a range narrower than one step (or None).

    A rounded box is checked again on a fresh copy of its own level's evaluations, so the check depends
    only on the box, that level and the confidence (and passes at every lower confidence if it passes)."""
    cands, narrow = [], None
    for box, rec in pool:
        snapped = snap(*box) if snap is not None else box
        if snapped is None or np.any(snapped[1] - snapped[0] <= 1e-12):
            narrow = box if narrow is None or volume(*box) > volume(*narrow) else narrow
            continue
        cands.append((np.asarray(snapped[0], float), np.asarray(snapped[1], float), box, rec))
    for lower, upper, box, rec in sorted(cands, key=lambda b: -volume(b[0], b[1])):
        if np.array_equal(lower, box[0]) and np.array_equal(upper, box[1]):
            return (lower, upper, box), None, rec   # verified as it stands (at a level >= this one)
        rec = rec.copy()
        if not len(make(rec).verify(lower, upper)):
            return (lower, upper, box), None, rec
    return None, narrow, None


def _result(box, narrow, rec, d, confidence, t, s):
    X, P = rec.inside()
    nan = np.full(d, np.nan)
    if box is None:
        best_point, best_p = _best(rec, X, P, d)
        where = f" around the set point {_fmt(s)}" if s is not None else ""
        band = " with its tolerance band" if np.any(t > 0) else ""
        if narrow is not None:
            msg = (f"every region{where}{band} reaching P >= {confidence:g} is narrower than one step of a "
                   f"factor (the widest is {_fmt(narrow[0])} .. {_fmt(narrow[1])}, coded); refine the "
                   "factor steps or lower the confidence")
        elif best_p >= confidence:
            msg = (f"no box{where}{band} reaches P >= {confidence:g}: it holds only at and very near "
                   f"{_fmt(best_point)} (coded, best P = {best_p:.3g})")
        else:
            msg = (f"no region{where}{band} reaches P >= {confidence:g}; the best found is P = "
                   f"{best_p:.3g} at {_fmt(best_point)} (coded)")
        vl, vu = (narrow if narrow is not None else (nan.copy(), nan.copy()))
        return WindowResult(False, nan, nan.copy(), nan.copy(), nan.copy(), float("nan"), nan.copy(), 0.0,
                            confidence, best_p, best_point, msg, s, t, rec.calls[0], vl, vu)
    lower, upper, verified = box
    glo, ghi = np.clip(lower - t, 0.0, 1.0), np.clip(upper + t, 0.0, 1.0)
    X_in, P_in = rec.inside(glo, ghi)
    i, j = int(np.argmin(P_in)), int(np.argmax(P))
    vol = volume(lower, upper)
    msg = (f"window found: lowest P = {P_in[i]:.3g} over the guard box (confidence {confidence:g}), "
           f"volume {volume_text(vol)}")
    return WindowResult(True, lower, upper, glo, ghi, float(P_in[i]), X_in[i], vol, confidence,
                        float(P[j]), X[j], msg, s, t, rec.calls[0], verified[0], verified[1])
