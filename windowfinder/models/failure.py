"""The failure model: probability that the process works (gives usable product) at a setting.

A latent Gaussian-process classifier written for this job, with a constant prior mean tied to the
observed success rate, so that far from every run P(works) tends to that rate instead of 0.5 and a
single failed run only lowers P(works) near itself (Rasmussen & Williams 2006, *Gaussian Processes for
Machine Learning*, ch. 3: Laplace approximation, Algorithms 3.1 and 3.2, §3.4).
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.linalg import cho_solve, cholesky, solve_triangular
from scipy.optimize import minimize
from scipy.special import log_ndtr
from sklearn.gaussian_process.kernels import Matern

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy
from windowfinder.models.gp import (CONSTANT_BOUNDS, LENGTH_PRIOR, LENGTH_PRIOR_MAX_RUNS,
                                    LENGTH_SCALE_BOUNDS, SUBSET_RUNS)
from windowfinder.models.sparse import kcenter

LIKELIHOODS = ("probit", "logistic")
_NEWTON_TOL = 1e-9   # change of the Laplace objective that ends the mode search
_NEWTON_MAX = 100
_LOG_SQRT_2PI = 0.5 * float(np.log(2.0 * np.pi))


def _log_lik(y, f, kind):
    """``log p(y | f)``, its first derivative and ``W = -`` its second derivative, per run.

    ``y`` in {-1, +1}. Probit: ``log Phi(y f)`` (Rasmussen & Williams 2006, eq. 3.16); logistic:
    ``-log(1 + exp(-y f))`` (eq. 3.15).
    """
    z = y * f
    if kind == "probit":
        lp = stats.norm.logcdf(z)
        ratio = np.exp(stats.norm.logpdf(z) - lp)       # N(z) / Phi(z), stable for z << 0
        return lp, y * ratio, ratio * (ratio + z)
    lp = -np.logaddexp(0.0, -z)
    p = 1.0 / (1.0 + np.exp(-f))
    return lp, (y + 1.0) / 2.0 - p, p * (1.0 - p)


def laplace_mode(K, y, mean, kind="probit", g0=None):
    """Posterior mode of the latent ``f = mean + g``, ``g ~ GP(0, K)``, and the Laplace evidence.

    Newton's method of Rasmussen & Williams (2006), Algorithm 3.1, written for a constant prior mean
    ``mean`` (the latent is ``f = m + g``; the prior term is ``-g' K^-1 g / 2``), with step halving when
    a step does not raise the objective (log-concave likelihoods need it rarely).

    Returns
    -------
    g : ndarray (n,)
        Mode of ``f - mean``.
    lml : float
        Approximate log marginal likelihood ``-a'g/2 + sum log p(y|f) - sum log diag(L)`` (eq. 3.32).
    state : (d1, sW, L)
        Gradient of ``log p`` at the mode, ``W^1/2`` and the Cholesky factor of
        ``B = I + W^1/2 K W^1/2``, for predictions (Algorithm 3.2).
    """
    n = K.shape[0]
    g = np.zeros(n) if g0 is None else np.array(g0, dtype=float)
    a = np.zeros(n) if g0 is None else np.linalg.lstsq(K, g, rcond=None)[0]
    lp, d1, W = _log_lik(y, mean + g, kind)
    obj = -0.5 * a @ g + lp.sum()
    for _ in range(_NEWTON_MAX):
        sW = np.sqrt(W)
        L = cholesky(np.eye(n) + sW[:, None] * K * sW[None, :], lower=True, check_finite=False)
        b = W * g + d1                                          # Algorithm 3.1, line 6
        a_new = b - sW * cho_solve((L, True), sW * (K @ b), check_finite=False)   # line 7
        step = a_new - a
        for _half in range(30):
            g_try = K @ (a + step)
            lp_try, d1_try, W_try = _log_lik(y, mean + g_try, kind)
            obj_try = -0.5 * (a + step) @ g_try + lp_try.sum()
            if obj_try >= obj - 1e-12 * abs(obj):
                break
            step *= 0.5
        a, g, lp, d1, W = a + step, g_try, lp_try, d1_try, W_try
        done = abs(obj_try - obj) < _NEWTON_TOL * max(1.0, abs(obj))
        obj = obj_try
        if done:
            break
    sW = np.sqrt(W)
    L = cholesky(np.eye(n) + sW[:, None] * K * sW[None, :], lower=True, check_finite=False)
    lml = obj - float(np.sum(np.log(np.diag(L))))              # Algorithm 3.1, line 10
    return g, lml, (d1, sW, L)


def ep_sites(K, y, mean, sites0=None, tol=1e-8, max_sweeps=200):
    """Expectation propagation for the probit likelihood with prior ``f = mean + g``, ``g ~ GP(0, K)``.

    Rasmussen & Williams (2006), Algorithm 3.5, with every site updated at once from its cavity
    ``N(mu_-i, s2_-i)`` by moment matching of ``N(g) Phi(y (mean + g))`` (eqs. 3.56-3.58, with the
    offset ``mean``) and the posterior recomputed after each sweep ("parallel" EP, damped when the
    updates oscillate; the fixed point is that of the sequential schedule, whose Python loop over
    sites cost tens of seconds per fit). The evidence is eq. 3.65, rewritten so that sites of zero precision
    cause no 0/0 (the same algebra as eqs. 3.73-3.74)::

        log Z = sum log Z_i - sum log diag(L) + 1/2 sum log(1 + tt / t_) + 1/2 nt' Sigma nt
                + sum (n_^2 tt / t_ - 2 n_ nt - nt^2) / (2 (t_ + tt))

    with site parameters ``tt, nt``, cavity parameters ``t_, n_`` and
    ``Z_i = Phi(y_i (mean + mu_-i) / sqrt(1 + s2_-i))``.

    Returns
    -------
    tau, nu : ndarray (n,)
        Site precisions and precision-times-means (of ``g``).
    log_z : float
    L : ndarray (n, n)
        Cholesky factor of ``B = I + S^1/2 K S^1/2``, ``S = diag(tau)``.
    """
    n = K.shape[0]
    tau, nu = (np.zeros(n), np.zeros(n)) if sites0 is None else (sites0[0].copy(), sites0[1].copy())

    def refresh(tau, nu):
        sW = np.sqrt(tau)
        L = cholesky(np.eye(n) + sW[:, None] * K * sW[None, :], lower=True, check_finite=False)
        V = solve_triangular(L, sW[:, None] * K, lower=True, check_finite=False)
        Sigma = K - V.T @ V
        return L, Sigma, Sigma @ nu

    L, Sigma, mu = refresh(tau, nu)
    damping = 1.0
    for sweep in range(max_sweeps):
        d = np.diag(Sigma)
        t_ = 1.0 / d - tau                                        # cavities (eq. 3.56)
        n_ = mu / d - nu
        s2, m_ = 1.0 / t_, n_ / t_
        z = y * (mean + m_) / np.sqrt(1.0 + s2)
        ratio = np.exp(-0.5 * z * z - _LOG_SQRT_2PI - log_ndtr(z))
        mu_hat = m_ + y * s2 * ratio / np.sqrt(1.0 + s2)          # eq. 3.58
        s2_hat = s2 - s2 ** 2 * ratio * (z + ratio) / (1.0 + s2)
        tau_new = np.maximum(1.0 / s2_hat - t_, 0.0)              # probit sites stay >= 0
        nu_new = mu_hat / s2_hat - n_
        step = np.max(np.abs(tau_new - tau)) + np.max(np.abs(nu_new - nu))
        tau = (1.0 - damping) * tau + damping * tau_new
        nu = (1.0 - damping) * nu + damping * nu_new
        L, Sigma, mu = refresh(tau, nu)
        if step < tol:
            break
        if sweep and step > last:   # oscillating: damp harder
            damping = max(0.5 * damping, 0.1)
        last = step
    d = np.diag(Sigma)
    t_ = 1.0 / d - tau
    n_ = mu / d - nu
    lz = log_ndtr(y * (mean + n_ / t_) / np.sqrt(1.0 + 1.0 / t_))
    log_z = (lz.sum() - np.sum(np.log(np.diag(L))) + 0.5 * np.sum(np.log1p(tau / t_)) + 0.5 * nu @ Sigma @ nu
             + np.sum((n_ ** 2 * tau / t_ - 2.0 * n_ * nu - nu ** 2) / (2.0 * (t_ + tau))))
    return tau, nu, float(log_z), L


class FailureModel:
    """Probability that the process works (gives usable product) at a setting.

    Latent Gaussian-process classification, Laplace approximation (Rasmussen & Williams 2006, §3.4):
    ``P(works | x) = Phi(f(x))`` (probit likelihood) with ``f = m + g``, ``g ~ GP(0, c * Matern-5/2)``
    with one length scale per factor (bounds and Gamma prior as :class:`GPModel`). The prior mean is
    tied to the smoothed success rate ``r = (k + 1) / (n + 2)`` (k of n runs worked; Laplace's rule of
    succession): ``m = Phi^-1(r) * sqrt(1 + c)``, so that the prior predictive probability
    ``Phi(m / sqrt(1 + c))`` equals ``r`` for every signal variance ``c``. Far from the runs
    P(works) therefore tends to the observed rate, near many successes it rises towards 1, and a
    failed run pulls it down only within about a length scale. The averaged predictive probability is
    closed-form for the probit likelihood, ``Phi(mu / sqrt(1 + s^2))`` (R&W eq. 3.80, with the latent
    mean ``mu`` and variance ``s^2`` of Algorithm 3.2). Hyperparameters ``(log c, log l)`` maximise the
    Laplace evidence plus the length-scale prior (type-II MAP), L-BFGS-B within the bounds from one
    fixed and ``n_restarts`` seeded random starts.

    When every run worked, or every run failed, there is no boundary to learn: the model returns the
    constant ``r``. With more than ``n_subset`` runs the classifier is fitted on that many runs chosen
    by farthest-point selection (:func:`windowfinder.models.sparse.kcenter`) and ``note_`` says so.

    Parameters
    ----------
    random_state : int
    n_restarts : int
        Random restarts of the hyperparameter search besides the fixed start.
    n_subset : int or None
        Most runs the classifier is fitted on (default ``SUBSET_RUNS``).
    likelihood : {"probit", "logistic"}
        Logistic is for comparison with scikit-learn's ``GaussianProcessClassifier``; its predictive
        uses MacKay's probit approximation (R&W eq. 3.25 and §3.4.2).
    prior_mean : "rate" or float
        ``"rate"``: tied to the success rate as above; a number fixes ``m``.
    kernel_params : (float, array-like) or None
        Fixed ``(c, length_scales)``: no hyperparameter search.

    Attributes
    ----------
    constant_ : float or None
        The constant probability when no classifier is fitted.
    rate_ : float
        Smoothed success rate ``(k + 1) / (n + 2)``.
    mean_ : float
        Prior mean ``m`` of the latent.
    signal_variance_ : float
    length_scales_ : ndarray (d,)
    log_marginal_likelihood_ : float
        Laplace evidence at the fitted hyperparameters (without the prior).
    latent_mode_ : ndarray (n,)
        Posterior mode of the latent ``f`` at the training runs.
    note_ : str
        Empty, or how many runs the classifier was fitted on.
    """

    def __init__(self, random_state=0, n_restarts=2, n_subset=None, likelihood="probit",
                 prior_mean="rate", kernel_params=None, approximation="ep"):
        self.approximation = approximation
        self.random_state = random_state
        self.n_restarts = n_restarts
        self.n_subset = n_subset
        self.likelihood = likelihood
        self.prior_mean = prior_mean
        self.kernel_params = kernel_params

    def _mean(self, c):
        if isinstance(self.prior_mean, str):
            if self.prior_mean != "rate":
                raise InputError(f"failure model prior_mean '{self.prior_mean}' is unknown; use rate or a number")
            # prior predictive Phi(m / sqrt(1 + c)) = rate (R&W eq. 3.80 with mu = m, s^2 = c)
            return float(stats.norm.ppf(self.rate_) * np.sqrt(1.0 + c))
        return float(self.prior_mean)

    def _fit_at(self, theta, X, y, warm=None):
        """Evidence, warm start for the next call, and the prediction state ``(weights, sW, L)``."""
        c, ls = float(np.exp(theta[0])), np.exp(theta[1:])
        K = c * Matern(length_scale=ls, nu=2.5)(X) + 1e-8 * np.eye(X.shape[0])
        m = self._mean(c)
        if self.approximation == "ep":
            tau, nu, log_z, L = ep_sites(K, y, m, warm)
            sW = np.sqrt(tau)
            # Algorithm 3.6, lines 4-5: the latent mean at x* is m + k*' (nu - z)
            z = sW * cho_solve((L, True), sW * (K @ nu), check_finite=False)
            return log_z, (tau, nu), (nu - z, sW, L)
        g, lml, (d1, sW, L) = laplace_mode(K, y, m, self.likelihood, warm)
        return lml, g, (d1, sW, L)

    def fit(self, X, works):
        """Fit to coded settings ``X`` (n, d) and outcomes ``works`` (True = usable product)."""
        X = _check_xy(X)
        works = np.asarray(works, dtype=bool).ravel()
        if works.shape[0] != X.shape[0]:
            raise InputError(f"{X.shape[0]} runs of factor settings but {works.shape[0]} run outcomes")
        if self.likelihood not in LIKELIHOODS:
            raise InputError(f"failure model likelihood '{self.likelihood}' is unknown; use probit or logistic")
        if self.approximation not in ("ep", "laplace"):
            raise InputError(f"failure model approximation '{self.approximation}' is unknown; use ep or laplace")
        if self.approximation == "ep" and self.likelihood != "probit":
            raise InputError("expectation propagation is implemented for the probit likelihood only")
        self.d_ = X.shape[1]
        k, n = int(works.sum()), works.shape[0]
        self.rate_ = (k + 1.0) / (n + 2.0)
        self.constant_, self.note_ = None, ""
        if k in (0, n):
            self.constant_ = self.rate_
            return self
        top = SUBSET_RUNS if self.n_subset is None else int(self.n_subset)
        if n > top:
            sub = kcenter(X, top)
            if works[sub].all() or not works[sub].any():  # keep one run of the missing outcome
                sub = np.append(sub, np.flatnonzero(works != works[sub[0]])[0])
            X, works = X[sub], works[sub]
            self.note_ = (f"failure model fitted on {len(sub)} space-filling runs of {n} (classification "
                          "cost grows with the cube of the run count)")
        y = np.where(works, 1.0, -1.0)
        if self.kernel_params is not None:
            c, ls = self.kernel_params
            theta = np.log(np.concatenate([[float(c)], np.broadcast_to(np.asarray(ls, float), (self.d_,))]))
        else:
            theta = self._search(X, y)
        lml, _, (weights, sW, L) = self._fit_at(theta, X, y)
        self.signal_variance_, self.length_scales_ = float(np.exp(theta[0])), np.exp(theta[1:])
        self.mean_, self.log_marginal_likelihood_ = self._mean(self.signal_variance_), float(lml)
        K = self.signal_variance_ * Matern(length_scale=self.length_scales_, nu=2.5)(X)
        self.latent_mode_ = self.mean_ + K @ weights if self.approximation == "laplace" else None
        self.X_train_, self._weights, self._sW, self._L = X, weights, sW, L
        self._kernel = self.signal_variance_ * Matern(length_scale=self.length_scales_, nu=2.5)
        return self

    def _search(self, X, y):
        """Type-II MAP hyperparameters: Laplace evidence + Gamma length-scale prior, L-BFGS-B."""
        d = X.shape[1]
        bounds = [tuple(np.log(CONSTANT_BOUNDS))] + [tuple(np.log(LENGTH_SCALE_BOUNDS))] * d
        prior = LENGTH_PRIOR if X.shape[0] <= LENGTH_PRIOR_MAX_RUNS else None
        warm = {}

        def loss(theta):
            try:
                lml, warm["start"], _ = self._fit_at(theta, X, y, warm.get("start"))
            except np.linalg.LinAlgError:
                warm.clear()
                return 1e10
            if prior is not None:   # Gamma(a, b) on each length scale, in log coordinates
                ls = np.exp(theta[1:])
                lml += float(np.sum(prior[0] * np.log(ls) - prior[1] * ls))
            return -lml

        rng = np.random.default_rng(self.random_state)
        starts = [np.log(np.concatenate([[1.0], np.full(d, 0.5)]))]
        lo, hi = np.array(bounds).T
        starts += [rng.uniform(lo, hi) for _ in range(int(self.n_restarts))]
        best = None
        for s in starts:
            warm.clear()
            res = minimize(loss, s, method="L-BFGS-B", bounds=bounds)
            if best is None or res.fun < best.fun:
                best = res
        return best.x

    def latent(self, X):
        """Latent mean and variance at ``X`` (Rasmussen & Williams 2006, Algorithm 3.2, lines 4-6)."""
        X = _check_xy(X, d=self.d_)
        Ks = self._kernel(X, self.X_train_)
        mu = self.mean_ + Ks @ self._weights
        V = solve_triangular(self._L, (self._sW[:, None] * Ks.T), lower=True, check_finite=False)
        var = np.maximum(self._kernel.diag(X) - np.einsum("ij,ij->j", V, V), 0.0)
        return mu, var

    def predict_proba(self, X):
        """P(process works) at each row of ``X``, shape (n,)."""
        X = _check_xy(X, d=self.d_)
        if self.constant_ is not None:
            return np.full(X.shape[0], self.constant_)
        out = np.empty(X.shape[0])
        for i in range(0, X.shape[0], 20000):
            mu, var = self.latent(X[i:i + 20000])
            if self.likelihood == "probit":
                out[i:i + 20000] = stats.norm.cdf(mu / np.sqrt(1.0 + var))          # R&W eq. 3.80
            else:
                out[i:i + 20000] = 1.0 / (1.0 + np.exp(-mu / np.sqrt(1.0 + np.pi * var / 8.0)))
        return out
