"""Blocks (day, lot, operator): a random offset per block in a response's Gaussian-process model.

Runs made in blocks share a shift that is neither run-to-run noise nor an effect of the factors. The
model of a response becomes ``z = f(x) + b[block] + e`` with ``f`` the Gaussian process of
:class:`windowfinder.models.gp.GPModel`, block offsets ``b ~ N(0, tau^2)`` independent of each other and
of the noise ``e ~ N(0, s^2)``: the observations' covariance is ``K + tau^2 Z Z'`` with ``Z`` the run-by-block
indicator matrix, the random-block model of classical blocked experiments written as a GP kernel term
(Searle, Casella & McCulloch 1992, *Variance Components*, §3.3 for the one-way case; Rasmussen &
Williams 2006, §2.7 for adding a kernel term).

Fitting alternates (coordinate ascent on the hyperparameters, a few rounds):

1. at the GP's current hyperparameters, ``tau^2`` maximises the Gaussian log marginal likelihood of the
   latent responses under ``K + tau^2 Z Z'`` (one-dimensional bounded search);
2. the offsets are their best linear unbiased predictions (BLUP; Henderson 1975, *Biometrics* 31, 423;
   Robinson 1991, *Statistical Science* 6, 15): ``b = tau^2 Z' (K + tau^2 Z Z')^-1 (z - m)``;
3. the GP is refitted (hyperparameters re-optimised) to the block-corrected responses ``z - Z b``.

Predictions of the process (``noise=False``) are for the average block (offset 0). A future run falls
in a new block, so its predictive variance (``noise=True``) adds ``tau^2`` to the run-to-run noise.
After fitting the GP treats the corrected values as measurements, so it is slightly too sure about
``f`` (the offsets' own uncertainty is not carried), the same price as the censored imputation of
:mod:`windowfinder.models.censored`.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import cho_factor, cho_solve
from scipy.optimize import minimize_scalar

from windowfinder.errors import InputError

ROUNDS = 3             # refits after the first; common practice, no source
TAU2_BOUNDS = (1e-6, 10.0)   # block variance relative to the latent responses' variance (common practice)


def indicators(blocks):
    """Run-by-block indicator matrix ``Z`` (n, k) and the block labels in order of first appearance."""
    blocks = np.asarray(blocks, dtype=object).ravel()
    labels = list(dict.fromkeys(str(b) for b in blocks))
    index = {b: j for j, b in enumerate(labels)}
    Z = np.zeros((blocks.shape[0], len(labels)))
    Z[np.arange(blocks.shape[0]), [index[str(b)] for b in blocks]] = 1.0
    return Z, labels


def log_likelihood(K, Z, r, tau2):
    """Gaussian log marginal likelihood of residuals ``r`` under covariance ``K + tau2 Z Z'``.

    Rasmussen & Williams (2006), eq. 2.30: ``-r'C^-1 r / 2 - log|C| / 2 - n log(2 pi) / 2``.
    """
    C = K + tau2 * (Z @ Z.T)
    c, low = cho_factor(C, lower=True, check_finite=False)
    a = cho_solve((c, low), r, check_finite=False)
    return float(-0.5 * r @ a - np.sum(np.log(np.diag(c))) - 0.5 * len(r) * np.log(2.0 * np.pi))


def offsets(K, Z, r, tau2):
    """BLUP of the block offsets, ``tau2 Z' (K + tau2 Z Z')^-1 r`` (Henderson 1975; Robinson 1991)."""
    C = K + tau2 * (Z @ Z.T)
    return tau2 * (Z.T @ cho_solve(cho_factor(C, lower=True, check_finite=False), r, check_finite=False))


def block_variance(K, Z, r):
    """``tau^2`` maximising :func:`log_likelihood` within ``TAU2_BOUNDS`` times the variance of ``r``."""
    scale = max(float(np.var(r)), 1e-300)
    lo, hi = np.log(TAU2_BOUNDS[0] * scale), np.log(TAU2_BOUNDS[1] * scale)
    res = minimize_scalar(lambda t: -log_likelihood(K, Z, r, np.exp(t)), bounds=(lo, hi), method="bounded",
                          options={"xatol": 1e-4})
    return float(np.exp(res.x))


def _covariance(model, X):
    """The fitted GP's covariance of the latent training responses (signal + noise), latent units."""
    n = X.shape[0]
    return (model._signal(X, X) * model.y_scale_ ** 2 + (model.noise_std_ ** 2 + 1e-10 * model.y_scale_ ** 2)
            * np.eye(n))


def fit_blocked(model, X, y, blocks, rounds=ROUNDS):
    """Fit the unfitted GPModel ``model`` to ``(X, y)`` with a random offset per block.

    Parameters
    ----------
    model : GPModel (unfitted)
    X, y : ndarray (n, d), (n,)
        Coded settings and natural-unit responses.
    blocks : array (n,)
        Block label of each run.

    Returns
    -------
    model
        Fitted to the block-corrected responses; ``block_offsets_`` maps each label to its offset
        (latent units), ``block_sd_`` is ``tau`` and ``block_var_`` enters the new-run variance.
    """
    if getattr(model, "kind", "") != "gp":
        raise InputError("block offsets need the Gaussian-process model; fit with kind gp")
    X, y = np.asarray(X, float), np.asarray(y, float).ravel()
    Z, labels = indicators(blocks)
    model.fit(X, y)
    if len(labels) < 2:
        model.block_offsets_, model.block_sd_, model.block_var_ = {labels[0]: 0.0} if labels else {}, 0.0, 0.0
        return model
    tr = model.transform_
    z = model.z_train_            # latent values of the measured runs (bounds moved inside)
    for _ in range(rounds):
        K = _covariance(model, X)
        r = z - model.y_mean_
        tau2 = block_variance(K, Z, r)
        b = offsets(K, Z, r, tau2)
        model.fit(X, tr.inverse(z - Z @ b))
    model.block_offsets_ = dict(zip(labels, (float(v) for v in b)))
    model.block_sd_ = float(np.sqrt(tau2))
    model.block_var_ = float(tau2)
    note = (f"{len(labels)} blocks: offset sd {np.sqrt(tau2):.3g} (latent units), offsets "
            + ", ".join(f"{k} {v:+.3g}" for k, v in list(model.block_offsets_.items())[:8])
            + (" ..." if len(labels) > 8 else ""))
    model.note_ = f"{model.note_}; {note}" if getattr(model, "note_", "") else note
    return model
