"""Factor influence: variance-based (Sobol') sensitivity indices of a vectorised function on [0, 1]^d.

For a function ``f`` of independent uniform inputs, the first-order index ``S_i = V[E(f | x_i)] / V(f)``
is the share of the output variance that factor ``i`` explains on its own, and the total index
``ST_i = E[V(f | x_~i)] / V(f)`` the share it is involved in, interactions included (Sobol', "Sensitivity
estimates for nonlinear mathematical models", Math. Model. Comput. Exp. 1, 1993). ``ST_i - S_i`` is the
part due to interactions; ``ST_i`` near zero means the factor does not matter over its range.

The indices are estimated by Monte Carlo on the sampling scheme of Saltelli (2002): two independent
sample matrices ``A`` and ``B`` (here the two halves of one scrambled Sobol' sequence of dimension
``2d``) and, for each factor, ``A_B^(i)`` = ``A`` with column ``i`` taken from ``B``; ``n (d + 2)``
evaluations in all.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import qmc

from windowfinder.errors import InputError


@dataclass
class SobolIndices:
    """First-order and total Sobol' indices of one or more outputs.

    Attributes
    ----------
    first, total : ndarray (d,) or (k, d)
        Estimated first-order and total indices (one row per output when ``fn`` returns ``k`` columns).
    first_conf, total_conf : ndarray, same shape
        Half-width of a 95 % bootstrap percentile interval (resampling the ``n`` base rows).
    variance : float or ndarray (k,)
        Output variance ``V(f)`` the indices are shares of.
    names : list of str
        Factor names (``x1``... when not given).
    outputs : list of str
        Output names (empty for a single output).
    n : int
        Base sample size; ``n (d + 2)`` evaluations were made.
    """

    first: np.ndarray
    total: np.ndarray
    first_conf: np.ndarray
    total_conf: np.ndarray
    variance: np.ndarray
    names: list
    outputs: list
    n: int

    def __getitem__(self, key):
        """Dict-style access (``res["first"]``) for callers that treat the result as a mapping."""
        return getattr(self, key)

    def to_dict(self) -> dict:
        return {"first": np.asarray(self.first).tolist(), "total": np.asarray(self.total).tolist(),
                "first_conf": np.asarray(self.first_conf).tolist(),
                "total_conf": np.asarray(self.total_conf).tolist(),
                "variance": np.asarray(self.variance).tolist(), "names": list(self.names),
                "outputs": list(self.outputs), "n": int(self.n)}

    def to_frame(self) -> pd.DataFrame:
        """One row per (output, factor): first, total and their 95 % half-widths."""
        first, total = np.atleast_2d(self.first), np.atleast_2d(self.total)
        fc, tc = np.atleast_2d(self.first_conf), np.atleast_2d(self.total_conf)
        outputs = self.outputs or [""]
        rows = [{"output": o, "factor": f, "first": first[k, j], "first_conf": fc[k, j],
                 "total": total[k, j], "total_conf": tc[k, j]}
                for k, o in enumerate(outputs) for j, f in enumerate(self.names)]
        return pd.DataFrame(rows)


def _estimates(fA, fB, fAB):
    """Indices from evaluations; ``fA, fB`` (..., n, k), ``fAB`` (..., d, n, k) -> (..., k, d) each.

    First order: Saltelli et al. (2010), Table 2 (b), ``V_i = mean(f(B) (f(A_B^i) - f(A)))``.
    Total: Jansen (1999), ``V_Ti = mean((f(A) - f(A_B^i))^2) / 2``. ``V`` is the variance of ``A`` and
    ``B`` together.
    """
    var = np.var(np.concatenate([fA, fB], axis=-2), axis=-2)            # (..., k)
    diff = fAB - fA[..., None, :, :]                                    # (..., d, n, k)
    v_first = np.mean(fB[..., None, :, :] * diff, axis=-2)              # (..., d, k)
    v_total = 0.5 * np.mean(diff ** 2, axis=-2)
    safe = np.where(var > 0, var, 1.0)[..., None, :]
    first = np.where(var[..., None, :] > 0, v_first / safe, 0.0)
    total = np.where(var[..., None, :] > 0, v_total / safe, 0.0)
    return np.swapaxes(first, -1, -2), np.swapaxes(total, -1, -2), var


def sobol_indices(fn, d, n=1024, seed=0, names=None, outputs=None, n_boot=200, chunk=None):
    """First-order and total Sobol' indices of ``fn`` over the unit cube.

    Parameters
    ----------
    fn : callable
        Vectorised: ``(m, d)`` points in ``[0, 1]^d`` -> ``(m,)`` values, or ``(m, k)`` for ``k``
        outputs at once (e.g. several response models on the same samples).
    d : int
        Number of inputs.
    n : int, default 1024
        Base sample size (a power of two keeps the Sobol' sequence balanced); ``n (d + 2)`` evaluations.
    seed : int
        Seeds the scrambling of the Sobol' sequence and the bootstrap.
    names : list of str, optional
        Factor names.
    outputs : list of str, optional
        Output names, one per column of ``fn``'s result.
    n_boot : int, default 200
        Bootstrap resamples of the ``n`` base rows for the 95 % intervals (0: no intervals, NaN).
    chunk : int, optional
        Evaluate ``fn`` on at most this many rows at a time.

    Returns
    -------
    SobolIndices

    Notes
    -----
    Sampling scheme of Saltelli, A. (2002), "Making best use of model evaluations to compute sensitivity
    indices", Comput. Phys. Commun. 145, 280-297: ``A``, ``B`` and ``A_B^(i)``, here from one scrambled
    Sobol' sequence of dimension ``2d`` (:class:`scipy.stats.qmc.Sobol`; Owen 1995 scrambling). First-order
    estimator of Saltelli, A., Annoni, P., Azzini, I., Campolongo, F., Ratto, M. and Tarantola, S. (2010),
    "Variance based sensitivity analysis of model output. Design and estimator for the total sensitivity
    index", Comput. Phys. Commun. 181, 259-270, Table 2 (b), a refinement of the 2002 form that stays
    accurate when the mean is large; total-effect estimator of Jansen, M. J. W. (1999), "Analysis of
    variance designs for model output", Comput. Phys. Commun. 117, 35-43 (Saltelli et al. 2010, Table 2
    (f)). Outputs are centred before estimation. The bootstrap treats the Sobol' rows as independent
    draws, so for these quasi-random points its intervals are on the wide (safe) side. Estimates may fall slightly below 0 or above 1 by
    sampling error; they are reported as computed.
    """
    d = int(d)
    n = int(n)
    if d < 1 or n < 2:
        raise InputError(f"Sobol' indices need d >= 1 and n >= 2 (got d = {d}, n = {n})")
    names = list(names) if names is not None else [f"x{j + 1}" for j in range(d)]
    if len(names) != d:
        raise InputError(f"Sobol' indices: {len(names)} factor names for {d} factors")
    AB = qmc.Sobol(2 * d, scramble=True, seed=seed).random(n)
    A, B = AB[:, :d], AB[:, d:]
    mats = np.repeat(A[None], d, axis=0)                                 # (d, n, d)
    idx = np.arange(d)
    mats[idx, :, idx] = B[:, idx].T
    X = np.vstack([A, B, mats.reshape(-1, d)])
    step = len(X) if chunk is None else max(int(chunk), 1)
    Y = np.concatenate([np.asarray(fn(X[i:i + step]), dtype=float).reshape(len(X[i:i + step]), -1)
                        for i in range(0, len(X), step)])
    if not np.all(np.isfinite(Y)):
        raise InputError("Sobol' indices: the function returned non-finite values; check the model")
    single = Y.shape[1] == 1 and outputs is None
    k = Y.shape[1]
    outputs = [] if single else (list(outputs) if outputs is not None else [f"y{i + 1}" for i in range(k)])
    if outputs and len(outputs) != k:
        raise InputError(f"Sobol' indices: {len(outputs)} output names for {k} outputs")
    Y = Y - np.mean(Y[:2 * n], axis=0)
    fA, fB, fAB = Y[:n], Y[n:2 * n], Y[2 * n:].reshape(d, n, k)
    first, total, var = _estimates(fA, fB, fAB)
    if n_boot:
        rows = np.random.default_rng(seed).integers(0, n, size=(int(n_boot), n))
        bf, bt, _ = _estimates(fA[rows], fB[rows], fAB[:, rows].swapaxes(0, 1))
        first_conf = 0.5 * np.diff(np.percentile(bf, [2.5, 97.5], axis=0), axis=0)[0]
        total_conf = 0.5 * np.diff(np.percentile(bt, [2.5, 97.5], axis=0), axis=0)[0]
    else:
        first_conf = np.full_like(first, np.nan)
        total_conf = np.full_like(total, np.nan)
    if single:
        first, total, first_conf, total_conf, var = first[0], total[0], first_conf[0], total_conf[0], var[0]
    return SobolIndices(first, total, first_conf, total_conf, var, names, outputs, n)


def model_indices(spec, surrogates, n=512, seed=0, responses=None) -> SobolIndices:
    """Sobol' indices of each response model's predicted median (natural units) over the study bounds.

    The models' means are evaluated on the same sample matrices (one call of :func:`sobol_indices`).
    Factors are taken as independent and uniform between their ``low`` and ``high``.
    """
    responses = list(responses) if responses is not None else list(spec.response_names)

    def fn(U):
        cols = []
        for r in responses:
            m = surrogates.models[r]
            cols.append(m.transform_.inverse(m.predict(U, return_std=False)))
        return np.column_stack(cols)

    return sobol_indices(fn, spec.d, n=n, seed=seed, names=spec.factor_names, outputs=responses)
