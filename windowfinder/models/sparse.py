"""Gaussian-process regression for many runs: a space-filling subset and the FITC approximation.

An exact Gaussian process costs ``O(n^3)`` time per likelihood evaluation and ``O(n^2)`` per predicted
variance; with a thousand runs and optimizer restarts this dominates everything else. Above
:data:`windowfinder.models.gp.MAX_EXACT_RUNS` runs the response model therefore

1. picks ``m`` runs spread over the design by greedy farthest-point selection (:func:`kcenter`;
   Gonzalez 1985, a 2-approximation of the k-center problem): every run lies within twice the smallest
   achievable covering radius of a chosen one;
2. fits the hyperparameters by maximum marginal likelihood, with restarts, on that subset (an exact GP
   on ``m`` runs, the "subset of data" method);
3. predicts from *all* runs with the fully independent training conditional (FITC) approximation
   with the same ``m`` runs as inducing inputs (:class:`FITC`; Snelson & Ghahramani 2006; Quinonero-
   Candela & Rasmussen 2005, "A unifying view of sparse approximate Gaussian process regression",
   JMLR 6, §6). FITC replaces the prior covariance of the training values by
   ``Q = K_fu K_uu^-1 K_uf`` plus the exact diagonal, so ``cov(y) = Q + Lambda`` with
   ``Lambda = diag(K_ff - Q_ff) + s2``; it costs ``O(n m^2)`` to build and ``O(m^2)`` per predicted
   variance. Because the inducing inputs are runs that cover the design, ``Q`` is close to the exact
   covariance wherever there are data, and the diagonal correction widens the intervals where it is not.

Leave-one-out predictions of the FITC model are closed form (Rasmussen & Williams 2006, §5.4.2, applied
to the covariance ``Q + Lambda``, whose inverse follows from the Woodbury identity in ``O(n m^2)``).
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import cholesky, solve_triangular


def kcenter(X, m, first=None):
    """Indices of ``m`` rows of ``X`` chosen by greedy farthest-point selection.

    Gonzalez (1985), "Clustering to minimize the maximum intercluster distance", Theor. Comput. Sci.
    38, 293-306. Starts from ``first`` (default: the row nearest the centroid) and repeatedly adds the
    row farthest (Euclidean) from those chosen. Deterministic; ``O(n m)``. Repeated rows are chosen
    only once all distinct rows are.

    Returns
    -------
    ndarray of int (min(m, n),), in selection order.
    """
    X = np.asarray(X, dtype=float)
    n = X.shape[0]
    m = min(int(m), n)
    if first is None:
        first = int(np.argmin(np.sum((X - X.mean(axis=0)) ** 2, axis=1)))
    chosen = np.empty(m, dtype=int)
    chosen[0] = first
    gap = np.sum((X - X[first]) ** 2, axis=1)
    for k in range(1, m):
        i = int(np.argmax(gap))
        chosen[k] = i
        np.minimum(gap, np.sum((X - X[i]) ** 2, axis=1), out=gap)
    return chosen


class FITC:
    """FITC posterior of a zero-mean GP with a fixed signal kernel and noise variance.

    Parameters
    ----------
    kernel : callable
        ``kernel(A, B)`` signal covariance matrix; ``kernel.diag(A)`` its diagonal.
    Z : ndarray (m, d)
        Inducing inputs.
    X : ndarray (n, d)
    y : ndarray (n,)
        Standardised responses.
    noise_var : float
        White-noise variance (plus scikit-learn's jitter), standardised units.
    jitter : float
        Relative jitter on ``K_uu``'s diagonal for a stable Cholesky factor (common practice, no
        source: 1e-8 of the mean prior variance).

    Attributes
    ----------
    lam_ : ndarray (n,)
        ``Lambda``: noise variance plus the FITC diagonal correction ``k(x, x) - Q(x, x)``.
    """

    def __init__(self, kernel, Z, X, y, noise_var, jitter=1e-8):
        self.kernel = kernel
        self.Z = Z
        self.X, self.y = X, np.asarray(y, dtype=float)
        Kuu = kernel(Z, Z)
        Kuu[np.diag_indices_from(Kuu)] += jitter * max(float(np.mean(np.diag(Kuu))), 1e-12)
        self.Lu_ = cholesky(Kuu, lower=True, check_finite=False)
        V = solve_triangular(self.Lu_, kernel(Z, X), lower=True, check_finite=False)
        q_diag = np.einsum("ij,ij->j", V, V)
        self.lam_ = np.maximum(kernel.diag(X) - q_diag, 0.0) + noise_var
        root = np.sqrt(self.lam_)
        self.Vs_ = V / root
        B = self.Vs_ @ self.Vs_.T
        B[np.diag_indices_from(B)] += 1.0
        self.LB_ = cholesky(B, lower=True, check_finite=False)
        self.beta_ = solve_triangular(self.LB_, self.Vs_ @ (self.y / root), lower=True, check_finite=False)
        # mean at x*: k_u*' Kuu^-1 Kuf (Q + Lambda)^-1 y = k_u*' Lu^-T LB^-T beta
        self.w_ = solve_triangular(self.Lu_, solve_triangular(self.LB_, self.beta_, lower=True, trans="T",
                                                              check_finite=False),
                                   lower=True, trans="T", check_finite=False)

    def moments(self, Xt, return_var=True):
        """Posterior mean and (signal, noise-free) variance at ``Xt``."""
        Kut = self.kernel(self.Z, Xt)
        mean = Kut.T @ self.w_
        if not return_var:
            return mean, None
        # k** - |Lu^-1 k_u*|^2 + |LB^-1 Lu^-1 k_u*|^2: triangular solves, not an explicit
        # Kuu^-1 - (Kuu + Kuf Lambda^-1 Kfu)^-1, which loses digits when Kuu is ill-conditioned
        R = solve_triangular(self.Lu_, Kut, lower=True, check_finite=False)
        S = solve_triangular(self.LB_, R, lower=True, check_finite=False)
        var = self.kernel.diag(Xt) - np.einsum("ij,ij->j", R, R) + np.einsum("ij,ij->j", S, S)
        return mean, np.maximum(var, 0.0)

    def loo(self):
        """Leave-one-out mean and variance (noise included) under the FITC covariance ``Q + Lambda``.

        ``(Q + Lambda)^-1 = Lambda^-1/2 (I - Vs' B^-1 Vs) Lambda^-1/2`` (Woodbury), so its diagonal and
        ``alpha = (Q + Lambda)^-1 y`` cost ``O(n m^2)``; then ``mu_i = y_i - alpha_i / [K^-1]_ii`` and
        ``var_i = 1 / [K^-1]_ii`` (Rasmussen & Williams 2006, eqs. 5.10-5.12).
        """
        U = solve_triangular(self.LB_, self.Vs_, lower=True, check_finite=False)
        kinv_diag = np.maximum(1.0 - np.einsum("ij,ij->j", U, U), np.finfo(float).eps) / self.lam_
        alpha = (self.y / np.sqrt(self.lam_) - U.T @ self.beta_) / np.sqrt(self.lam_)
        return self.y - alpha / kinv_diag, 1.0 / kinv_diag
