"""Benchmark problems with known truth, and the truth-side measures the benchmark judges windows by.

A :class:`Problem` is a study (a :class:`~windowfinder.inputs.spec.StudySpec`: factors, responses, limits,
goals, tolerances) plus its noise-free truth and a way to make one run. Two kinds:

* the bundled demo simulators (:mod:`windowfinder.cases`): runs carry the simulator's own run-to-run
  noise and failures, the truth is the simulator without noise;
* analytic constrained test problems, where a run returns the noise-free truth:

  - BNH: Binh & Korn (1997), "MOBES: a multiobjective evolution strategy for constrained optimization
    problems", Proc. 3rd Int. Conf. on Genetic Algorithms (Mendel 97), as stated in Deb (2001),
    *Multi-Objective Optimization using Evolutionary Algorithms*, Wiley, table 14;
  - SRN: Srinivas & Deb (1994), "Multiobjective optimization using nondominated sorting in genetic
    algorithms", Evolutionary Computation 2(3), 221-248;
  - C2-DTLZ2 (3 variables, 2 goals, r = 0.2): Deb, Thiele, Laumanns & Zitzler (2005), "Scalable test
    problems for evolutionary multiobjective optimization" (DTLZ2), with the constraint of Jain & Deb
    (2014), IEEE Trans. Evol. Comput. 18(4), 602-622, section VI;
  - the toy problem of Gramacy, Gray, Le Digabel, Lee, Ranjan, Wells & Wild (2016), "Modeling an
    augmented Lagrangian for blackbox constrained optimization", Technometrics 58(1), 1-11.

A constraint ``g <= 0`` of a test problem is a response with the limit ``max = 0``.

Truth-side measures (all by brute force on the noise-free truth, nothing from windowfinder's models):
:func:`largest_box_volume` (the largest axis-aligned box of grid points that are all feasible, exact on
the grid), :func:`eroded` (settings whose tolerance box stays feasible), :func:`box_precision` (share of
a box truly feasible) and :func:`reference` (largest true window, true trade-off front, hypervolume
reference point).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import ndimage
from scipy.stats import norm, qmc

from windowfinder.cases import RunFailed, case_dir, load_simulator
from windowfinder.answers.hypervolume import hypervolume
from windowfinder.inputs.spec import StudySpec

from .processes import PROCESSES as _PROCESSES
from .processes import noisy_run

GRID = {2: 201, 3: 81, 4: 21}  # grid points per factor for the brute-force truth (coded spacing 1/(n-1))
CONFIDENCE = 0.95  # the confidence every window and front of the benchmark is stated at


@dataclass
class Problem:
    """A study with known truth.

    Attributes
    ----------
    name, title : str
    spec : StudySpec
        Factors (bounds, tolerances), responses (limits, goals, transforms).
    truth_fn : callable
        ``truth_fn(X)`` natural settings (n, d) -> ``{response: (n,), "works": bool (n,)}``, noise-free.
    run_fn : callable or None
        ``run_fn(settings: dict, seed: int) -> {response: float}`` one noisy run (raises
        :class:`~windowfinder.cases.RunFailed`); None: a run returns the noise-free truth.
    published_front : callable or None
        Returns the published true front in minimisation form (pymoo's ``pareto_front()``), when any.
    noise : dict or None
        The simulator's run-to-run noise per response (:class:`windowfinder.cases.scenario.Noise`).
    """

    name: str
    title: str
    spec: StudySpec
    truth_fn: Callable
    run_fn: Callable | None = None
    published_front: Callable | None = None
    noise: dict | None = None

    @property
    def d(self) -> int:
        return self.spec.d

    @property
    def noisy(self) -> bool:
        return self.run_fn is not None

    @property
    def limits(self) -> list[tuple]:
        return [(r.name, r.min, r.max) for r in self.spec.limited]

    @property
    def goals(self) -> list[tuple]:
        return [(r.name, r.goal, r.target) for r in self.spec.goals]

    @property
    def transforms(self) -> dict:
        return {r.name: (r.transform, r.bounds) for r in self.spec.responses}

    def truth(self, U) -> dict:
        """Noise-free responses and ``works`` at coded settings ``U`` (n, d)."""
        return self.truth_fn(self.spec.to_natural(U))

    def feasible(self, U) -> np.ndarray:
        """True where the process works and every limit holds (noise-free), coded settings."""
        t = self.truth(U)
        ok = np.asarray(t["works"], bool).copy()
        with np.errstate(invalid="ignore"):
            for name, lo, hi in self.limits:
                if lo is not None:
                    ok &= t[name] >= lo
                if hi is not None:
                    ok &= t[name] <= hi
        return ok

    def run_probability(self, U) -> np.ndarray:
        """True probability that a new run at coded settings ``U`` meets every limit.

        What a perfect model would report: the noise-free truth with the simulator's own noise
        (additive: ``y + sd e``; relative: ``y exp(sd e)``, ``e`` standard normal, independent per
        response). Without noise it is the indicator of :meth:`feasible`. The failure of a run is taken
        at its nominal (noise-free) setting: run-to-run scatter of the failure threshold is left out.
        """
        if self.noise is None:
            return self.feasible(U).astype(float)
        each, works = self.limit_probabilities(U)
        return works * np.prod(np.nan_to_num(each, nan=0.0), axis=1)

    def limit_probabilities(self, U) -> tuple[np.ndarray, np.ndarray]:
        """True probability that a new run meets each limit alone, (n, r) (NaN where the process fails),
        and ``works`` as floats (n,); the factors of :meth:`run_probability` (noisy problems only)."""
        t = self.truth(U)
        works = np.asarray(t["works"], float)
        cols = []
        with np.errstate(divide="ignore", invalid="ignore"):
            for name, lo, hi in self.limits:
                n, y = self.noise[name], np.where(t["works"], t[name], np.nan)
                if n.kind == "relative":  # log-normal reading: compare on the log scale
                    y = np.log(y)
                    lo, hi = (None if v is None else np.log(v) for v in (lo, hi))
                below = norm.cdf((hi - y) / n.sd) if hi is not None else 1.0
                above = norm.cdf((lo - y) / n.sd) if lo is not None else 0.0
                cols.append(np.broadcast_to(below - above, works.shape))
        return np.column_stack(cols), works

    def objectives(self, values: dict) -> np.ndarray:
        """Goals in minimisation form (maximize -> -y, minimize -> y, target -> |y - t|), (n, m)."""
        cols = []
        for name, sense, target in self.goals:
            y = np.asarray(values[name], float)
            cols.append(-y if sense == "maximize" else y if sense == "minimize" else np.abs(y - target))
        return np.column_stack(cols)

    def run(self, U, seeds) -> tuple[dict, np.ndarray]:
        """Runs at coded settings ``U``: ``({response: (n,)}, works (n,))``; failed runs give NaN."""
        U = np.atleast_2d(U)
        if not self.noisy:
            t = self.truth(U)
            works = np.asarray(t["works"], bool)
            return {r: np.where(works, t[r], np.nan) for r in self.spec.response_names}, works
        X = self.spec.to_natural(U)
        Y = {r: np.full(len(U), np.nan) for r in self.spec.response_names}
        works = np.ones(len(U), bool)
        for i, (x, s) in enumerate(zip(X, seeds)):
            try:
                out = self.run_fn(dict(zip(self.spec.factor_names, x)), seed=int(s))
            except RunFailed:
                works[i] = False
                continue
            for r in Y:
                Y[r][i] = out[r]
        return Y, works


# -- the problems -----------------------------------------------------------------------------------

def _spec(name, factors, responses) -> StudySpec:
    return StudySpec.from_dict({"study": {"name": name, "confidence": 0.95, "seed": 0},
                                "factor": factors, "response": responses}, source=f"benchmark {name}")


def _factor(name, low, high):
    return {"name": name, "low": float(low), "high": float(high)}


def _limit(name):
    return {"name": name, "goal": "none", "max": 0.0}


def _goal(name, sense="minimize"):
    return {"name": name, "goal": sense}


def bnh_truth(X) -> dict:
    """BNH in its original form (Deb 2001, table 14): constraints ``g <= 0``."""
    x1, x2 = X[:, 0], X[:, 1]
    return {"f1": 4 * x1**2 + 4 * x2**2, "f2": (x1 - 5) ** 2 + (x2 - 5) ** 2,
            "g1": (x1 - 5) ** 2 + x2**2 - 25.0, "g2": 7.7 - (x1 - 8) ** 2 - (x2 + 3) ** 2,
            "works": np.ones(len(X), bool)}


def srn_truth(X) -> dict:
    """SRN (Srinivas & Deb 1994): constraints ``g <= 0``."""
    x1, x2 = X[:, 0], X[:, 1]
    return {"f1": 2 + (x1 - 2) ** 2 + (x2 - 1) ** 2, "f2": 9 * x1 - (x2 - 1) ** 2,
            "g1": x1**2 + x2**2 - 225.0, "g2": x1 - 3 * x2 + 10.0, "works": np.ones(len(X), bool)}


C2DTLZ2_RADIUS = 0.2  # Jain & Deb (2014): r = 0.4 for three goals, 0.5 above; pymoo uses 0.2 for two


def c2dtlz2_truth(X, r=C2DTLZ2_RADIUS) -> dict:
    """C2-DTLZ2 with two goals: DTLZ2 (Deb et al. 2005) and the Jain & Deb (2014) constraint."""
    g = np.sum((X[:, 1:] - 0.5) ** 2, axis=1)
    f = np.column_stack([(1 + g) * np.cos(X[:, 0] * np.pi / 2), (1 + g) * np.sin(X[:, 0] * np.pi / 2)])
    total = np.sum(f**2, axis=1)
    near_axis = np.min([(f[:, i] - 1) ** 2 + total - f[:, i] ** 2 for i in range(2)], axis=0) - r**2
    centre = np.sum((f - 1 / np.sqrt(2)) ** 2, axis=1) - r**2
    return {"f1": f[:, 0], "f2": f[:, 1], "c": np.minimum(near_axis, centre),
            "works": np.ones(len(X), bool)}


def gramacy_truth(X) -> dict:
    """Gramacy et al. (2016), section 3: minimise ``x1 + x2`` s.t. ``c1 <= 0``, ``c2 <= 0`` on [0, 1]^2."""
    x1, x2 = X[:, 0], X[:, 1]
    return {"f": x1 + x2, "c1": 1.5 - x1 - 2 * x2 - 0.5 * np.sin(2 * np.pi * (x1**2 - 2 * x2)),
            "c2": x1**2 + x2**2 - 1.5, "works": np.ones(len(X), bool)}


def _pymoo_front(name, **kw):
    def front():
        from pymoo.problems import get_problem
        return np.asarray(get_problem(name, **kw).pareto_front(), float)
    return front


def simulator_problem(case: str) -> Problem:
    sim = load_simulator(case)
    spec = StudySpec.from_toml(case_dir(case) / "study.toml")
    return Problem(case, f"bundled {case} simulator (noisy runs)", spec, sim.truth, sim.evaluate,
                   noise=sim.NOISE)


def analytic_problem(name: str) -> Problem:
    if name == "bnh":
        spec = _spec(name, [_factor("x1", 0, 5), _factor("x2", 0, 3)],
                     [_goal("f1"), _goal("f2"), _limit("g1"), _limit("g2")])
        return Problem(name, "BNH (Binh & Korn 1997)", spec, bnh_truth, published_front=_pymoo_front("bnh"))
    if name == "srn":
        spec = _spec(name, [_factor("x1", -20, 20), _factor("x2", -20, 20)],
                     [_goal("f1"), _goal("f2"), _limit("g1"), _limit("g2")])
        return Problem(name, "SRN (Srinivas & Deb 1994)", spec, srn_truth,
                       published_front=_pymoo_front("srn"))
    if name == "c2dtlz2":
        spec = _spec(name, [_factor(f"x{i + 1}", 0, 1) for i in range(3)],
                     [_goal("f1"), _goal("f2"), _limit("c")])
        return Problem(name, "C2-DTLZ2, 3 variables, 2 goals (Jain & Deb 2014)", spec, c2dtlz2_truth,
                       published_front=_pymoo_front("c2dtlz2", n_var=3, n_obj=2))
    if name == "gramacy":
        spec = _spec(name, [_factor("x1", 0, 1), _factor("x2", 0, 1)],
                     [_goal("f"), _limit("c1"), _limit("c2")])
        return Problem(name, "toy problem of Gramacy et al. (2016)", spec, gramacy_truth)
    raise KeyError(name)


SIMULATORS = ("reactor", "spotweld", "tempering")
ANALYTIC = ("bnh", "srn", "c2dtlz2", "gramacy")
PROCESSES = tuple(_PROCESSES)   # four-factor simulators of the calibration benchmark


def process_problem(name: str) -> Problem:
    title, spec_fn, truth_fn, noise = _PROCESSES[name]
    spec = spec_fn()
    return Problem(name, title, spec, truth_fn, noisy_run(truth_fn, noise, spec.factor_names), noise=noise)


def get_problem(name: str) -> Problem:
    if name in PROCESSES:
        return process_problem(name)
    return simulator_problem(name) if name in SIMULATORS else analytic_problem(name)


# -- truth-side measures ----------------------------------------------------------------------------

def grid(d: int, n: int) -> np.ndarray:
    """All points of the regular grid with ``n`` levels per factor on [0, 1]^d, C order, (n^d, d)."""
    g = np.linspace(0.0, 1.0, n)
    return np.stack(np.meshgrid(*[g] * d, indexing="ij"), axis=-1).reshape(-1, d)


def _column_heights(mask):
    """``H[i, j]``: number of consecutive True cells in column ``j`` ending at row ``i``."""
    H = np.zeros(mask.shape, dtype=np.int32)
    run = np.zeros(mask.shape[1], dtype=np.int32)
    for i in range(mask.shape[0]):
        run = np.where(mask[i], run + 1, 0)
        H[i] = run
    return H


def _largest_rectangle(mask, h0, h1) -> float:
    """Largest ``(a - 1) h0 * (b - 1) h1`` over rectangles of ``a x b`` grid points all True.

    For each bottom row and each run of columns, the tallest all-True rectangle has the height of the
    lowest column over the run (the histogram formulation of the maximal-rectangle problem); every
    all-True rectangle lies inside one of these, so the maximum over them is exact.
    """
    H = _column_heights(mask)
    best, low = 0.0, H
    for w in range(1, mask.shape[1] + 1):
        if w > 1:
            low = np.minimum(low[:, :-1], H[:, w - 1:])
        top = int(low.max()) if low.size else 0
        if top <= 0:
            break
        best = max(best, (top - 1) * (w - 1) * h0 * h1)
    return best


def largest_box_volume(mask) -> float:
    """Volume (coded units) of the largest axis-aligned box whose grid points are all True.

    ``mask`` is a boolean array of shape ``(n,) * d`` (d >= 2) on the grid of :func:`grid`; a box
    spans grid points ``i..j`` per factor, i.e. ``(j - i) / (n - 1)`` coded units. Exact on the grid
    (exhaustive over the slab ranges of the last factor, down to two factors, where the histogram
    method takes over).
    """
    mask = np.asarray(mask, bool)
    h = [1.0 / (n - 1) for n in mask.shape]
    if mask.ndim == 2:
        return _largest_rectangle(mask, h[0], h[1])
    if mask.ndim > 3:  # exhaustive over the last factor's slab ranges, the same problem one factor down
        best = 0.0
        n_last = mask.shape[-1]
        for k1 in range(n_last):
            slab = mask[..., k1].copy()
            for k2 in range(k1 + 1, n_last):
                slab &= mask[..., k2]
                if not slab.any():
                    break
                depth = (k2 - k1) * h[-1]
                if depth <= best:   # the slab's box has volume at most 1 x depth
                    continue
                best = max(best, largest_box_volume(slab) * depth)
        return best
    if mask.ndim != 3:
        raise ValueError("largest_box_volume handles 2 factors or more")
    n0, n1, n2 = mask.shape
    best = 0.0
    for k1 in range(n2):
        slab = mask[:, :, k1].copy()
        for k2 in range(k1 + 1, n2):
            slab &= mask[:, :, k2]
            if not slab.any():
                break
            depth = (k2 - k1) * h[2]
            if (n0 - 1) * h[0] * (n1 - 1) * h[1] * depth <= best:
                continue
            best = max(best, _largest_rectangle(slab, h[0], h[1]) * depth)
    return best


def eroded(mask, tolerance) -> np.ndarray:
    """Grid points whose tolerance box (clipped to the cube) holds only True points.

    A window's guard box (stated ranges widened by the coded tolerance ``t``, clipped to [0, 1]) is
    all feasible exactly when the stated box lies in this eroded set. ``t`` is rounded to the nearest
    grid step.
    """
    mask = np.asarray(mask, bool)
    t = np.zeros(mask.ndim) if tolerance is None else np.asarray(tolerance, float)
    k = [int(round(tj * (n - 1))) for tj, n in zip(t, mask.shape)]
    if not any(k):
        return mask.copy()
    structure = np.ones([2 * kj + 1 for kj in k], bool)
    return ndimage.binary_erosion(mask, structure=structure, border_value=1)


def box_precision(feasible_fn, lower, upper, n=1024, seed=0) -> float:
    """Share of a box (coded ``lower..upper``) that is truly feasible: a scrambled Sobol set inside it."""
    lower, upper = np.asarray(lower, float), np.asarray(upper, float)
    U = lower + qmc.Sobol(len(lower), scramble=True, seed=seed).random(n) * (upper - lower)
    return float(np.mean(feasible_fn(U)))


def non_dominated(F) -> np.ndarray:
    """Distinct rows of ``F`` (minimised) that no other row dominates.

    One goal: the minimum. Two goals: sort by the first goal (ties by the second) and keep each point
    whose second goal is below that of every point before it (O(n log n)). More: pymoo's non-dominated
    sorting.
    """
    F = np.unique(np.asarray(F, float), axis=0)
    if F.shape[1] == 1:
        return F[[int(np.argmin(F[:, 0]))]]
    if F.shape[1] == 2:
        F = F[np.lexsort((F[:, 1], F[:, 0]))]
        best = np.minimum.accumulate(F[:, 1])
        return F[np.r_[True, F[1:, 1] < best[:-1]]]
    from pymoo.util.nds.non_dominated_sorting import NonDominatedSorting

    return F[NonDominatedSorting().do(F, only_non_dominated_front=True)]


def thin_front(F, k: int = 500) -> np.ndarray:
    """At most ``k`` points of a two-goal front, evenly spaced along its length (goals scaled to [0, 1]
    by the front's own range), so that IGD weighs every part of the front alike."""
    F = np.asarray(F, float)
    if len(F) <= k or F.shape[1] != 2:
        return F
    F = F[np.argsort(F[:, 0])]
    span = np.ptp(F, axis=0)
    step = np.linalg.norm(np.diff(F / np.where(span > 0, span, 1.0), axis=0), axis=1)
    s = np.concatenate([[0.0], np.cumsum(step)])
    idx = np.unique(np.searchsorted(s, np.linspace(0.0, s[-1], k)).clip(0, len(F) - 1))
    return F[idx]


@dataclass
class Reference:
    """Truth of one problem: the largest true window and the true front.

    Attributes
    ----------
    box_volume : float
        Largest truly feasible box (coded volume) whose guard box is feasible too.
    run_volume : float
        Largest box whose guard box holds only settings where a new run truly meets every limit with
        probability >= 0.95 (:meth:`Problem.run_probability`): the 95 % window a perfect model would
        state. Equal to ``box_volume`` for noise-free problems.
    feasible_share : float
        Share of the grid that is feasible.
    front : ndarray (k, m)
        True trade-off front, minimisation form (published when available, else brute force).
    ref_point : ndarray (m,)
        Hypervolume reference point: true-front nadir + 10 % of its range for two goals or more
        (common practice, no source); for one goal the worst feasible value on the grid.
    hv : float
        Hypervolume of the true front against ``ref_point``.
    """

    box_volume: float
    run_volume: float
    feasible_share: float
    front: np.ndarray
    ref_point: np.ndarray
    hv: float


@functools.lru_cache(maxsize=None)
def reference(name: str, n_grid: int | None = None) -> Reference:
    """Brute-force truth of a problem on a regular grid (``GRID[d]`` points per factor by default)."""
    p = get_problem(name)
    n = n_grid or GRID[p.d]
    U = grid(p.d, n)
    t = p.truth(U)
    ok = p.feasible(U)
    mask = ok.reshape((n,) * p.d)
    volume = largest_box_volume(eroded(mask, p.spec.tolerances_coded))
    run_mask = (p.run_probability(U) >= CONFIDENCE).reshape((n,) * p.d)
    run_volume = largest_box_volume(eroded(run_mask, p.spec.tolerances_coded)) if p.noisy else volume
    F_grid = p.objectives({k: v[ok] for k, v in t.items() if k != "works"})
    if p.published_front is not None:
        front = p.published_front()
    else:
        front = thin_front(non_dominated(np.vstack([F_grid, _nsga_front(p, seed=0)])))
    if front.shape[1] == 1:
        ref = F_grid.max(axis=0)
    else:
        lo, hi = front.min(axis=0), front.max(axis=0)
        ref = hi + 0.1 * (hi - lo)
    return Reference(volume, run_volume, float(ok.mean()), front, ref, hypervolume(front, ref))


def truth_problem(p: Problem, record: list | None = None):
    """The problem as a pymoo problem on coded settings: goals to minimise, ``G <= 0`` feasible.

    ``G`` holds each limit's violation (``lo - y``, ``y - hi``) and ``1`` where the process fails.
    When ``record`` is a list, every evaluated batch ``(F, feasible)`` is appended to it.
    """
    from pymoo.core.problem import Problem as PymooProblem

    n_con = sum((lo is not None) + (hi is not None) for _, lo, hi in p.limits) + 1

    class _Truth(PymooProblem):
        def __init__(self):
            super().__init__(n_var=p.d, n_obj=len(p.goals), n_ieq_constr=n_con, xl=0.0, xu=1.0)

        def _evaluate(self, x, out, *args, **kwargs):
            t = p.truth(x)
            works = np.asarray(t["works"], bool)
            G = [np.where(works, 0.0, 1.0)]
            for name, lo, hi in p.limits:
                y = np.where(works, t[name], 0.0)
                G += ([lo - y] if lo is not None else []) + ([y - hi] if hi is not None else [])
            F = np.where(works[:, None], np.nan_to_num(p.objectives(t), nan=0.0), 0.0)
            out["F"], out["G"] = F, np.column_stack(G)
            if record is not None:
                record.append((F, np.all(out["G"] <= 0, axis=1)))

    return _Truth()


def _nsga_front(p: Problem, seed: int, pop_size: int = 200, n_gen: int = 200) -> np.ndarray:
    """Feasible non-dominated set of a long NSGA-II run on the truth (to sharpen a brute-force front)."""
    from pymoo.algorithms.moo.nsga2 import NSGA2
    from pymoo.algorithms.soo.nonconvex.ga import GA
    from pymoo.optimize import minimize

    record: list = []
    algo = NSGA2(pop_size=pop_size) if len(p.goals) > 1 else GA(pop_size=pop_size)
    minimize(truth_problem(p, record), algo, ("n_gen", n_gen), seed=seed, verbose=False)
    F = np.vstack([f[ok] for f, ok in record])
    return non_dominated(F) if len(F) else np.empty((0, len(p.goals)))
