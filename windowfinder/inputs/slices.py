"""Designs in slices: runs spread over blocks (days, lots) or over the levels of a categorical factor.

A sliced Latin hypercube of ``t`` slices of ``m`` runs (Qian 2012, "Sliced Latin hypercube designs",
*JASA* 107, 393-399) is a Latin hypercube of ``n = m t`` runs whose every slice is itself a Latin
hypercube of ``m`` runs: each slice covers the whole factor space, and so does the union. Construction
(Qian 2012, §2): for each factor the ``n`` strata of width ``1/n`` form ``m`` groups of ``t`` neighbours;
each group hands one of its strata to every slice (a random permutation), and each slice places its ``m``
strata, one from each group, in random run order. A point lies uniformly inside its stratum.

Designs that are not Latin hypercubes are spread over blocks by :func:`spread_over_blocks`.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.distance import cdist, pdist

from windowfinder.errors import InputError


def sliced_latin_hypercube(d: int, slices: int, per_slice: int, seed: int = 0, candidates: int = 20):
    """Sliced Latin hypercube, coded units; best of ``candidates`` by the maximin distance.

    Returns
    -------
    X : ndarray (slices * per_slice, d)
    slice_of : ndarray (slices * per_slice,) of int
        Slice (block, level) of each run; rows are grouped by slice.
    """
    t, m = int(slices), int(per_slice)
    if t < 1 or m < 1:
        raise InputError(f"a sliced design needs at least 1 slice and 1 run per slice (got {t} x {m})")
    n = m * t
    slice_of = np.repeat(np.arange(t), m)
    best, best_dist = None, -np.inf
    for child in np.random.SeedSequence(seed).spawn(candidates):
        rng = np.random.default_rng(child)
        strata = np.empty((n, d), dtype=int)
        for j in range(d):
            # group g holds strata g*t .. g*t+t-1; slice s receives stratum g*t + perm_g[s] of every group
            take = np.array([g * t + rng.permutation(t) for g in range(m)])   # (m, t)
            for s in range(t):
                strata[s * m:(s + 1) * m, j] = rng.permutation(take[:, s])
        X = (strata + rng.random((n, d))) / n
        dist = pdist(X).min() if n > 1 else 0.0   # maximin choice: Johnson, Moore & Ylvisaker 1990
        if dist > best_dist:
            best, best_dist = X, dist
    return best, slice_of


def spread_over_blocks(U, blocks: int, seed: int = 0):
    """Block index of each run of design ``U`` (coded), sizes differing by at most one.

    Runs are taken in farthest-point order (each next run the farthest from those already taken, from a
    seeded start; Gonzalez 1985) and dealt to the blocks in turn, so every block gets runs from all over
    the space rather than one corner per day (common practice, no source). Replicated runs (such as
    centre points) fall into different blocks.
    """
    U = np.asarray(U, float)
    n, b = U.shape[0], int(blocks)
    if not 1 <= b <= n:
        raise InputError(f"cannot spread {n} runs over {b} blocks; use 1 to {n} blocks")
    rng = np.random.default_rng(seed)
    order = [int(rng.integers(n))]
    dist = cdist(U, U[order]).ravel()
    dist[order[0]] = -1.0
    while len(order) < n:
        nxt = int(np.argmax(dist))
        order.append(nxt)
        dist = np.minimum(dist, cdist(U, U[[nxt]]).ravel())
        dist[order] = -1.0
    out = np.empty(n, dtype=int)
    out[order] = np.arange(n) % b
    return out
