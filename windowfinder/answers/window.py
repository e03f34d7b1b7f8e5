"""Largest process window: an axis-aligned box of coded settings whose lowest joint probability of
meeting every limit stays at or above a stated confidence.

Pure geometry and search; the only link to a study is ``prob_fn``, a vectorised callable mapping coded
points ``(n, d)`` to the joint probability ``(n,)``.

Method
------
1. **Candidates.** ``prob_fn`` on a seeded, scrambled Sobol set [1]_ of ``2^min(14, 11 + d)`` points;
   those with ``P < confidence`` are *blockers* (kept: the ``2d + 2`` nearest, max-norm, of some
   feasible candidate). A box must keep every blocker out of its *guard box* (the stated ranges widened
   by the tolerance, clipped to the unit cube).
2. **Shape.** Seeds are the feasible candidates with the largest max-norm clearance from the blockers.
   From the largest cube about a seed, every face is pushed out to the nearest blocker in its slab
   (greedy face expansion); then faces are traded: one is pulled in by 1/4 .. 1/100 of its width, the
   others re-expanded, and the change kept when the volume grows. With a set point both faces of a
   factor move together, so the ranges stay symmetric about it.
3. **Verification.** ``prob_fn`` at the guard box's corners, face centres, centre and a Sobol set in
   it; when all pass, an adversarial search for its lowest probability (L-BFGS-B [2]_ bounded to the
   guard box, central differences in one vectorised call) from the lowest few points seen in the box.
   Points below the confidence become blockers. A failing box shrinks about its centre (faces on the
   cube's edge stay) until cubes of a margin around the failing points are outside, the margin
   doubling per failure; once it passes, all faces and then each face alone are bisected back toward
   the failed box. The shape step reruns from the verified box with the new blockers (cutting-plane
   refinement). Finally every verified box is rechecked against all later evaluations (settled again
   if one fell below the confidence inside it) and the largest is kept; ``min_probability`` is the
   lowest ``P`` of all evaluations inside its guard box.

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
from scipy.optimize import minimize
from scipy.spatial import cKDTree
from scipy.stats import qmc

from windowfinder.errors import InputError

try:  # installed with scikit-learn; without it the search runs unchanged, only slower under load
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    threadpool_limits = None

_EDGE = 1e-12  # slack of the "inside the box" test


@dataclass
class WindowResult:
    """A process window in coded units (arrays of length d; NaN when not found).

    ``lower``..``upper`` are the stated ranges where the set point may be placed; ``guard_lower``..
    ``guard_upper`` widen them by the tolerance (clipped to [0, 1]) and are what was verified.
    ``min_probability`` is the lowest joint probability found over the guard box, at ``worst_point``;
    ``best_probability`` at ``best_point`` the highest found anywhere.
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


class _Recorder:
    """Wraps ``prob_fn``: checks shapes, reads NaN as 0, keeps every evaluation."""

    def __init__(self, prob_fn):
        self.prob_fn = prob_fn
        self._X, self._P = [], []
        self.count = 0

    def __call__(self, X):
        X = np.atleast_2d(np.asarray(X, dtype=float))
        p = np.asarray(self.prob_fn(X), dtype=float).reshape(-1)
        if p.shape != (len(X),):
            raise ValueError(f"prob_fn returned {p.shape[0]} values for {len(X)} points")
        p = np.nan_to_num(p, nan=0.0)
        self._X.append(X)
        self._P.append(p)
        self.count += len(p)
        return p

    def inside(self, lo=0.0, hi=1.0, since=0):
        """Evaluations (from the ``since``-th on) inside the box ``lo..hi`` as ``(X, P)``."""
        if len(self._X) > 1:
            self._X, self._P = [np.vstack(self._X)], [np.concatenate(self._P)]
        X, P = self._X[0][since:], self._P[0][since:]
        mask = np.all((X >= lo - _EDGE) & (X <= hi + _EDGE), axis=1)
        return X[mask], P[mask]


