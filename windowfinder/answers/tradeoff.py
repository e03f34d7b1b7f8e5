"""Constrained trade-off between goals: the Pareto set inside the limits, at a stated confidence.

The search is pure: it sees two callables on coded settings ``X`` in ``[0, 1]^d`` and knows nothing
about studies or models.

* ``objective_fn(X) -> (n, m)`` values to *minimise* (the caller maps a maximised response to
  ``-mean``, a minimised one to ``mean`` and a target to ``|mean - target|``);
* ``prob_fn(X) -> (n,)`` the joint probability that every limit holds.

The limits enter as one chance constraint ``P(all limits met | x) >= confidence``, handed to pymoo as
the inequality ``G = confidence - P <= 0``. Two goals are searched with NSGA-II (Deb et al., "A fast
and elitist multiobjective genetic algorithm: NSGA-II", IEEE Trans. Evol. Comput. 6(2), 2002), three
or more with NSGA-III on Das–Dennis reference directions (Deb & Jain, "An evolutionary many-objective
optimization algorithm using reference-point-based nondominated sorting approach, part I", IEEE Trans.
Evol. Comput. 18(4), 2014; Das & Dennis, "Normal-boundary intersection", SIAM J. Optim. 8(3), 1998),
and a single goal with a real-coded genetic algorithm; all from pymoo (Blank & Deb, "pymoo:
Multi-objective optimization in Python", IEEE Access 8, 2020). Constraints are handled by pymoo's
feasibility-first comparison (Deb, "An efficient constraint handling method for genetic algorithms",
Comput. Methods Appl. Mech. Eng. 186, 2000).

One point of the front is picked as the balanced choice: the knee (:func:`knee_point`) or the point of
highest overall desirability (:func:`windowfinder.answers.desirability.desirability`, Derringer &
Suich 1980).
"""

from __future__ import annotations

from dataclasses import dataclass
from math import comb

import numpy as np
import pandas as pd
from pymoo.algorithms.moo.nsga2 import NSGA2
from pymoo.algorithms.moo.nsga3 import NSGA3
from pymoo.algorithms.soo.nonconvex.ga import GA
from pymoo.core.problem import Problem
from pymoo.core.repair import Repair
from pymoo.optimize import minimize
from pymoo.util.nds.non_dominated_sorting import NonDominatedSorting
from pymoo.util.ref_dirs import get_reference_directions
from scipy.stats import qmc

from windowfinder.answers.desirability import _desirability_pick
from windowfinder.errors import InputError

__all__ = ["TradeoffResult", "find_tradeoff", "knee_point"]

#: Default population size and generations; a 2-4 factor study on GP surrogates takes seconds.
DEFAULT_POP_SIZE = 100
DEFAULT_N_GEN = 150


@dataclass
class TradeoffResult:
    """Settings on the constrained trade-off front.

    Attributes
    ----------
    X : ndarray (k, d)
        Coded settings on the front, sorted by the first goal.
    F : ndarray (k, m)
        Objective values at ``X`` in minimisation form (as returned by ``objective_fn``).
    p_joint : ndarray (k,)
        Joint probability of meeting all limits at ``X``; every entry is ``>= confidence``.
    pick : int
        Index into ``X`` of the balanced pick; ``-1`` when nothing was found.
    pick_method : str
        ``"knee"`` or ``"desirability"``.
    found : bool
        False when no setting met the chance constraint (``X`` is then empty).
    message : str
        One line for people: what was found, or the best probability reached.
    confidence : float
        The confidence the chance constraint was held to.
    best_probability : float
        Highest joint probability seen anywhere during the search.
    """

    X: np.ndarray
    F: np.ndarray
    p_joint: np.ndarray
    pick: int
    pick_method: str
    found: bool
    message: str
    confidence: float = 0.0
    best_probability: float = 0.0

    def to_frame(self, factor_names=None, objective_names=None) -> pd.DataFrame:
        """One row per front point: coded factors, objective values, ``p_joint``, ``pick`` flag."""
        d, m = self.X.shape[1], self.F.shape[1]
        fac = list(factor_names) if factor_names is not None else [f"x{i + 1}" for i in range(d)]
        obj = list(objective_names) if objective_names is not None else [f"f{j + 1}" for j in range(m)]
        if len(fac) != d or len(obj) != m:
            raise ValueError(f"to_frame: need {d} factor names and {m} objective names")
        frame = pd.DataFrame(np.hstack([self.X, self.F]), columns=fac + obj)
        frame["p_joint"] = self.p_joint
        frame["pick"] = np.arange(len(frame)) == self.pick
        return frame

    def to_dict(self) -> dict:
        """JSON-safe summary."""
        return {"found": bool(self.found), "message": self.message, "confidence": float(self.confidence),
                "best_probability": float(self.best_probability), "pick": int(self.pick),
                "pick_method": self.pick_method, "X": self.X.tolist(), "F": self.F.tolist(),
                "p_joint": self.p_joint.tolist()}


