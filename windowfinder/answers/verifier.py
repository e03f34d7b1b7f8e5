"""Adversarial verification of a candidate window: is the lowest joint probability over a box's guard box
at or above the confidence?

The **guard box** of stated ranges ``lower..upper`` is the box widened by each factor's tolerance and
clipped to the unit cube; with no tolerance it is the box itself. Everything here checks the guard box.

Method
------
``prob_fn`` at the guard box's corners, face centres, centre and a Sobol set [1]_ in it; when all pass,
an adversarial search for its lowest probability (L-BFGS-B [2]_ bounded to the guard box, central
differences in one vectorised call) from the lowest few points seen in the box. A failing box shrinks
about its centre (faces on the cube's edge stay) until cubes of a margin around the failing points are
outside, the margin doubling per failure; once it passes, all faces and then each face alone are
bisected back toward the failed box (:meth:`BoxVerifier.settle`).

References
----------
.. [1] Owen, A. B. (1998). Scrambling Sobol' and Niederreiter-Xing points. Journal of Complexity 14(4),
   466-489.
.. [2] Byrd, R. H., Lu, P., Nocedal, J. and Zhu, C. (1995). A limited memory algorithm for bound
   constrained optimization. SIAM J. Sci. Comput. 16(5), 1190-1208.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize
from scipy.stats import qmc

_EDGE = 1e-12  # slack of the "inside the box" test


class Recorder:
    """Wraps ``prob_fn``: checks shapes, reads NaN as 0, keeps every evaluation."""

    def __init__(self, prob_fn, calls=None):
        self.prob_fn = prob_fn
        self._X, self._P = [], []
        self.count = 0  # evaluations held
        self.calls = [0] if calls is None else calls  # prob_fn evaluations, shared by copies

    def __call__(self, X):
        X = np.atleast_2d(np.asarray(X, dtype=float))
        p = np.asarray(self.prob_fn(X), dtype=float).reshape(-1)
        if p.shape != (len(X),):
            raise ValueError(f"prob_fn returned {p.shape[0]} values for {len(X)} points")
        p = np.nan_to_num(p, nan=0.0)
        self._X.append(X)
        self._P.append(p)
        self.count += len(p)
        self.calls[0] += len(p)
        return p

    def copy(self) -> "Recorder":
        """An independent recorder holding the same evaluations (later calls do not touch this one)."""
        other = Recorder(self.prob_fn, self.calls)
        if self.count:
            X, P = self.inside()
            other._X, other._P, other.count = [X.copy()], [P.copy()], self.count
        return other

    def inside(self, lo=0.0, hi=1.0, since=0):
        """Evaluations (from the ``since``-th on) inside the box ``lo..hi`` as ``(X, P)``."""
        if len(self._X) > 1:
            self._X, self._P = [np.vstack(self._X)], [np.concatenate(self._P)]
        X, P = self._X[0][since:], self._P[0][since:]
        mask = np.all((X >= lo - _EDGE) & (X <= hi + _EDGE), axis=1)
        return X[mask], P[mask]


def local_search(f, starts, lo, hi, sign=1.0, maxiter=30):
    """Minimise ``sign * f`` from each start by L-BFGS-B [2]_ inside [lo, hi] (evaluations land in ``f``)."""
    d = len(lo)
    eye = np.eye(d) * (1e-6 * np.maximum(hi - lo, 0.0))

    def fun(x):  # central differences, all 2d + 1 points in one vectorised call
        up, down = np.minimum(x + eye, hi), np.maximum(x - eye, lo)
        p = sign * f(np.vstack([x, up, down]))
        span = np.diag(up - down)
        grad = np.where(span > 0, (p[1:d + 1] - p[d + 1:]) / np.where(span > 0, span, 1.0), 0.0)
        return p[0], grad

    for x0 in starts:
        minimize(fun, np.clip(x0, lo, hi), jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                 options={"maxiter": maxiter})


def scale(m, w, BT, radius, t, cap):
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


def volume(lower, upper):
    """The window's volume: product of the stated ranges' widths in coded units, i.e. the share of the
    studied factor space it covers (the guard band is not counted)."""
    return float(np.prod(np.maximum(np.asarray(upper) - np.asarray(lower), 0.0)))


def distinct(X, k, tol):
    """The first ``k`` rows of ``X`` that are more than ``tol`` apart (max-norm)."""
    keep = []
    for x in X:
        if all(np.max(np.abs(x - y)) > tol for y in keep):
            keep.append(x)
            if len(keep) == k:
                break
    return keep


def centre_half(lower, upper, pin):
    """Centre and half-widths of a box; with ``pin``, faces on the cube's edge are taken as reaching half
    the width beyond it, so that shrinking or reshaping about the centre keeps them on the edge."""
    lower, upper = lower.copy(), upper.copy()
    if pin:
        ext = 0.5 * (upper - lower)
        lower[lower <= 0.0] -= ext[lower <= 0.0]
        upper[upper >= 1.0] += ext[upper >= 1.0]
    return (lower + upper) / 2.0, np.maximum(upper - lower, 1e-9) / 2.0


class BoxVerifier:
    """Checks boxes ``(lower, upper)`` of stated ranges at one confidence, on a shared :class:`Recorder`.

    Every failing point found is passed to ``on_fail`` (the search turns them into blockers).
    """

    def __init__(self, rec, d, confidence, t, seed, n_check, n_local, spacing, fixed_centre,
                 on_fail=None):
        self.rec, self.d, self.c, self.t, self.fixed = rec, d, confidence, t, fixed_centre
        self.n_check, self.n_local, self.spacing = n_check, n_local, spacing
        self.on_fail = on_fail or (lambda X: None)
        self.engine = qmc.Sobol(d, scramble=True, seed=seed + 1)
        self.corners = ((np.arange(2 ** d)[:, None] >> np.arange(d)) & 1 if d <= 10 else
                        np.random.default_rng(seed).integers(0, 2, (1024, d)))

    def guard(self, lower, upper):
        """The guard box: stated ranges widened by the tolerance, clipped to [0, 1]."""
        return np.clip(lower - self.t, 0.0, 1.0), np.clip(upper + self.t, 0.0, 1.0)

    def verify(self, lower, upper):
        """Check a box's guard box; returns every evaluated point in it with ``P < confidence``.

        Corners, face centres, centre and Sobol points first; only when all of them pass, the
        adversarial local search from the lowest few points seen in the guard box.
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
            starts = distinct(X_in[np.argsort(P_in)], self.n_local, 0.1 * np.max(hi - lo))
            local_search(self.rec, starts, lo, hi)
        X_new, P_new = self.rec.inside(lo, hi, since=start)
        self.on_fail(X_new[P_new < self.c])
        return self.failing(lower, upper)

    def failing(self, lower, upper):
        """Every point evaluated so far in the box's guard box with ``P < confidence``."""
        X_in, P_in = self.rec.inside(*self.guard(lower, upper))
        return X_in[P_in < self.c]

    def cut(self, lower, upper, bad, radius):
        """Shrink the box about its centre until cubes of ``radius`` around the ``bad`` points lie outside
        its guard box (faces on the cube's edge stay there, see :func:`centre_half`); None if impossible."""
        m, half = centre_half(lower, upper, pin=not self.fixed)
        share = min(scale(m, half, bad.T, radius, self.t, cap=False), 1.0)
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

    def still_valid(self, box, max_rounds, tries=3):
        """``box`` settled again while later evaluations hold a failing point in it; None if lost."""
        for _ in range(tries):
            if box is None or not len(self.failing(*box)):
                return box
            box = self.settle(*box, max_rounds)
        return box if box is not None and not len(self.failing(*box)) else None
