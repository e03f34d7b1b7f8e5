"""Initial designs in coded units.

Every function returns an array of shape ``(n, d)``; row = run, column = factor in study order, values in
``[0, 1]`` (0 = factor low, 1 = factor high). The one exception is the circumscribed central composite
design, whose axial runs lie *outside* ``[0, 1]``: that is extrapolation beyond the study bounds. The study
layer converts to natural units, rounds to each factor's step, randomises run order and writes runs.csv.

Classical designs are built in the usual ``-1 .. +1`` units and mapped by ``x_coded = (1 + x_pm1) / 2``.
"""

from __future__ import annotations

import inspect
import itertools
import math

import numpy as np
from scipy.spatial.distance import pdist
from scipy.stats import qmc

from windowfinder.errors import InputError, nearest

METHODS = ("space-filling", "sobol", "full-factorial", "ccd", "ccd-inscribed", "ccd-circumscribed",
           "box-behnken", "ofat")
CCD_KINDS = {"ccd": "face", "ccd-inscribed": "inscribed", "ccd-circumscribed": "circumscribed"}
MAX_RUNS = 100_000  # refuse designs larger than this rather than exhaust memory
BOX_BEHNKEN_MAX_FACTORS = 5
# scipy >= 1.15 names the seed argument ``rng``; older releases call it ``seed``.
_SEED_KW = "rng" if "rng" in inspect.signature(qmc.Sobol).parameters else "seed"


def _with_centre(X: np.ndarray, centre: int) -> np.ndarray:
    """Append ``centre`` replicated centre points (0.5, ..., 0.5) to ``X``."""
    return np.vstack([X, np.full((int(centre), X.shape[1]), 0.5)])


def _coded(X_pm1: np.ndarray) -> np.ndarray:
    """Map ``-1 .. +1`` units to coded ``0 .. 1`` units."""
    return (1.0 + np.asarray(X_pm1, dtype=float)) / 2.0


def _two_level(k: int) -> np.ndarray:
    """Full 2^k factorial in ``-1/+1`` units, standard (Yates) order: first factor changes fastest."""
    return np.array([row[::-1] for row in itertools.product((-1.0, 1.0), repeat=k)]).reshape(-1, k)


def is_latin(X: np.ndarray) -> bool:
    """True when every column has exactly one point in each stratum ``[i/n, (i+1)/n)``.

    The Latin hypercube property of McKay, Beckman & Conover (1979), Technometrics 21(2).
    """
    n = X.shape[0]
    strata = np.clip(np.floor(X * n).astype(int), 0, n - 1)
    return all(np.array_equal(np.sort(col), np.arange(n)) for col in strata.T)


def maximin_latin_hypercube(d: int, n: int, seed: int = 0, candidates: int = 20) -> np.ndarray:
    """Best of ``candidates`` plain Latin hypercubes by the maximin distance criterion.

    Each candidate is ``scipy.stats.qmc.LatinHypercube`` (strength 1, no optimisation) on its own
    seeded stream; the one with the largest smallest pairwise distance wins (Johnson, Moore &
    Ylvisaker 1990, "Minimax and maximin distance designs", J. Statist. Plann. Inference 26).
    """
    best, best_dist = None, -np.inf
    for child in np.random.SeedSequence(seed).spawn(candidates):
        X = qmc.LatinHypercube(d, strength=1, **{_SEED_KW: np.random.default_rng(child)}).random(n)
        dist = pdist(X).min() if n > 1 else 0.0
        if dist > best_dist:
            best, best_dist = X, dist
    return best


def space_filling(d: int, n: int, seed: int = 0) -> np.ndarray:
    """Latin hypercube (McKay, Beckman & Conover 1979) improved for space filling.

    Uses ``scipy.stats.qmc.LatinHypercube(optimization="random-cd")``, which lowers the centred
    discrepancy (Hickernell 1998) by swapping values *within* a column, so each factor keeps exactly one
    point per stratum. That property is checked; should it ever fail, the design falls back to
    :func:`maximin_latin_hypercube`.
    """
    X = qmc.LatinHypercube(d, optimization="random-cd", **{_SEED_KW: seed}).random(n)
    return X if is_latin(X) else maximin_latin_hypercube(d, n, seed)


def sobol(d: int, n: int, seed: int = 0) -> np.ndarray:
    """First ``n`` points of a scrambled Sobol' sequence (Sobol' 1967; Owen 1995 scrambling).

    Draws the next power of two with ``random_base2`` and keeps the first ``n``, so no balance warning
    is raised; only ``n = 2^m`` keeps the full net balance.
    """
    m = max(0, math.ceil(math.log2(n)))
    return qmc.Sobol(d, scramble=True, **{_SEED_KW: seed}).random_base2(m)[:n]


