"""Hyperparameter uncertainty of the Gaussian-process model: posterior samples and the mixture predictive.

With tens of runs the posterior of the GP's hyperparameters (signal variance, length scales, trend
variance, noise variance) is broad, and a prediction made with its mode alone (type-II MAP) is too sure
or too timid depending on which way the mode errs. The marginal predictive integrates over it
(Rasmussen & Williams 2006, *Gaussian Processes for Machine Learning*, §5.2: the hierarchical
treatment of hyperparameters; MacKay 1992, "Bayesian interpolation", Neural Computation 4(3), 415-447,
for the Gaussian (Laplace) approximation of a hyperparameter posterior at its mode):

1. the log posterior ``log p(y | theta) + log p(theta)`` of the log hyperparameters is approximated by
   a Gaussian at the mode ``theta_hat`` with precision ``H``, the negative Hessian, taken by central
   differences of the analytic gradient (:class:`windowfinder.models.likelihood.MarginalLikelihood`);
   directions the runs do not pin down (eigenvalues of ``H`` below ``1 / MAX_SD^2``) get the sd
   ``MAX_SD``;
2. a pool of draws from that Gaussian widened by ``PROPOSAL_SCALE``, restricted to the hyperparameter
   bounds (the bounds act as a flat prior box), and the mode itself, are weighted to the true posterior,
   ``w ~ p(y | theta) p(theta) / q(theta)`` (importance sampling with the Laplace proposal of MacKay's
   scheme, corrected for its error), the largest weights truncated at ``mean(w) sqrt(pool)`` (Ionides
   2008, "Truncated importance sampling", J. Comput. Graph. Stat. 17(2), 295-311; from memory), and
   ``K`` of them are resampled in proportion to the weights (sampling importance resampling): K
   equally weighted posterior draws, whatever the proposal's error;
3. the predictive of a new value is the mixture of the per-sample GP posteriors, summarised by
   its first two moments (mean ``sum w_k mu_k``, variance ``sum w_k (s_k^2 + mu_k^2) - mean^2``): the
   moment-matched Gaussian that the "marginal GP" of Garnett, Osborne & Hennig (2014), "Active learning
   of linear embeddings for Gaussian processes", UAI, also uses, there from a Taylor expansion around
   the mode instead of samples.

The draws are seeded (scrambled Sobol points mapped to normal quantiles), so a fit is reproducible.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import cho_solve, lapack, solve_triangular
from scipy.stats import norm, qmc

from windowfinder.models.likelihood import SignalKernel

# Numbers: common practice, no source.
N_SAMPLES = 16        # importance draws (plus the mode)
MAX_SD = 1.5          # largest posterior sd of a log hyperparameter the Laplace step may claim
PROPOSAL_SCALE = 1.5  # proposal sd / Laplace sd: a wider proposal keeps the importance weights bounded
FD_STEP = 1e-4        # central-difference step on the log hyperparameters
POOL = 512            # proposal draws weighted before resampling


def log_posterior_hessian(objective, theta, step=FD_STEP):
    """Negative Hessian of ``objective`` (returns value and gradient) at ``theta``, symmetrised.

    Central differences of the analytic gradient: ``H[:, i] = -(g(theta + h e_i) - g(theta - h e_i))
    / (2 h)``; 2 p gradient evaluations for p hyperparameters.
    """
    theta = np.asarray(theta, float)
    p = theta.size
    H = np.empty((p, p))
    for i in range(p):
        e = np.zeros(p)
        e[i] = step
        H[:, i] = -(objective(theta + e)[1] - objective(theta - e)[1]) / (2.0 * step)
    return 0.5 * (H + H.T)


def laplace_covariance(H, max_sd=MAX_SD):
    """Covariance ``H^-1`` with every eigenvalue of ``H`` floored at ``1 / max_sd^2``."""
    lam, V = np.linalg.eigh(H)
    lam = np.maximum(np.nan_to_num(lam, nan=0.0), 1.0 / max_sd ** 2)
    return (V / lam) @ V.T


def sample_hyperparameters(objective, theta, bounds, n_samples=N_SAMPLES, seed=0, pool=POOL):
    """Draws from the posterior of the log hyperparameters, by sampling importance resampling.

    ``pool`` draws from the widened Laplace Gaussian (scrambled Sobol points mapped to normal
    quantiles), restricted to the bounds, are weighted ``p / q`` (the weights truncated at
    ``mean(w) sqrt(pool)``, Ionides 2008) and ``n_samples`` of them are resampled systematically in
    proportion to the weights (Rubin 1988, "Using the SIR algorithm to simulate posterior
    distributions", Bayesian Statistics 3; Kitagawa 1996, systematic resampling; both from memory).
    A draw picked more than once is kept once with the summed weight.

    Parameters
    ----------
    objective : callable
        ``objective(theta) -> (log posterior density of theta up to a constant, gradient)``.
    theta : ndarray (p,)
        The posterior mode (log hyperparameters).
    bounds : ndarray (p, 2)
        Log bounds; draws outside are rejected.
    n_samples : int
    seed : int
    pool : int
        Proposal draws weighted before resampling.

    Returns
    -------
    thetas : ndarray (k, p)
        Distinct resampled draws (``k <= n_samples``).
    weights : ndarray (k,)
        Their shares (multiples of ``1 / n_samples``; sum 1).
    ess : float
        Effective sample size of the weighted pool, ``1 / sum w^2`` (Kong 1992; from memory).
    """
    theta = np.asarray(theta, float)
    bounds = np.asarray(bounds, float)
    cov = laplace_covariance(log_posterior_hessian(objective, theta)) * PROPOSAL_SCALE ** 2
    chol = np.linalg.cholesky(cov)
    p = theta.size
    u = qmc.Sobol(p, scramble=True, seed=seed).random(int(2 ** np.ceil(np.log2(pool))))
    e = norm.ppf(np.clip(u, 1e-12, 1.0 - 1e-12))
    draws = theta + e @ chol.T
    inside = np.all((draws >= bounds[:, 0]) & (draws <= bounds[:, 1]), axis=1)
    draws, e = np.vstack([theta[None, :], draws[inside]]), np.vstack([np.zeros((1, p)), e[inside]])
    log_q = -0.5 * np.sum(e ** 2, axis=1)                 # up to the normalising constant
    log_p = np.array([objective(t)[0] for t in draws], float)
    log_w = np.where(np.isfinite(log_p), log_p - log_q, -np.inf)
    w = np.exp(log_w - np.max(log_w))
    w = np.minimum(w, np.mean(w) * np.sqrt(len(w)))       # truncated importance weights
    w /= w.sum()
    ess = float(1.0 / np.sum(w ** 2))
    picks = np.searchsorted(np.cumsum(w), (np.arange(n_samples) + 0.5) / n_samples)
    picks = np.minimum(picks, len(w) - 1)
    kept, counts = np.unique(picks, return_counts=True)
    return draws[kept], counts / n_samples, ess


class Component:
    """One hyperparameter draw fitted to the runs: signal kernel, Cholesky factor, weights ``K^-1 y``.

    Parameters
    ----------
    signal : callable
        Signal kernel (``__call__(A, B)`` and ``diag(A)``), standardised units.
    noise_var : float
        White-noise variance, standardised units.
    weight : float
    """

    def __init__(self, signal, noise_var, weight, theta=None):
        self.signal = signal
        self.noise_var = float(noise_var)
        self.weight = float(weight)
        self.theta = theta

    def fit(self, X, ys, jitter):
        K = self.signal(X, X)
        K[np.diag_indices_from(K)] += self.noise_var + jitter
        L, info = lapack.dpotrf(K, lower=1, clean=1)
        if info != 0:
            return None
        self.L = L
        self.alpha = lapack.dpotrs(L, ys, lower=1)[0]
        return self


def mixture_moments(means, variances, weights):
    """Mean and variance of the mixture ``sum_k w_k N(means[k], variances[k])`` (arrays (k, m)).

    The variance is summed as ``sum_k w_k (v_k + (mu_k - mean)^2)``, equal to ``sum_k w_k (v_k + mu_k^2)
    - mean^2`` but without its cancellation where the variances are small beside the squared means.
    """
    w = np.asarray(weights, float)[:, None]
    mean = np.sum(w * means, axis=0)
    return mean, np.sum(w * (variances + (means - mean) ** 2), axis=0)


def fit_components(thetas, weights, X, ys, nu, trend, jitter):
    """One fitted :class:`Component` per draw (log hyperparameters ``[c, l_1..l_d, (c_t), s2]``); a draw
    whose covariance is not positive definite is dropped and the weights renormalised. Empty list when
    none is left."""
    d = X.shape[1]
    comps = []
    for t, w in zip(thetas, weights):
        e = np.exp(t)
        c_t = e[1 + d] if trend else 0.0
        comp = Component(SignalKernel(e[0], e[1:1 + d], nu, c_t), e[-1], w, t).fit(X, ys, jitter)
        if comp is not None:
            comps.append(comp)
    total = sum(c.weight for c in comps)
    if not comps or not total > 0:
        return []
    for c in comps:
        c.weight /= total
    return comps


def mixture_predict(comps, X_train, X, return_std):
    """Standardised mean and latent variance of the mixture at ``X`` (R&W 2006, eqs. 2.25-2.26 per
    component), noise excluded: each component's noise variance added before mixing would add their
    weighted mean, ``sum_k w_k s2_k``, to the mixture's variance. Variance None without ``return_std``."""
    means = np.empty((len(comps), X.shape[0]))
    vars_ = np.zeros_like(means)
    for i, c in enumerate(comps):
        Ks = c.signal(X, X_train)
        means[i] = Ks @ c.alpha
        if return_std:
            V = solve_triangular(c.L, Ks.T, lower=True, check_finite=False)
            vars_[i] = np.maximum(c.signal.diag(X) - np.einsum("ij,ij->j", V, V), 0.0)
    mean, var = mixture_moments(means, vars_, [c.weight for c in comps])
    return mean, (var if return_std else None)


def mixture_whitened(comps, X_train, P):
    """Per component ``(L_k^-1 k_k(X, P), standardised mean at P)``, reusable for fixed ``P``."""
    out = []
    for c in comps:
        Ks = c.signal(X_train, P)
        out.append((solve_triangular(c.L, Ks, lower=True, check_finite=False), Ks.T @ c.alpha))
    return out


def mixture_cross_covariance(comps, A, B, Wa, Wb):
    """Standardised covariance of the mixture between ``A`` and ``B``:
    ``sum_k w_k (C_k(A, B) + m_k(A) m_k(B)') - m(A) m(B)'`` (``Wa``, ``Wb`` from :func:`mixture_whitened`)."""
    out = np.zeros((A.shape[0], B.shape[0]))
    mean_a, mean_b = np.zeros(A.shape[0]), np.zeros(B.shape[0])
    for c, (Va, ma), (Vb, mb) in zip(comps, Wa, Wb):
        out += c.weight * (c.signal(A, B) - Va.T @ Vb + np.outer(ma, mb))
        mean_a += c.weight * ma
        mean_b += c.weight * mb
    return out - np.outer(mean_a, mean_b)


def mixture_loo(comps, ys):
    """Closed-form leave-one-out mean and variance (standardised) of the mixture, weights held fixed:
    per component ``mu_i = y_i - [K^-1 y]_i / [K^-1]_ii``, ``s_i^2 = 1 / [K^-1]_ii`` (R&W 2006, §5.4.2)."""
    n = ys.shape[0]
    means, vars_ = [], []
    for c in comps:
        d = np.diag(cho_solve((c.L, True), np.eye(n)))
        means.append(ys - c.alpha / d)
        vars_.append(1.0 / d)
    return mixture_moments(np.array(means), np.array(vars_), [c.weight for c in comps])
