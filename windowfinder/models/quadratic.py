"""Full second-order response surface fitted by least squares: the classical baseline model.

Same interface as the Gaussian process (``predict -> latent mean, sd``); the standard error of the fitted
mean is ``s^2 x0'(X'X)^-1 x0`` (Montgomery, *Design and Analysis of Experiments*, 2013, §10.5).
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.linalg import solve_triangular

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy, _ResponseModel
from windowfinder.models.transform import _as_transform

def feature_names(d, degree=2, names=None):
    """Names of the response-surface terms in :func:`quadratic_features` order.

    Order: intercept ``1``; linear ``x1..xd``; for ``degree=2`` the interactions ``xi*xj`` (i < j, row by
    row) then the squares ``xi^2``.
    """
    names = [f"x{i + 1}" for i in range(d)] if names is None else list(names)
    out = ["1", *names]
    if degree == 2:
        out += [f"{names[i]}*{names[j]}" for i in range(d) for j in range(i + 1, d)]
        out += [f"{n}^2" for n in names]
    return out


def quadratic_features(X, degree=2):
    """Model matrix of a first- or full second-order polynomial (order as :func:`feature_names`)."""
    X = np.asarray(X, dtype=float)
    n, d = X.shape
    cols = [np.ones(n), *X.T]
    if degree == 2:
        cols += [X[:, i] * X[:, j] for i in range(d) for j in range(i + 1, d)]
        cols += [X[:, i] ** 2 for i in range(d)]
    return np.column_stack(cols)


class QuadraticModel(_ResponseModel):
    """Classical response-surface model fitted by least squares.

    Montgomery (2013), *Design and Analysis of Experiments*, 8th ed., §10.2-10.6 (regression, prediction
    variance, PRESS) and ch. 11 (second-order response surfaces); Myers, Montgomery & Anderson-Cook,
    *Response Surface Methodology*.

    Parameters
    ----------
    transform : {"none", "log", "logit"} or Transform
    bounds : (float, float) or None
    degree : {1, 2}
        1: first-order model; 2 (default): full second-order model.
    coding : {"pm1", "unit"}
        Units of ``coef_``: ``"pm1"`` uses the classical coding ``x = 2u - 1`` (factor low/high at
        -1/+1); ``"unit"`` uses the [0, 1] inputs directly. Predictions do not depend on it.

    Attributes
    ----------
    coef_ : ndarray (p,)
        Coefficients in :func:`feature_names` order (latent scale, ``coding`` units).
    xtx_inv_ : ndarray (p, p)
    hat_ : ndarray (n,)
        Leverages ``h_ii``.
    s2_, noise_std_ : float
        Residual mean square and its root (latent units); ``df_resid_ = n - p``.
    """

    kind = "quadratic"

    def __init__(self, transform="none", bounds=None, degree=2, coding="pm1"):
        self.transform = transform
        self.bounds = bounds
        self.degree = degree
        self.coding = coding

    def _basis_size(self):
        return self.coef_.shape[0]

    def _features(self, X):
        return quadratic_features(2.0 * X - 1.0 if self.coding == "pm1" else X, self.degree)

    def feature_names(self, d=None, names=None):
        """Term names for ``d`` factors (defaults to the fitted number)."""
        return feature_names(self.X_train_.shape[1] if d is None else d, self.degree, names)

    def fit(self, X, y):
        """Least-squares fit to coded settings ``X`` and natural-unit responses ``y``."""
        if self.degree not in (1, 2) or self.coding not in ("pm1", "unit"):
            raise InputError(f"quadratic model: degree must be 1 or 2 and coding pm1 or unit, "
                             f"got {self.degree}, {self.coding}")
        X, y = _check_xy(X, y)
        self.transform_ = _as_transform(self.transform, self.bounds)
        z, self.at_bound_ = self.transform_.measured(y)  # values at a bound kept
        F = self._features(X)
        n, p = F.shape
        if n <= p:
            raise InputError(
                f"the {'second' if self.degree == 2 else 'first'}-order model in {X.shape[1]} factors has "
                f"{p} coefficients and needs at least {p + 1} runs (one more than its coefficients, to "
                f"estimate the noise); got {n}; add runs or use the Gaussian-process model")
        rank = np.linalg.matrix_rank(F)
        if rank < p:
            raise InputError(
                f"the runs cannot separate all {p} terms of the polynomial model (rank {rank}); each factor "
                "needs at least 3 levels for its square term; add centre or axial runs or use the "
                "Gaussian-process model")
        self.warning_ = ""
        self._fit_fixed(X, z)
        return self

    def _fit_fixed(self, X, z):
        self.X_train_, self.z_train_ = X, z
        F = self._features(X)
        Q, R = np.linalg.qr(F)
        self.coef_ = solve_triangular(R, Q.T @ z)
        Rinv = solve_triangular(R, np.eye(R.shape[0]))
        self.xtx_inv_ = Rinv @ Rinv.T
        self.hat_ = np.einsum("ij,ij->i", Q, Q)
        self.resid_ = z - F @ self.coef_
        self.df_resid_ = F.shape[0] - F.shape[1]
        self.s2_ = float(self.resid_ @ self.resid_) / self.df_resid_
        self.noise_std_ = float(np.sqrt(self.s2_))

    def _moments(self, X, return_std, noise):
        # variance s^2 x0'(X'X)^-1 x0 of the fitted mean, plus s^2 for a new observation
        # (Montgomery 2013, §10.5 and §10.6)
        F = self._features(X)
        mean = F @ self.coef_
        if not return_std:
            return mean, None
        var = self.s2_ * np.einsum("ij,jk,ik->i", F, self.xtx_inv_, F)
        if noise:
            var = var + self.s2_
        return mean, np.sqrt(var)

    def interval_quantile(self, level, loo=False):
        """Student-t quantile with the residual degrees of freedom (one fewer for leave-one-out)."""
        df = self.df_resid_ - 1 if loo and self.df_resid_ > 1 else self.df_resid_
        return float(stats.t.ppf(0.5 + level / 2.0, df))

    def loo(self):
        """Leave-one-out predictions from the hat matrix, exact for least squares.

        ``mu_i = y_i - e_i / (1 - h_ii)`` (PRESS residuals) and predictive variance
        ``s_(i)^2 / (1 - h_ii)`` with ``s_(i)^2 = ((n - p) s^2 - e_i^2 / (1 - h_ii)) / (n - p - 1)``
        (Montgomery 2013, §10.7, PRESS and R-student). With ``n = p + 1`` the full-data ``s^2`` is used.
        Runs with leverage 1 get NaN.

        Returns
        -------
        mean, sd : ndarray (n,), latent units
        """
        one_h = 1.0 - self.hat_
        ok = one_h > 1e-10
        e = self.resid_
        with np.errstate(divide="ignore", invalid="ignore"):
            press = np.where(ok, e / one_h, np.nan)
            if self.df_resid_ > 1:
                s2_i = (self.df_resid_ * self.s2_ - e * press) / (self.df_resid_ - 1)
            else:
                s2_i = np.full_like(e, self.s2_)
            sd = np.where(ok, np.sqrt(np.maximum(s2_i, 0.0) / one_h), np.nan)
        return self.z_train_ - press, sd


