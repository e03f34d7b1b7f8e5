"""Linear constraints between factors: combinations of settings that must never be run.

A study file states each constraint in natural units as a sum of coefficient x setting with a lower
and/or upper bound, ``min <= sum_j c_j x_j <= max``. Internally every constraint row becomes
``a . u <= b`` in coded units (``x_j = low_j + u_j span_j``), so the set of allowed settings is the convex
polytope ``A u <= b`` inside the unit cube. One sign convention for the slack, as for limits:
``margin = b - A u``, met when ``>= 0``.

Because the allowed set is convex, a box lies inside it exactly when its corners do, and the largest
value of a linear form over a box is reached at a corner: ``max_{lo <= u <= hi} a . u =
sum_i max(a_i lo_i, a_i hi_i)`` (the support function of a box; Boyd & Vandenberghe, Convex
Optimization, 2004, section 3.1 and example 3.30). That closed form checks a window's guard band in
O(m d) for any number of factors, and gives the largest shrink of a box about its centre that keeps it
inside. Joint feasibility of all constraints within the bounds is an LP feasibility problem, solved with
``scipy.optimize.linprog`` (HiGHS).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

SLACK = 1e-9  # coded-unit slack of the "meets the constraint" test, for float noise of rounding


@dataclass(frozen=True, eq=False)
class Constraint:
    """``min <= sum(coefficient x setting) <= max`` in natural units (either bound may be absent)."""

    name: str
    terms: dict = field(default_factory=dict)
    min: float | None = None
    max: float | None = None

    def value(self, X, factor_names) -> np.ndarray:
        """The linear form ``sum_j c_j x_j`` at natural settings ``X`` (n, d), columns in study order."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        c = np.array([self.terms.get(f, 0.0) for f in factor_names])
        return X @ c

    def margin(self, X, factor_names) -> np.ndarray:
        """Smallest margin ``value - min`` or ``max - value`` (natural units); met when ``>= 0``."""
        return bounded_margin(self.value(X, factor_names), self.min, self.max)

    def text(self) -> str:
        parts = [(("- " if c < 0 else "+ ") if i else ("-" if c < 0 else "")) + f"{abs(c):g} {f}"
                 for i, (f, c) in enumerate(self.terms.items())]
        form = " ".join(parts)
        if self.min is not None and self.max is not None:
            return f"{self.min:g} <= {form} <= {self.max:g}"
        return f"{form} >= {self.min:g}" if self.min is not None else f"{form} <= {self.max:g}"

    def to_dict(self) -> dict:
        return {"name": self.name, "terms": dict(self.terms), "min": self.min, "max": self.max}


def bounded_margin(v, low=None, high=None) -> np.ndarray:
    """The one sign convention: smallest of ``v - low`` and ``high - v`` (absent bounds ignored);
    a bound is met when the margin is ``>= 0``."""
    v = np.asarray(v, dtype=float)
    m = np.full(v.shape, np.inf)
    if low is not None:
        m = np.minimum(m, v - low)
    if high is not None:
        m = np.minimum(m, high - v)
    return m


def box_range(coef, low, high) -> tuple[float, float]:
    """Smallest and largest value of ``coef . x`` over the box ``low <= x <= high`` (closed form)."""
    coef, low, high = (np.asarray(v, dtype=float) for v in (coef, low, high))
    a, b = coef * low, coef * high
    return float(np.minimum(a, b).sum()), float(np.maximum(a, b).sum())


