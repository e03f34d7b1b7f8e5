"""Log marginal likelihood of the response model's Gaussian process and its gradient, vectorised.

scikit-learn's ``GaussianProcessRegressor`` evaluates the gradient of the log marginal likelihood
through a kernel-gradient tensor of shape ``(n, n, p)`` (one slice per hyperparameter) contracted with
``einsum``, and inverts the covariance with ``n`` triangular right-hand sides. For the kernel of
:class:`windowfinder.models.gp.GPModel` the same numbers come far cheaper: the length-scale gradient
needs only one ``(n, n)`` weight matrix and a matrix product with the scaled inputs, and the inverse
comes from the Cholesky factor by LAPACK ``potri``. :class:`FastOptimizer` plugs this into
scikit-learn as its ``optimizer`` callable (L-BFGS-B on the log hyperparameters, within the kernel's
bounds, as scikit-learn does), so restarts, the choice of the best optimum and the fitted attributes
stay scikit-learn's own.

Formulas: Rasmussen & Williams (2006), *Gaussian Processes for Machine Learning*, eq. 2.30 (log
marginal likelihood), eq. 5.9 (its gradient ``1/2 tr((a a' - K^-1) dK/dtheta)``) and eq. 4.17 (Matern
covariance).
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack
from scipy.optimize import minimize
from scipy.spatial.distance import cdist

SUPPORTED_NU = (0.5, 1.5, 2.5, np.inf)
_LOG_2PI = np.log(2.0 * np.pi)


def matern_and_slope(r, nu, slope=True, out=None):
    """Matern correlation ``M(r)`` and ``G(r)`` with ``dM / d log(l_j) = G(r) * D_j``.

    ``r`` is the scaled distance ``sqrt(sum_j D_j)`` with ``D_j = (x_j - x'_j)^2 / l_j^2`` (Rasmussen &
    Williams 2006, eq. 4.17; ``nu = inf`` is the squared exponential). ``r`` is overwritten. ``out``:
    optional preallocated ``(M, G, scratch)`` arrays shaped like ``r``. With ``slope=False`` ``G`` is
    None.
    """
    if nu not in SUPPORTED_NU:
        raise ValueError(f"Matern nu = {nu} has no closed form here; use one of {SUPPORTED_NU}")
    if out is None:
        out = (np.empty_like(r), np.empty_like(r) if slope else None, np.empty_like(r))
    M, G, tmp = out
    G = G if slope else None
    if nu == 0.5:
        np.exp(np.negative(r, out=M), out=M)
        if slope:
            G.fill(0.0)
            np.divide(M, r, out=G, where=r > 0)
        return M, G
    if np.isinf(nu):
        np.multiply(r, r, out=M)
        M *= -0.5
        np.exp(M, out=M)
        if slope:
            G[...] = M
        return M, G
    r *= np.sqrt(3.0 if nu == 1.5 else 5.0)       # s = sqrt(2 nu) r
    np.exp(np.negative(r, out=M), out=M)           # e^-s
    if slope:                                      # 3 e^-s (nu = 3/2) or 5/3 (1 + s) e^-s (nu = 5/2)
        if nu == 1.5:
            np.multiply(M, 3.0, out=G)
        else:
            np.add(r, 1.0, out=G)
            G *= M
            G *= 5.0 / 3.0
    if nu == 2.5:                                  # 1 + s + s^2 / 3
        np.multiply(r, r, out=tmp)
        tmp *= 1.0 / 3.0
        r += tmp
    r += 1.0
    M *= r
    return M, G


def scaled_distances(A, out=None):
    """Euclidean distances between the rows of ``A`` by the Gram identity ``|a - b|^2 = |a|^2 + |b|^2
    - 2 a.b`` (one matrix product), with an exact zero diagonal; ``out`` an optional (n, n) array."""
    D = np.matmul(A, A.T, out=out)
    D *= -2.0
    sq = np.einsum("ij,ij->i", A, A)
    D += sq[:, None]
    D += sq[None, :]
    np.maximum(D, 0.0, out=D)
    D[np.diag_indices_from(D)] = 0.0
    return np.sqrt(D, out=D)


def matern_cross(A, B, length_scales, nu):
    """Matern correlation matrix between the rows of ``A`` and ``B`` (length scales per column)."""
    return matern_and_slope(cdist(A / length_scales, B / length_scales), nu, slope=False)[0]


class MarginalLikelihood:
    """``log p(y | X, theta)`` and its gradient for ``c M_nu + c_t (1 + x.x')^2 + s2 I`` (+ jitter).

    ``theta`` is in scikit-learn's order and log scale: ``[log c, log l_1..l_d, (log c_t), log s2]``
    (the trend term only with ``trend=True``).

    Parameters
    ----------
    X : ndarray (n, d)
    y : ndarray (n,)
        Standardised responses.
    nu : {0.5, 1.5, 2.5, inf}
    trend : bool
    jitter : float
        Added to the diagonal (scikit-learn's ``alpha``).
    noise_prior : (float, float) or None
        Mean and sd of a normal prior on ``log s2`` (log-normal on the noise variance).
    length_prior : (float, float) or None
        Shape ``a`` and rate ``b`` of a Gamma prior on every length scale, density ``l^(a-1) e^(-b l)``.
        With either prior the value returned is the log posterior up to a constant (type-II MAP).
    """

    def __init__(self, X, y, nu=2.5, trend=True, jitter=1e-10, noise_prior=None, length_prior=None):
        self.noise_prior = noise_prior
        self.length_prior = length_prior
        self.X = np.asarray(X, dtype=float)
        self.y = np.asarray(y, dtype=float).ravel()
        self.nu = nu
        self.trend = trend
        self.jitter = jitter
        self.P = (1.0 + self.X @ self.X.T) ** 2 if trend else None
        self._buffers = None

    def __call__(self, theta):
        """Log marginal likelihood and its gradient with respect to ``theta``."""
        theta = np.asarray(theta, dtype=float)
        n, d = self.X.shape
        if self._buffers is None:  # reused across evaluations: four (n, n) arrays
            self._buffers = [np.empty((n, n)) for _ in range(4)]
        R, M, G, K = self._buffers
        c, ls, noise = np.exp(theta[0]), np.exp(theta[1:1 + d]), np.exp(theta[-1])
        Xs = self.X / ls
        matern_and_slope(scaled_distances(Xs, out=R), self.nu, out=(M, G, K))
        np.multiply(M, c, out=K)
        if self.trend:
            c_t = np.exp(theta[1 + d])
            K += np.multiply(self.P, c_t, out=R)
        K[np.diag_indices(n)] += noise + self.jitter
        # LAPACK works in place on the Fortran-ordered view (K is symmetric, so K.T is K)
        L, info = lapack.dpotrf(K.T, lower=1, clean=1, overwrite_a=1)
        if info != 0:
            return -np.inf, np.zeros_like(theta)
        alpha = lapack.dpotrs(L, self.y, lower=1)[0]
        lml = -0.5 * self.y @ alpha - np.log(np.diag(L)).sum() - 0.5 * n * _LOG_2PI
        Kinv = lapack.dpotri(L, lower=1, overwrite_c=1)[0]   # lower triangle; the upper one is zero
        W = np.add(Kinv, Kinv.T, out=R)
        W[np.diag_indices(n)] = np.diag(Kinv)
        np.subtract(np.outer(alpha, alpha, out=K), W, out=W)   # W = alpha alpha' - K^-1
        grad = np.empty_like(theta)
        grad[0] = 0.5 * c * np.vdot(W, M)
        G *= W
        G *= c                                     # G now holds A = c G * W
        grad[1:1 + d] = (Xs ** 2).T @ G.sum(axis=1) - np.einsum("ij,ij->j", Xs, G @ Xs)
        if self.trend:
            grad[1 + d] = 0.5 * c_t * np.vdot(W, self.P)
        grad[-1] = 0.5 * noise * np.trace(W)
        if self.length_prior is not None:   # Gamma(a, b) on each length scale
            a_, b_ = self.length_prior
            lml += float(np.sum((a_ - 1.0) * np.log(ls) - b_ * ls))
            grad[1:1 + d] += (a_ - 1.0) - b_ * ls
        if self.noise_prior is not None:
            m, sd = self.noise_prior
            lml -= 0.5 * ((theta[-1] - m) / sd) ** 2
            grad[-1] -= (theta[-1] - m) / sd ** 2
        return lml, grad


class FastOptimizer:
    """scikit-learn ``optimizer`` callable: L-BFGS-B on :class:`MarginalLikelihood`.

    Same call as scikit-learn's default (``scipy.optimize.minimize(..., method="L-BFGS-B",
    jac=True, bounds=bounds)``), with the cheaper objective. The data are dropped by :meth:`release`
    once the fit is done, so a fitted model does not keep a second copy.
    """

    def __init__(self, X=None, y=None, nu=2.5, trend=True, jitter=1e-10, noise_prior=None, length_prior=None,
                 likelihood=None):
        self.likelihood = (MarginalLikelihood(X, y, nu, trend, jitter, noise_prior, length_prior)
                           if likelihood is None else likelihood)
        self.n_evaluations = 0

    def _negative(self, theta):
        self.n_evaluations += 1
        lml, grad = self.likelihood(theta)
        return -lml, -grad

    def __call__(self, obj_func, initial_theta, bounds):
        res = minimize(self._negative, initial_theta, method="L-BFGS-B", jac=True, bounds=bounds)
        return res.x, float(res.fun)

    def release(self):
        self.likelihood = None
        return self


class SignalKernel:
    """Fast evaluation of a fitted signal kernel ``c M_nu(r) + c_t (1 + x.x')^2``.

    Equal to scikit-learn's kernel object with the same hyperparameters but without its per-call
    overhead, which dominates when a search asks for predictions at a hundred points at a time.

    Parameters
    ----------
    constant : float
        ``c``, the Matern part's variance.
    length_scales : ndarray (d,)
    nu : {0.5, 1.5, 2.5, inf}
    trend : float
        ``c_t``; 0 without the quadratic trend.
    """

    def __init__(self, constant, length_scales, nu, trend=0.0):
        self.constant = float(constant)
        self.length_scales = np.asarray(length_scales, dtype=float)
        self.nu = nu
        self.trend = float(trend)

    def __call__(self, A, B):
        K = matern_cross(A, B, self.length_scales, self.nu)
        K *= self.constant
        if self.trend:
            K += self.trend * (1.0 + A @ B.T) ** 2
        return K

    def diag(self, A):
        out = np.full(A.shape[0], self.constant)
        if self.trend:
            out += self.trend * (1.0 + np.einsum("ij,ij->i", A, A)) ** 2
        return out
