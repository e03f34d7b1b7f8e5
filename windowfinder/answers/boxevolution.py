"""Window shape by evolution: a genetic algorithm over the box bounds (the pymoo alternative to face
expansion in :mod:`windowfinder.answers.window`, selected with ``method="pymoo"``).

Variables are two coded values per factor whose smaller and larger give that factor's range (or, with a
set point ``s``, one half-width ``h`` per factor, range ``s +- h``). The objective is ``-sum log(width)``
(minus the log-volume); the one constraint is ``confidence - min P`` over a fixed pattern of the guard box
(its corners, face centres, centre and a scrambled Sobol set [1]_), i.e. the minimum probability over the
sampled box must reach the confidence. pymoo's GA (Blank & Deb 2020, "pymoo: Multi-objective
Optimization in Python", IEEE Access 8) handles the constraint by feasibility-first ranking (Deb 2000,
"An efficient constraint handling method for genetic algorithms", CMAME 186). The best box is then
settled by the adversarial :class:`~windowfinder.answers.verifier.BoxVerifier`, so a box that only the
sample believed is cut back before it is reported.

.. [1] Owen, A. B. (1998). Scrambling Sobol' and Niederreiter-Xing points. J. Complexity 14(4).
"""

from __future__ import annotations

import numpy as np
from pymoo.algorithms.soo.nonconvex.ga import GA
from pymoo.core.problem import Problem
from pymoo.optimize import minimize
from scipy.stats import qmc

POP_SIZE, N_GEN, N_SAMPLE = 40, 60, 32


class _BoxProblem(Problem):
    """Vectorised: one row of ``x`` per box; ``prob_fn`` is called once per generation."""

    def __init__(self, check, set_point, pattern):
        d = check.d
        self.check, self.s, self.pattern = check, set_point, pattern
        if set_point is None:
            super().__init__(n_var=2 * d, n_obj=1, n_ieq_constr=1, xl=0.0, xu=1.0)
        else:
            super().__init__(n_var=d, n_obj=1, n_ieq_constr=1, xl=0.0,
                             xu=np.maximum(np.minimum(set_point, 1.0 - set_point), 1e-9))

    def boxes(self, x):
        d = self.check.d
        if self.s is None:
            return np.minimum(x[:, :d], x[:, d:]), np.maximum(x[:, :d], x[:, d:])
        return self.s - x, self.s + x

    def _evaluate(self, x, out, *args, **kwargs):
        lower, upper = self.boxes(np.atleast_2d(x))
        glo, ghi = self.check.guard(lower, upper)
        n, k = len(lower), len(self.pattern)
        pts = glo[:, None, :] + self.pattern[None, :, :] * (ghi - glo)[:, None, :]
        p = self.check.rec(pts.reshape(n * k, -1)).reshape(n, k).min(axis=1)
        out["F"] = -np.log(np.maximum(upper - lower, 1e-12)).sum(axis=1)
        out["G"] = self.check.c - p


def evolve_box(check, seed=0, set_point=None, pop_size=POP_SIZE, n_gen=N_GEN, n_sample=N_SAMPLE):
    """The largest box the GA finds whose sampled guard box meets ``check.c`` (None if none does)."""
    d = check.d
    corners = (np.arange(2 ** d)[:, None] >> np.arange(d)) & 1 if d <= 8 else \
        np.random.default_rng(seed).integers(0, 2, (256, d))
    faces = np.full((2 * d, d), 0.5)
    faces[np.arange(d), np.arange(d)] = 0.0
    faces[d + np.arange(d), np.arange(d)] = 1.0
    pattern = np.vstack([corners, faces, np.full((1, d), 0.5),
                         qmc.Sobol(d, scramble=True, seed=seed + 2).random(n_sample)])
    problem = _BoxProblem(check, set_point, pattern)
    res = minimize(problem, GA(pop_size=pop_size, eliminate_duplicates=True), ("n_gen", n_gen),
                   seed=seed, verbose=False)
    if res.X is None or res.G is None or np.max(res.G) > 0:
        return None
    lower, upper = problem.boxes(np.atleast_2d(res.X))
    return lower[0], upper[0]