def _local_search(f, starts, lo, hi, sign=1.0, maxiter=30):
    """Minimise ``sign * f`` from each start by L-BFGS-B inside [lo, hi] (evaluations land in ``f``)."""
    d = len(lo)
    eye = np.eye(d) * (1e-6 * np.maximum(hi - lo, 0.0))

    def fun(x):
        up, down = np.minimum(x + eye, hi), np.maximum(x - eye, lo)
        p = sign * f(np.vstack([x, up, down]))
        span = np.diag(up - down)
        grad = np.where(span > 0, (p[1:d + 1] - p[d + 1:]) / np.where(span > 0, span, 1.0), 0.0)
        return p[0], grad

    for x0 in starts:
        minimize(fun, np.clip(x0, lo, hi), jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                 options={"maxiter": maxiter})


def _scale(m, w, BT, radius, t, cap):
    """Largest scale ``a`` keeping cubes of ``radius`` around the blockers (columns of ``BT``, (d, n))
    out of the guard box of ``(m, w)``; negative when the centre's guard box already holds one.

    ``cap``: keep the stated box inside the unit cube (set-point mode); otherwise it is clipped, and
    ``a`` stops where the clipped box is the whole cube.
    """
    a = float(np.min(np.minimum(m, 1.0 - m) / w) if cap else np.max(np.maximum(m, 1.0 - m) / w))
    if BT.shape[1]:
        reach = (np.abs(BT[0] - m[0]) - (t[0] + radius)) / w[0]
        for j in range(1, len(m)):
            np.maximum(reach, (np.abs(BT[j] - m[j]) - (t[j] + radius)) / w[j], out=reach)
        a = min(a, float(reach.min()))
    return a * (1.0 - 1e-9) - 1e-12 if a > 0 else a


def _volume(lower, upper):
    return float(np.prod(np.maximum(upper - lower, 0.0)))