def full_factorial(d: int, levels: int = 3) -> np.ndarray:
    """All ``levels^d`` combinations of ``levels`` equally spaced settings on ``[0, 1]``.

    Standard order: the first factor changes fastest (Montgomery, Design and Analysis of Experiments,
    ch. 5-6).
    """
    grid = np.linspace(0.0, 1.0, levels)
    mesh = np.meshgrid(*([grid] * d), indexing="ij")
    return np.stack([m.ravel(order="F") for m in mesh], axis=1)


def rotatable_alpha(k: int) -> float:
    """Axial distance ``(2^k)^(1/4)`` that makes a full-factorial CCD rotatable (Box & Hunter 1957)."""
    return float(2.0**k) ** 0.25


def central_composite(d: int, kind: str = "face", centre: int = 0) -> np.ndarray:
    """Central composite design: ``2^k`` factorial + ``2k`` axial + ``centre`` centre runs.

    Box & Wilson (1951), J. R. Statist. Soc. B 13; Box & Hunter (1957), Ann. Math. Statist. 28;
    Montgomery, Design and Analysis of Experiments, ch. 11.

    kind : ``"face"`` (default; alpha = 1, all runs inside the bounds, which suits hard limits),
        ``"inscribed"`` (rotatable alpha, whole design shrunk so axial runs sit on the bounds and
        factorial runs at ``+-1/alpha``) or ``"circumscribed"`` (rotatable alpha, axial runs at
        ``+-alpha`` *beyond* the bounds: coded values outside ``[0, 1]``, i.e. extrapolation; use only
        where the bounds are not hard limits).
    For k = 2 and 4 the rotatable alpha equals sqrt(k): every non-centre run then lies on one sphere and a
    full quadratic model needs at least one centre run (with few, ill-conditioned for k = 3, 5).
    """
    if kind not in ("face", "inscribed", "circumscribed"):
        raise InputError(f"central composite kind '{kind}' is unknown; use face, inscribed or circumscribed")
    alpha = 1.0 if kind == "face" else rotatable_alpha(d)
    axial = alpha * np.repeat(np.eye(d), 2, axis=0) * np.tile([-1.0, 1.0], d)[:, None]  # -a, +a per factor
    X = np.vstack([_two_level(d), axial])
    if kind == "inscribed":
        X = X / alpha
    return _with_centre(_coded(X), centre)


def _check_box_behnken(d: int) -> None:
    # Box & Behnken (1960) publish other block structures for k >= 6; they are not built here.
    if not 3 <= d <= BOX_BEHNKEN_MAX_FACTORS:
        raise InputError(f"box-behnken needs 3 to {BOX_BEHNKEN_MAX_FACTORS} factors, the study has {d}; "
                         "use ccd or space-filling instead")


def box_behnken(d: int, centre: int = 0) -> np.ndarray:
    """Box-Behnken design for 3 to 5 factors (Box & Behnken 1960, Technometrics 2(4)).

    Every pair of factors runs a ``2^2`` factorial at ``+-1`` with the other factors at 0, giving
    12, 24, 40 runs (+ centre runs) for k = 3, 4, 5. All non-centre runs lie at the same distance from
    the centre, so at least one centre run is needed to fit a full quadratic model.
    """
    _check_box_behnken(d)
    rows = []
    for i, j in itertools.combinations(range(d), 2):
        for a, b in _two_level(2):
            row = np.zeros(d)
            row[[i, j]] = a, b
            rows.append(row)
    return _with_centre(_coded(np.array(rows)), centre)


def one_factor_at_a_time(d: int, levels: int = 3, centre: int = 0) -> np.ndarray:
    """One-factor-at-a-time baseline around the centre of the region.

    The centre run comes first (once); then each factor in turn takes its ``levels`` equally spaced
    settings (odd, so the centre is one of them) with all others at the centre: ``1 + d (levels - 1)``
    runs, plus ``centre`` extra centre replicates.
    """
    grid = np.linspace(0.0, 1.0, levels)
    rows = [np.full(d, 0.5)]
    for j in range(d):
        for v in grid[~np.isclose(grid, 0.5)]:
            row = np.full(d, 0.5)
            row[j] = v
            rows.append(row)
    return _with_centre(np.array(rows), centre)