class LinearConstraints:
    """Constraints of a study in coded units: rows ``A u <= b`` with the name of the constraint of each row.

    Parameters
    ----------
    constraints : sequence of :class:`Constraint`
    factor_names, lows, spans : the study's factors in order, natural lows and spans.
    """

    def __init__(self, constraints, factor_names, lows, spans):
        self.constraints = tuple(constraints)
        lows, spans = np.asarray(lows, dtype=float), np.asarray(spans, dtype=float)
        rows, bounds, names = [], [], []
        for con in self.constraints:
            c = np.array([con.terms.get(f, 0.0) for f in factor_names])
            a, offset = c * spans, float(c @ lows)   # c . x = a . u + offset
            scale = max(float(np.abs(a).max()), 1e-300)  # rows scaled to unit max coefficient
            if con.max is not None:
                rows.append(a / scale), bounds.append((con.max - offset) / scale), names.append(con.name)
            if con.min is not None:
                rows.append(-a / scale), bounds.append((offset - con.min) / scale), names.append(con.name)
        self.A = np.array(rows, dtype=float).reshape(-1, len(lows))
        self.b = np.array(bounds, dtype=float)
        self.row_names = names

    def __bool__(self) -> bool:
        return len(self.b) > 0

    @property
    def d(self) -> int:
        return self.A.shape[1]

    # -- points --------------------------------------------------------------------------------------
    def margin(self, U) -> np.ndarray:
        """Slack ``b - A u`` of every row at coded settings ``U`` (n, d) -> (n, rows); met when ``>= 0``."""
        U = np.atleast_2d(np.asarray(U, dtype=float))
        return self.b[None, :] - U @ self.A.T

    def feasible(self, U) -> np.ndarray:
        """True for the rows of ``U`` that meet every constraint (within :data:`SLACK`)."""
        U = np.atleast_2d(np.asarray(U, dtype=float))
        if not self:
            return np.ones(len(U), dtype=bool)
        return np.all(self.margin(U) >= -SLACK, axis=1)

    def broken(self, U) -> list[list[str]]:
        """Names of the constraints each row of ``U`` breaks (empty list when it meets them all)."""
        M = self.margin(U) < -SLACK
        return [sorted({self.row_names[k] for k in np.flatnonzero(row)}) for row in M]

    def masked(self, prob_fn):
        """``prob_fn`` with probability 0 at every setting that breaks a constraint (never to be run)."""
        if not self:
            return prob_fn

        def fn(X):
            X = np.atleast_2d(np.asarray(X, dtype=float))
            return np.where(self.feasible(X), np.asarray(prob_fn(X), dtype=float).reshape(-1), 0.0)

        return fn

    # -- boxes -----------------------------------------------------------------------------------
    def box_worst(self, lo, hi) -> np.ndarray:
        """Largest ``a . u - b`` over the box ``lo..hi`` for every row (closed form; <= 0 means inside)."""
        lo, hi = np.asarray(lo, dtype=float), np.asarray(hi, dtype=float)
        return np.maximum(self.A * lo, self.A * hi).sum(axis=1) - self.b

    def box_inside(self, lo, hi) -> bool:
        """True when the whole box ``lo..hi`` (coded) meets every constraint."""
        return bool(not self or np.all(self.box_worst(lo, hi) <= SLACK))

    def shrink_share(self, centre, half, pad=None) -> float:
        """Largest ``s`` in [0, 1] such that the box ``centre +- (s half + pad)`` meets every constraint.

        Row by row, ``a . centre + sum_i |a_i| (s half_i + pad_i) <= b`` (support function of a box), so
        ``s = min over rows of (b - a . centre - |a| . pad) / (|a| . half)``; negative when even the
        centre with its pad breaks a constraint.
        """
        if not self:
            return 1.0
        centre, half = np.asarray(centre, dtype=float), np.asarray(half, dtype=float)
        pad = np.zeros_like(half) if pad is None else np.asarray(pad, dtype=float)
        absA = np.abs(self.A)
        room = self.b - self.A @ centre - absA @ pad
        need = absA @ half
        with np.errstate(divide="ignore", invalid="ignore"):
            s = np.where(need > 0, room / need, np.where(room >= -SLACK, np.inf, -np.inf))
        return float(min(1.0, s.min()))

    # -- the whole region ------------------------------------------------------------------------
    def feasible_point(self):
        """One coded setting in the unit cube that meets every constraint, or None (LP, HiGHS).

        Maximises the smallest slack ``t`` subject to ``A u + t <= b``, ``0 <= u <= 1``, ``t <= 1``; the
        region is empty when the best ``t`` is negative.
        """
        from scipy.optimize import linprog

        d = self.d
        if not self:
            return np.full(d, 0.5)
        A_ub = np.hstack([self.A, np.ones((len(self.b), 1))])
        res = linprog(np.r_[np.zeros(d), -1.0], A_ub=A_ub, b_ub=self.b,
                      bounds=[(0.0, 1.0)] * d + [(None, 1.0)], method="highs")
        if res.status != 0 or -res.fun < -SLACK:
            return None
        return np.clip(res.x[:d], 0.0, 1.0)
