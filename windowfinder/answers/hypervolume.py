"""Measures of a front (all goals minimised): hypervolume, its improvement, distance to a reference front.

The hypervolume of a set ``P`` with reference point ``r`` is the Lebesgue measure of the region that
the points of ``P`` dominate and that dominates ``r`` (Zitzler & Thiele 1998, "Multiobjective
optimization using evolutionary algorithms - a comparative case study", PPSN V). The improvement a new
vector ``y`` brings is ``HV(P + {y}) - HV(P)``.

* one goal: ``max(0, min(min P, r) - y)``;
* two goals: exact and vectorised over many vectors at once by the staircase decomposition of the
  region not yet dominated (Emmerich, Deutz & Klinkenberg 2011, "Hypervolume-based expected
  improvement: monotonicity properties and exact computation", IEEE CEC, section III);
* three or more goals: pymoo's hypervolume (:class:`pymoo.indicators.hv.HV`) per vector.

How close a front comes to a known one is the inverted generational distance (:func:`igd`,
:func:`normalised_igd`, pymoo's :class:`pymoo.indicators.igd.IGD`).
"""

from __future__ import annotations

import numpy as np
from pymoo.indicators.hv import HV
from pymoo.indicators.igd import IGD

CHUNK = 8192  # rows of candidate vectors handled at once by the two-goal staircase


def _inside(front, ref):
    """Rows of ``front`` that strictly dominate the reference point (the others add no volume)."""
    front = np.asarray(front, dtype=float).reshape(-1, len(ref))
    return front[np.all(front < ref, axis=1)]


def hypervolume(front, ref) -> float:
    """Hypervolume of ``front`` (k, m) against ``ref`` (m,), by pymoo; 0 for an empty set."""
    ref = np.asarray(ref, dtype=float)
    front = _inside(front, ref)
    if len(front) == 0:
        return 0.0
    return float(HV(ref_point=ref)(front))


def _staircase(front, ref):
    """Slab edges ``b`` (k+2,) in goal 1 and the height ``h`` (k+1,) of the undominated region per slab.

    Over ``b[j] <= f1 < b[j+1]`` the front dominates everything above ``h[j]`` in goal 2, so the
    undominated part of the reference box is ``(-inf, h[j]]`` there. A running minimum makes dominated
    points of ``front`` harmless.
    """
    P = front[np.argsort(front[:, 0], kind="stable")]
    edges = np.concatenate([[-np.inf], P[:, 0], [ref[0]]])
    heights = np.minimum.accumulate(np.concatenate([[ref[1]], P[:, 1]]))
    return edges, heights


def improvement(Y, front, ref) -> np.ndarray:
    """Hypervolume improvement ``HV(front + {y}) - HV(front)`` of each row ``y`` of ``Y``.

    Parameters
    ----------
    Y : ndarray (n, m)
        Candidate objective vectors (minimised).
    front : ndarray (k, m)
        Current set; dominated rows and rows not better than ``ref`` are allowed and ignored.
    ref : ndarray (m,)
        Reference point.

    Returns
    -------
    ndarray (n,), non-negative.
    """
    ref = np.asarray(ref, dtype=float)
    m = len(ref)
    Y = np.asarray(Y, dtype=float).reshape(-1, m)
    front = _inside(front, ref)
    if m == 1:
        best = min(ref[0], front[:, 0].min()) if len(front) else ref[0]
        return np.clip(best - Y[:, 0], 0.0, None)
    if m == 2:
        edges, heights = _staircase(front, ref)
        out = np.empty(len(Y))
        for i in range(0, len(Y), CHUNK):
            y = Y[i:i + CHUNK]
            width = np.minimum(edges[1:], ref[0]) - np.maximum(edges[:-1], y[:, [0]])
            height = heights - y[:, [1]]
            out[i:i + CHUNK] = np.sum(np.clip(width, 0.0, None) * np.clip(height, 0.0, None), axis=1)
        return out
    base = hypervolume(front, ref)
    indicator = HV(ref_point=ref)
    out = np.zeros(len(Y))
    for i in np.flatnonzero(np.all(Y < ref, axis=1)):
        out[i] = max(float(indicator(np.vstack([front, Y[i:i + 1]]))) - base, 0.0)
    return out


def expected_improvement(samples, front, ref) -> np.ndarray:
    """Monte Carlo expected hypervolume improvement.

    ``samples`` (n, S, m): ``S`` draws of the objective vector at each of ``n`` candidates; the result
    (n,) is the sample mean of :func:`improvement` (Daulton, Balandat & Bakshy 2020, "Differentiable
    expected hypervolume improvement for parallel multi-objective Bayesian optimization", NeurIPS,
    eq. 2, with one candidate per batch).
    """
    samples = np.asarray(samples, dtype=float)
    n, S, m = samples.shape
    return improvement(samples.reshape(n * S, m), front, ref).reshape(n, S).mean(axis=1)


def igd(F, F_ref) -> float:
    """Inverted generational distance of ``F`` to the reference front ``F_ref`` (pymoo ``IGD``).

    Mean over the reference points of the Euclidean distance to the nearest point of ``F``
    (Coello Coello & Reyes Sierra, "A study of the parallelization of a coevolutionary
    multi-objective evolutionary algorithm", MICAI 2004).
    """
    return float(IGD(np.asarray(F_ref, dtype=float))(np.asarray(F, dtype=float)))


def normalised_igd(F, F_ref) -> float:
    """IGD after scaling every goal by the reference front's ideal and nadir.

    Both fronts are mapped by ``(f - ideal) / (nadir - ideal)`` with ``ideal`` and ``nadir`` the
    column minimum and maximum of ``F_ref`` (pymoo ``IGD(..., zero_to_one=True)``), so the value
    reads as a fraction of the reference front's extent in each goal, comparable across problems.
    """
    F_ref = np.asarray(F_ref, dtype=float)
    ideal, nadir = F_ref.min(axis=0), F_ref.max(axis=0)
    nadir = np.where(nadir > ideal, nadir, ideal + 1.0)
    return float(IGD(F_ref, zero_to_one=True, ideal=ideal, nadir=nadir)(np.asarray(F, dtype=float)))