class _ChanceConstrainedProblem(Problem):
    """pymoo problem over ``[0, 1]^d``: minimise ``objective_fn`` subject to ``confidence - P <= 0``.

    Evaluated on the whole population at once (vectorised). Keeps an archive of every evaluated
    setting that meets the chance constraint and is not dominated by another such setting, so good
    points found early are not lost when the population moves on; remembers the best probability seen.
    """

    def __init__(self, objective_fn, prob_fn, d, n_obj, confidence, constraints=None):
        A, b = (np.empty((0, d)), np.empty(0)) if constraints is None else (
            np.asarray(constraints[0], dtype=float).reshape(-1, d), np.asarray(constraints[1], dtype=float))
        super().__init__(n_var=d, n_obj=n_obj, n_ieq_constr=1 + len(b), xl=0.0, xu=1.0)
        self.objective_fn = objective_fn
        self.prob_fn = prob_fn
        self.confidence = confidence
        self.A, self.b = A, b
        self.best_p = 0.0
        self.archive = (np.empty((0, d)), np.empty((0, n_obj)), np.empty(0))

    def _evaluate(self, x, out, *args, **kwargs):
        F, P = _evaluate_callables(self.objective_fn, self.prob_fn, x, self.n_obj)
        G_lin = x @ self.A.T - self.b[None, :]   # linear constraints between factors, A x - b <= 0
        allowed = np.all(G_lin <= 1e-9, axis=1)
        if allowed.any():
            self.best_p = max(self.best_p, float(P[allowed].max()))
        ok = (P >= self.confidence) & allowed
        if ok.any():
            merged = [np.concatenate([a, b[ok]]) for a, b in zip(self.archive, (x, F, P))]
            self.archive = _non_dominated(*merged)
        out["F"] = F
        out["G"] = np.hstack([(self.confidence - P)[:, None], G_lin])


class _GridRepair(Repair):
    """Moves every offspring onto the factor steps before it is evaluated (round, then the
    constraints judge the rounded setting), so the search only ever sees settable points."""

    def __init__(self, snap):
        super().__init__()
        self.snap = snap

    def _do(self, problem, X, **kwargs):
        return np.asarray(self.snap(np.clip(X, 0.0, 1.0)), dtype=float).reshape(X.shape)


def _evaluate_callables(objective_fn, prob_fn, X, n_obj):
    """Call both callables on ``X`` and check shapes and finiteness."""
    n = len(X)
    F = np.asarray(objective_fn(X), dtype=float).reshape(n, -1)
    if F.shape[1] != n_obj:
        raise ValueError(f"objective_fn returned {F.shape[1]} columns, expected n_obj={n_obj}")
    if not np.all(np.isfinite(F)):
        raise ValueError("objective_fn returned non-finite values")
    P = np.asarray(prob_fn(X), dtype=float).reshape(n)
    P = np.where(np.isfinite(P), np.clip(P, 0.0, 1.0), 0.0)
    return F, P


def _initial_population(d, pop_size, seed, x0=None):
    """Half a scrambled Sobol set, half uniform random points, plus any given starting settings.

    Sobol: scipy.stats.qmc.Sobol (Owen scrambling), first points of a base-2 set.
    """
    n_sobol = pop_size // 2
    sobol = qmc.Sobol(d, scramble=True, seed=seed).random_base2(int(np.ceil(np.log2(max(n_sobol, 2)))))
    parts = [] if x0 is None else [np.clip(np.atleast_2d(np.asarray(x0, dtype=float)), 0.0, 1.0)]
    parts.append(sobol[:n_sobol])
    n_left = pop_size - sum(len(p) for p in parts)
    parts.append(np.random.default_rng(seed).random((max(n_left, 0), d)))
    return np.vstack(parts)[:pop_size]


def _das_dennis_partitions(n_obj, pop_size):
    """Largest number of Das–Dennis partitions whose direction count ``C(p+m-1, m-1)`` fits the population."""
    p = 1
    while comb(p + 1 + n_obj - 1, n_obj - 1) <= pop_size:
        p += 1
    return p