class _Search:
    """State of one window search: blockers (transposed, (d, n)), evaluations, settings.

    Boxes are pairs ``(lower, upper)`` of stated ranges in coded units.
    """

    def __init__(self, rec, d, confidence, t, seed, n_check, n_local, spacing, fixed_centre):
        self.rec, self.d, self.c, self.t, self.fixed = rec, d, confidence, t, fixed_centre
        self.n_check, self.n_local, self.spacing = n_check, n_local, spacing
        self.engine = qmc.Sobol(d, scramble=True, seed=seed + 1)
        self.corners = ((np.arange(2 ** d)[:, None] >> np.arange(d)) & 1 if d <= 10 else
                        np.random.default_rng(seed).integers(0, 2, (1024, d)))
        self.BT = np.zeros((d, 0))

    def add_blockers(self, X):
        self.BT = np.hstack([self.BT, np.asarray(X, dtype=float).reshape(-1, self.d).T])

    def guard(self, lower, upper):
        return np.clip(lower - self.t, 0.0, 1.0), np.clip(upper + self.t, 0.0, 1.0)

    def shape(self, lower, upper):
        """Face expansion, then face trading."""
        return self.trade(*self.expand(lower, upper))

    def cube(self, centre):
        """The largest cube about ``centre`` whose guard box holds no blocker (None if there is none)."""
        a = _scale(centre, np.ones(self.d), self.BT, 0.0, self.t, cap=self.fixed)
        return None if a < 0 else (np.clip(centre - a, 0.0, 1.0), np.clip(centre + a, 0.0, 1.0))

    def expand(self, lower, upper, sweeps=2, hold=None):
        """Greedy face expansion: push each face out to the nearest blocker in its slab (or the cube's
        edge), except factor ``hold``; in set-point mode both faces of a factor move together."""
        lower, upper = lower.copy(), upper.copy()
        BT, t = self.BT, self.t
        for _ in range(sweeps):
            for j in (k for k in range(self.d) if k != hold):
                inside = np.ones(BT.shape[1], dtype=bool)
                for k in range(self.d):
                    if k != j:
                        inside &= (BT[k] >= lower[k] - t[k]) & (BT[k] <= upper[k] + t[k])
                col = BT[j, inside]
                above, below = col[col > upper[j] + t[j]], col[col < lower[j] - t[j]]
                hi = min(1.0, above.min() - t[j] - 1e-9) if above.size else 1.0
                lo = max(0.0, below.max() + t[j] + 1e-9) if below.size else 0.0
                if self.fixed:
                    centre = (lower[j] + upper[j]) / 2.0
                    half = max(min(hi - centre, centre - lo), (upper[j] - lower[j]) / 2.0)
                    lo, hi = centre - half, centre + half
                lower[j], upper[j] = min(lo, lower[j]), max(hi, upper[j])
        return lower, upper

    def trade(self, lower, upper):
        """Face trading: pull one face in by a share of its width, re-expand the others, keep the change
        when the volume grows; shares 1/4, 1/10, 1/30, 1/100 in turn."""
        volume = _volume(lower, upper)
        for share in (0.25, 0.1, 0.03, 0.01):
            improved, rounds = True, 0
            while improved and rounds < 50:
                improved, rounds = False, rounds + 1
                for face in range(self.d if self.fixed else 2 * self.d):
                    j, top = face % self.d, face >= self.d
                    L, U = lower.copy(), upper.copy()
                    cut = share * (U[j] - L[j])
                    if self.fixed or top:
                        U[j] -= cut / 2.0 if self.fixed else cut
                    if self.fixed or not top:
                        L[j] += cut / 2.0 if self.fixed else cut
                    L, U = self.expand(*self.expand(L, U, sweeps=1, hold=j), sweeps=1)
                    if _volume(L, U) > volume * (1.0 + 1e-9):
                        lower, upper, volume, improved = L, U, _volume(L, U), True
        return lower, upper

    def verify(self, lower, upper):
        """Check a box's guard box; returns every evaluated point in it with ``P < confidence``.

        Corners, face centres, centre and Sobol points first; only when all of them pass, the
        adversarial local search from the lowest few. New failing points become blockers.
        """
        start = self.rec.count
        lo, hi = self.guard(lower, upper)
        centre = (lo + hi) / 2.0
        faces = np.repeat(centre[None, :], 2 * self.d, axis=0)
        faces[np.arange(self.d), np.arange(self.d)] = lo
        faces[self.d + np.arange(self.d), np.arange(self.d)] = hi
        pts = np.vstack([lo + self.corners * (hi - lo), faces, centre,
                         lo + self.engine.random(self.n_check) * (hi - lo)])
        if self.rec(pts).min() >= self.c:
            X_in, P_in = self.rec.inside(lo, hi)  # start from the lowest of everything seen in the box
            starts = _distinct(X_in[np.argsort(P_in)], self.n_local, 0.1 * np.max(hi - lo))
            _local_search(self.rec, starts, lo, hi)
        X_new, P_new = self.rec.inside(lo, hi, since=start)
        self.add_blockers(X_new[P_new < self.c])
        return self.failing(lower, upper)

    def failing(self, lower, upper):
        """Every point evaluated so far in the box's guard box with ``P < confidence``."""
        X_in, P_in = self.rec.inside(*self.guard(lower, upper))
        return X_in[P_in < self.c]

    def cut(self, lower, upper, bad, radius):
        """Shrink the box about its centre until cubes of ``radius`` around the ``bad`` points lie outside
        its guard box (faces on the cube's edge stay there, see :func:`_centre_half`); None if impossible."""
        m, half = _centre_half(lower, upper, pin=not self.fixed)
        share = min(_scale(m, half, bad.T, radius, self.t, cap=False), 1.0)
        if share < 0:
            return None
        return np.clip(m - share * half, 0.0, 1.0), np.clip(m + share * half, 0.0, 1.0)

    def settle(self, lower, upper, max_rounds, n_bisect=4):
        """Cut ``lower..upper`` until it verifies, then bisect each face toward the box first given.

        After the k-th failure the cut margin is ``spacing * 2^k / 4``, so a failure on the box's face
        does not creep inward. Returns the verified box or None.
        """
        failed = None
        for k in range(max_rounds):
            bad = self.verify(lower, upper)
            if not len(bad):
                break
            failed = failed or (lower, upper)
            box = self.cut(lower, upper, bad, 0.25 * self.spacing * 2.0 ** k)
            if box is None:
                return None
            lower, upper = box
        else:
            return None
        if failed is None:
            return lower, upper
        first, box = failed, [lower, upper]
        for face in [None] * n_bisect + list(range(self.d if self.fixed else 2 * self.d)) * 2:
            # all faces toward the last failed box, then each face (pair) alone toward the first
            target = failed if face is None else first
            trial = [box[0].copy(), box[1].copy()]
            for k in (0, 1):
                move = slice(None) if face is None else [face % self.d]
                if face is None or self.fixed or k == face // self.d:
                    trial[k][move] = (trial[k][move] + target[k][move]) / 2.0
            if np.max(np.abs(np.concatenate(trial) - np.concatenate(box))) < 1e-6:
                continue
            if not len(self.verify(*trial)):
                box = trial
            elif face is None:
                failed = trial
        return box[0], box[1]