def maximin_subset(C: np.ndarray, n: int) -> np.ndarray:
    """Indices of ``n`` rows of the candidate set ``C`` chosen greedily for the largest smallest distance.

    The CADEX algorithm of Kennard & Stone (1969), "Computer aided design of experiments",
    Technometrics 11(1): start from the candidate nearest the candidates' mean, then repeatedly add the
    candidate farthest from those chosen (Gonzalez 1985 farthest-point rule). Used for space-filling
    designs in a region cut by constraints, where no Latin hypercube exists. When ``n`` exceeds the
    number of distinct candidates, the choice cycles (replicates), since a step grid may hold fewer
    settings than runs asked for.
    """
    C = np.asarray(C, dtype=float)
    m = len(C)
    if m == 0 or n < 1:
        return np.empty(0, dtype=int)
    first = int(np.argmin(((C - C.mean(axis=0)) ** 2).sum(axis=1)))
    chosen = [first]
    gap = ((C - C[first]) ** 2).sum(axis=1)
    while len(chosen) < min(n, m):
        i = int(np.argmax(gap))
        if gap[i] <= 0.0:  # only repeats left
            break
        chosen.append(i)
        gap = np.minimum(gap, ((C - C[i]) ** 2).sum(axis=1))
    idx = np.asarray(chosen)
    return np.resize(idx, n)  # cycles through the distinct choice when n > len(idx)


def _method(method: str) -> str:
    key = str(method).strip().lower().replace("_", "-")
    if key not in METHODS:
        raise InputError(f"design method '{method}' is unknown; {nearest(key, METHODS, 'choose from')}")
    return key


def _base_size(method: str, d: int, runs: int | None, levels: int) -> int:
    """Run count of ``method`` before extra centre runs; validates the arguments."""
    if method in ("space-filling", "sobol"):
        return 10 * d if runs is None else runs
    if method == "full-factorial":
        if levels < 2:
            raise InputError(f"full-factorial needs levels >= 2, got {levels}")
        return levels**d
    if method in CCD_KINDS:
        if d < 2:
            raise InputError(f"{method} needs at least 2 factors, the study has {d}; use ofat or space-filling")
        return 2**d + 2 * d
    if method == "box-behnken":
        _check_box_behnken(d)
        return 4 * math.comb(d, 2)
    if levels < 3 or levels % 2 == 0:
        raise InputError(f"ofat needs an odd number of levels >= 3 (the centre is one of them), got {levels}")
    return 1 + d * (levels - 1)


def design_size(method: str, d: int, runs: int | None = None, centre: int = 0, levels: int = 3) -> int:
    """Number of rows :func:`make_design` returns for these arguments, without building the design."""
    method, d, centre, levels = _method(method), int(d), int(centre), int(levels)
    if d < 1:
        raise InputError(f"a design needs at least 1 factor, got d = {d}")
    if runs is not None and int(runs) < 1:
        raise InputError(f"runs must be at least 1, got {runs}")
    if centre < 0:
        raise InputError(f"centre (extra centre runs) must be 0 or more, got {centre}")
    if method == "ofat" and runs is not None:  # runs picks the number of levels
        levels, rem = divmod(int(runs) - 1, d)
        levels += 1
        if rem:
            raise InputError(f"ofat with {d} factors gives 1 + {d}*(levels-1) runs; runs = {runs} does not fit")
    size = _base_size(method, d, runs if runs is None else int(runs), levels)
    if runs is not None and method not in ("space-filling", "sobol") and size != runs:
        raise InputError(f"{method} with {d} factors has {size} runs, not {runs}; leave runs unset")
    if size + centre > MAX_RUNS:
        advice = ("ask for fewer runs" if method in ("space-filling", "sobol")
                  else "use space-filling or sobol with a chosen number of runs")
        raise InputError(f"{method} with {d} factors needs {size + centre} runs, above the limit of {MAX_RUNS}; "
                         + advice)
    return size + centre


def make_design(method: str, d: int, runs: int | None = None, centre: int = 0, seed: int = 0,
                levels: int = 3) -> np.ndarray:
    """Build an initial design in coded units.

    Parameters
    ----------
    method : one of :data:`METHODS`.
    d : number of factors.
    runs : design runs before the extra centre runs. Required size for space-filling and sobol
        (default ``10 d``, Loeppky, Sacks & Welch 2009, Technometrics 51(4)); for ofat it sets the
        number of levels; the other methods have a fixed size and ``runs`` must be unset or equal to it.
    centre : extra replicated centre runs (0.5, ..., 0.5) appended, for every method.
    seed : seed for the random methods (space-filling, sobol).
    levels : levels per factor for full-factorial and ofat.

    Returns
    -------
    ndarray of shape ``(design_size(...), d)``; see the module note on ccd-circumscribed.
    """
    n = design_size(method, d, runs, centre, levels) - int(centre)
    method, d = _method(method), int(d)
    if method == "space-filling":
        X = space_filling(d, n, seed)
    elif method == "sobol":
        X = sobol(d, n, seed)
    elif method == "full-factorial":
        X = full_factorial(d, levels)
    elif method in CCD_KINDS:
        X = central_composite(d, CCD_KINDS[method])
    elif method == "box-behnken":
        X = box_behnken(d)
    else:
        X = one_factor_at_a_time(d, 1 + (n - 1) // d)
    return _with_centre(X, centre)