def _algorithm(n_obj, pop_size, sampling, repair=None):
    """NSGA-II for two goals, NSGA-III for three or more, a real-coded GA for one."""
    if n_obj == 1:
        return GA(pop_size=pop_size, sampling=sampling, eliminate_duplicates=True, repair=repair)
    if n_obj == 2:
        return NSGA2(pop_size=pop_size, sampling=sampling, eliminate_duplicates=True, repair=repair)
    ref_dirs = get_reference_directions("das-dennis", n_obj, n_partitions=_das_dennis_partitions(n_obj, pop_size))
    return NSGA3(ref_dirs=ref_dirs, pop_size=max(pop_size, len(ref_dirs)), sampling=sampling,
                 eliminate_duplicates=True, repair=repair)


def _non_dominated(X, F, P):
    """Drop repeated objective vectors and dominated points (pymoo non-dominated sorting)."""
    _, first = np.unique(np.round(F, 12), axis=0, return_index=True)
    X, F, P = X[first], F[first], P[first]
    if F.shape[1] == 1:
        front = np.array([int(np.argmin(F[:, 0]))])
    else:
        front = NonDominatedSorting().do(F, only_non_dominated_front=True)
    return X[front], F[front], P[front]


def _spread_subset(F, k) -> np.ndarray:
    """Indices of ``k`` well-spread points of a front: greedy farthest-point selection.

    Starts from the individual minima of each goal and repeatedly adds the point farthest (Euclidean,
    goals scaled by the front's ideal and nadir) from those already chosen (Gonzalez, "Clustering to
    minimize the maximum intercluster distance", Theor. Comput. Sci. 38, 1985).
    """
    if len(F) <= k:
        return np.arange(len(F))
    Fn = _unit_scaled(F)
    chosen = list(dict.fromkeys(int(i) for i in np.argmin(Fn, axis=0)))[:k]
    gap = np.min(np.linalg.norm(Fn[:, None, :] - Fn[None, chosen, :], axis=2), axis=1)
    while len(chosen) < k:
        i = int(np.argmax(gap))
        chosen.append(i)
        gap = np.minimum(gap, np.linalg.norm(Fn - Fn[i], axis=1))
    return np.asarray(chosen)