def _centre_half(lower, upper, pin):
    """Centre and half-widths of a box; with ``pin``, faces on the cube's edge are taken as reaching half
    the width beyond it, so that shrinking or reshaping about the centre keeps them on the edge."""
    lower, upper = lower.copy(), upper.copy()
    if pin:
        ext = 0.5 * (upper - lower)
        lower[lower <= 0.0] -= ext[lower <= 0.0]
        upper[upper >= 1.0] += ext[upper >= 1.0]
    return (lower + upper) / 2.0, np.maximum(upper - lower, 1e-9) / 2.0


def _distinct(X, k, tol):
    """The first ``k`` rows of ``X`` that are more than ``tol`` apart (max-norm)."""
    keep = []
    for x in X:
        if all(np.max(np.abs(x - y)) > tol for y in keep):
            keep.append(x)
            if len(keep) == k:
                break
    return keep


def _blockers(C, P, c, seeds, d):
    """Infeasible candidates among the ``2d + 2`` nearest (max-norm) of a feasible candidate or a seed:
    the ones that can bound a box. The rest are dropped to keep the shape search cheap."""
    bad = P < c
    queries = np.vstack([C[~bad]] + [np.atleast_2d(s) for s in seeds])
    k = 2 * d + 2
    if bad.sum() <= k or len(queries) < k:
        return C[bad]
    idx = cKDTree(C[bad]).query(queries, k=k, p=np.inf)[1]
    return C[bad][np.unique(idx)]


def _seeds(C, P, c, BT, n_starts):
    """Feasible candidates with the largest clearance from the blockers, none inside another's cube."""
    feasible = np.flatnonzero(P >= c)
    if not BT.shape[1]:
        return [np.full(C.shape[1], 0.5)]
    clearance = cKDTree(BT.T).query(C[feasible], p=np.inf)[0]
    seeds, radii = [], []
    for i in np.argsort(-clearance):
        x = C[feasible[i]]
        if all(np.max(np.abs(x - s)) > r for s, r in zip(seeds, radii)):
            seeds.append(x)
            radii.append(clearance[i])
            if len(seeds) == n_starts:
                break
    return seeds


def _largest(search, seeds, max_rounds, n_reshape=2):
    """Shape from each seed; verify boxes largest first, reshaping around the failing points, and keep
    the largest verified box. A box is skipped when its volume, times the shrink the first verified box
    needed, cannot beat the best so far."""
    boxes = [search.shape(*b) for b in (search.cube(np.asarray(x, dtype=float)) for x in seeds) if b]
    verified, best_volume, shrink = [], -1.0, 1.0
    for box in sorted(boxes, key=lambda b: -_volume(*b)):
        for attempt in range(n_reshape):
            volume = _volume(*box)
            if verified and volume * (shrink if attempt == 0 else 1.0) <= best_volume:
                break
            passed = search.settle(*box, max_rounds)
            if passed is not None:
                shrink = _volume(*passed) / volume if not verified and volume > 0 else shrink
                verified.append(passed)
                best_volume = max(best_volume, _volume(*passed))
            box = search.shape(*(passed if passed is not None else box))
    # later evaluations may have found low points inside an earlier verified box: settle it again
    valid = [b for b in (_still_valid(search, b, max_rounds) for b in verified) if b is not None]
    return max(valid, key=lambda b: _volume(*b)) if valid else None


def _still_valid(search, box, max_rounds, tries=3):
    for _ in range(tries):
        if box is None or not len(search.failing(*box)):
            return box
        box = search.settle(*box, max_rounds)
    return box if box is not None and not len(search.failing(*box)) else None


