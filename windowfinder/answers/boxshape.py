"""Box shaping by face expansion, the default shape step of :func:`windowfinder.answers.window.find_window`.

From a set of *blockers* (coded points below the confidence) and seeds (the feasible candidates with
the largest max-norm clearance from them), the largest cube about each seed is grown face by face to
the nearest blocker in its slab (greedy face expansion), then faces are traded (one pulled in by 1/4 ..
1/100 of its width, the others re-expanded, the change kept when the volume grows). Each shaped box is
verified by a :class:`~windowfinder.answers.verifier.BoxVerifier`, whose failing points become blockers
for the next shape (cutting-plane refinement). The genetic-algorithm alternative is
:mod:`windowfinder.answers.boxevolution`.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from windowfinder.answers.verifier import BoxVerifier, scale, volume

class _Search:
    """Box shaping at one confidence: blockers (transposed, (d, n)) and the verifier that adds to them.

    Boxes are pairs ``(lower, upper)`` of stated ranges in coded units.
    """

    def __init__(self, check: BoxVerifier):
        self.check, self.d, self.t, self.fixed = check, check.d, check.t, check.fixed
        self.BT = np.zeros((self.d, 0))
        check.on_fail = self.add_blockers

    def add_blockers(self, X):
        self.BT = np.hstack([self.BT, np.asarray(X, dtype=float).reshape(-1, self.d).T])

    def shape(self, lower, upper):
        """Face expansion, then face trading."""
        return self.trade(*self.expand(lower, upper))

    def cube(self, centre):
        """The largest cube about ``centre`` whose guard box holds no blocker (None if there is none)."""
        a = scale(centre, np.ones(self.d), self.BT, 0.0, self.t, cap=self.fixed)
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
        vol = volume(lower, upper)
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
                    if volume(L, U) > vol * (1.0 + 1e-9):
                        lower, upper, vol, improved = L, U, volume(L, U), True
        return lower, upper


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
    """Shape from each seed; verify boxes largest first, reshaping around the failing points; every box
    still valid at the end, largest first. A box is skipped when its volume, times the shrink the first
    verified box needed, cannot beat the best so far."""
    check = search.check
    boxes = [search.shape(*b) for b in (search.cube(np.asarray(x, dtype=float)) for x in seeds) if b]
    verified, best_volume, shrink = [], -1.0, 1.0
    for box in sorted(boxes, key=lambda b: -volume(*b)):
        for attempt in range(n_reshape):
            vol = volume(*box)
            if verified and vol * (shrink if attempt == 0 else 1.0) <= best_volume:
                break
            passed = check.settle(*box, max_rounds)
            if passed is not None:
                shrink = volume(*passed) / vol if not verified and vol > 0 else shrink
                verified.append(passed)
                best_volume = max(best_volume, volume(*passed))
            box = search.shape(*(passed if passed is not None else box))
    # later evaluations may have found low points inside an earlier verified box: settle it again
    valid = [b for b in (check.still_valid(b, max_rounds) for b in verified) if b is not None]
    return sorted(valid, key=lambda b: -volume(*b))