def find_tradeoff(objective_fn, prob_fn, d, confidence, n_obj, seed=0, pop_size=None, n_gen=None,
                  pick="knee", desirability=None, x0=None, max_points=None,
                  constraints=None, snap=None) -> TradeoffResult:
    """Constrained Pareto set of the goals where all limits hold with probability ``>= confidence``.

    Parameters
    ----------
    objective_fn : callable
        ``(n, d)`` coded settings -> ``(n, n_obj)`` values to minimise.
    prob_fn : callable
        ``(n, d)`` coded settings -> ``(n,)`` joint probability of meeting all limits.
    d : int
        Number of factors.
    confidence : float
        Required joint probability, in (0, 1).
    n_obj : int
        Number of goals: 1 -> GA (front of one point), 2 -> NSGA-II, >= 3 -> NSGA-III.
    seed : int
        Seeds the initial design and pymoo.
    pop_size, n_gen : int, optional
        Population size and generations (defaults 100 and 150).
    pick : {"knee", "desirability"}
        How the balanced point is picked; see :func:`knee_point` and :func:`desirability`.
    desirability : list of dict or callable, optional
        For ``pick="desirability"``: one goal dict per column of ``F`` in the goal's natural units
        (see :func:`desirability`; the value is recovered from ``F`` as ``-F`` for maximize, ``F``
        for minimize, ``T -/+ F`` for a target, scoring the worse side), or a callable
        ``X -> (n,)`` overall desirability.
    x0 : array (k, d), optional
        Extra starting settings (e.g. the runs) placed in the initial population.
    max_points : int, optional
        Most points returned on the front (default ``pop_size``).
    constraints : tuple (A, b), optional
        Linear constraints between factors in coded units, ``A x <= b``; each row is one more pymoo
        inequality ``a . x - b <= 0`` beside the chance constraint, and no front point breaks one.
    snap : callable, optional
        ``(n, d) -> (n, d)`` coded settings moved onto the factor steps; applied to the initial
        population and, as a pymoo repair, to every offspring before it is evaluated.

    Notes
    -----
    Every evaluated setting with ``P >= confidence`` enters an archive that keeps only non-dominated,
    non-repeated points. At the end the archive is thinned to ``max_points`` well-spread points
    (:func:`_spread_subset`) and sorted by the first goal.

    Returns
    -------
    TradeoffResult
    """
    if not 0.0 < float(confidence) < 1.0:
        raise InputError(f"confidence = {confidence}: must lie strictly between 0 and 1; e.g. 0.95")
    if int(n_obj) < 1 or int(d) < 1:
        raise InputError(f"trade-off needs at least one factor and one goal (got d={d}, goals={n_obj})")
    if pick not in ("knee", "desirability"):
        raise InputError(f"pick = {pick!r}: use 'knee' or 'desirability'")
    if pick == "desirability" and desirability is None:
        raise InputError("pick = 'desirability' needs the desirability goals (low/high/target per goal)")
    d, n_obj, confidence = int(d), int(n_obj), float(confidence)
    pop_size = int(pop_size or DEFAULT_POP_SIZE)
    n_gen = int(n_gen or DEFAULT_N_GEN)

    problem = _ChanceConstrainedProblem(objective_fn, prob_fn, d, n_obj, confidence, constraints)
    sampling = _initial_population(d, pop_size, seed, x0)
    if snap is not None:
        sampling = np.asarray(snap(sampling), dtype=float).reshape(sampling.shape)
    algorithm = _algorithm(n_obj, pop_size, sampling, _GridRepair(snap) if snap is not None else None)
    minimize(problem, algorithm, ("n_gen", n_gen), seed=seed, verbose=False)
    X, F, P = problem.archive
    keep = _spread_subset(F, int(max_points or pop_size))
    order = keep[np.lexsort(F[keep].T[::-1])]
    X, F, P = X[order], F[order], P[order]
    best_p = problem.best_p

    if len(X) == 0:
        return TradeoffResult(
            X=np.empty((0, d)), F=np.empty((0, n_obj)), p_joint=np.empty(0), pick=-1, pick_method=pick,
            found=False, confidence=confidence, best_probability=best_p,
            message=(f"no setting meets all limits with probability >= {confidence:.2f}; the best "
                     f"reached is {best_p:.3f}: relax a limit, lower the confidence or add runs"))

    chosen = knee_point(F) if pick == "knee" else _desirability_pick(X, F, desirability)
    return TradeoffResult(
        X=X, F=F, p_joint=P, pick=chosen, pick_method=pick, found=True, confidence=confidence,
        best_probability=best_p,
        message=(f"{len(X)} setting(s) on the trade-off front meet all limits with probability "
                 f">= {confidence:.2f}; balanced pick #{chosen} by {pick}"))


def knee_point(F) -> int:
    """Index of the knee of a front: the point farthest beyond the hyperplane through its extremes.

    Each goal is scaled to ``[0, 1]`` by the front's own ideal (column minimum) and nadir (column
    maximum). The knee is the point with the largest signed distance from the hyperplane
    ``sum_j f_j = 1`` towards the ideal point, i.e. ``argmax (1 - sum_j f_j)``.

    For two goals the extreme points of a non-dominated front scale to ``(0, 1)`` and ``(1, 0)``, so
    this hyperplane is the line through the two extreme points and the rule is the maximum-distance
    knee of Das ("On characterizing the 'knee' of the Pareto curve based on normal-boundary
    intersection", Struct. Optim. 18, 1999) as used by Deb & Gupta ("Understanding knee points in
    bicriteria problems and their implications as preferred solution principles", Eng. Optim.
    43(11), 2011). For three or more goals the individual minima can tie or be degenerate, so the
    hyperplane through the unit points of the normalised space is used instead; it passes through the
    individual minima whenever their normalised goals sum to one, as they always do for two goals.
    Ties go to the first index; a single point returns 0.

    Parameters
    ----------
    F : array (k, m)
        Objective values in minimisation form.
    """
    F = np.asarray(F, dtype=float)
    if F.ndim == 1:
        F = F[:, None]
    if len(F) == 0:
        raise ValueError("knee_point: empty front")
    return int(np.argmax(1.0 - _unit_scaled(F).sum(axis=1)))


def _unit_scaled(F):
    """Each goal mapped to ``[0, 1]`` by the front's own ideal (min) and nadir (max); flat goals to 0."""
    lo, hi = F.min(axis=0), F.max(axis=0)
    return (F - lo) / np.where(hi > lo, hi - lo, 1.0)