def _best(rec, C, P, d, k=4):
    """Highest probability: local maximisation (L-BFGS-B) from the best ``k`` points given."""
    starts = _distinct(C[np.argsort(-P)], k, 1e-3)
    _local_search(rec, starts, np.zeros(d), np.ones(d), sign=-1.0)
    X, P_all = rec.inside()
    i = int(np.argmax(P_all))
    return X[i], float(P_all[i])


def _fmt(x):
    return "(" + ", ".join(f"{v:.3f}" for v in x) + ")"


def find_window(prob_fn, d, confidence, tolerance=None, set_point=None, seed=0, n_check=256,
                n_starts=3, n_local=4, max_rounds=8, n_candidates=None) -> WindowResult:
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

    Returns
    -------
    WindowResult
        ``found=False``, with the best probability found and where, when no box reaches the confidence.
    """
    d = int(d)
    if not 0.0 < confidence < 1.0:
        raise InputError(f"confidence = {confidence}: must lie between 0 and 1 (e.g. 0.95)")
    t = np.zeros(d) if tolerance is None else np.asarray(tolerance, dtype=float).reshape(-1)
    if t.shape != (d,) or np.any(t < 0) or not np.all(np.isfinite(t)):
        raise InputError(f"tolerance {tolerance}: give {d} non-negative half-widths (one per factor)")
    s = None if set_point is None else np.asarray(set_point, dtype=float).reshape(-1)
    if s is not None and (s.shape != (d,) or np.any(s < 0) or np.any(s > 1)):
        raise InputError(f"set point {set_point}: give {d} coded values inside the studied ranges [0, 1]")
    # one BLAS thread: the optimiser's tiny matrix steps otherwise wait on thread hand-offs (measured
    # ~6x slower on a busy 2-core machine)
    with threadpool_limits(1, user_api="blas") if threadpool_limits else nullcontext():
        return _search(prob_fn, d, confidence, t, s, seed, n_check, n_starts, n_local, max_rounds,
                       n_candidates)


def _search(prob_fn, d, confidence, t, s, seed, n_check, n_starts, n_local, max_rounds, n_candidates):
    rec = _Recorder(prob_fn)
    n_cand = n_candidates or 2 ** min(14, 11 + d)
    C = qmc.Sobol(d, scramble=True, seed=seed).random(n_cand)
    P = rec(C)
    search = _Search(rec, d, confidence, t, seed, n_check, n_local, spacing=n_cand ** (-1.0 / d),
                     fixed_centre=s is not None)
    feasible = bool((P >= confidence).any())
    if s is not None:
        seeds = [s] if rec(s[None, :])[0] >= confidence else []
    elif not feasible:
        x, p = _best(rec, C, P, d)
        seeds = [x] if p >= confidence else []
    search.add_blockers(_blockers(C, P, confidence, seeds if s is not None or not feasible else [], d))
    if s is None and feasible:
        seeds = _seeds(C, P, confidence, search.BT, n_starts)
    box = _largest(search, seeds, max_rounds) if seeds else None
    return _result(box, rec, d, confidence, t, s)


def _result(box, rec, d, confidence, t, s):
    X, P = rec.inside()
    if box is None:
        best_point, best_p = _best(rec, X, P, d)
        nan = np.full(d, np.nan)
        where = f" around the set point {_fmt(s)}" if s is not None else ""
        band = " with its tolerance band" if np.any(t > 0) else ""
        msg = (f"no region{where}{band} reaches P >= {confidence:g}; the best found is P = {best_p:.3g} "
               f"at {_fmt(best_point)} (coded)")
        return WindowResult(False, nan, nan.copy(), nan.copy(), nan.copy(), float("nan"), nan.copy(), 0.0,
                            confidence, best_p, best_point, msg, s, t, rec.count)
    lower, upper = box
    glo, ghi = np.clip(lower - t, 0.0, 1.0), np.clip(upper + t, 0.0, 1.0)
    X_in, P_in = rec.inside(glo, ghi)
    i, j = int(np.argmin(P_in)), int(np.argmax(P))
    volume = float(np.prod(upper - lower))
    msg = (f"window found: lowest P = {P_in[i]:.3g} over the guard box (confidence {confidence:g}), "
           f"coded volume {volume:.3g}")
    return WindowResult(True, lower, upper, glo, ghi, float(P_in[i]), X_in[i], volume, confidence,
                        float(P[j]), X[j], msg, s, t, rec.count)
