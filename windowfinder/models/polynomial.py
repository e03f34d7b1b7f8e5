"""Polynomial response models fitted by least squares: any hierarchical term list, and its reduction.

A term is a sorted tuple of factor indices: ``()`` the intercept, ``(i,)`` a linear term, ``(i, j)``
with ``i < j`` a two-factor interaction, ``(i, i)`` a square. Coefficients are in the classical coded
units ``x = 2u - 1`` (factor low/high at -1/+1). Prediction (new run) and mean intervals follow
least-squares theory with Student t on ``n - p`` degrees of freedom (Montgomery, *Design and Analysis of
Experiments*, 8th ed., 2013, §10.4-10.6; Draper & Smith, *Applied Regression Analysis*, 3rd ed., 1998).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats
from scipy.linalg import solve_triangular

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy, _ResponseModel
from windowfinder.models.transform import _as_transform

CRITERIA = ("aicc", "bic")


def full_terms(d, degree=2, categorical=(), groups=()):
    """Terms of the full polynomial: intercept, linear, then (degree 2) interactions row by row and squares.

    ``categorical``: columns holding a level indicator (0/1); they get no square, which would repeat
    the indicator itself (dummy-variable regression, Montgomery, Peck & Vining 2012, *Introduction to
    Linear Regression Analysis*, 5th ed., §8.1); their interactions with the other factors stay.
    ``groups``: tuples of indicator columns of one factor with more than two levels (treatment coding);
    products within a group are zero at every run and are left out.
    """
    same = {(i, j) for g in groups for i in g for j in g if i < j}
    terms = [(), *[(i,) for i in range(d)]]
    if degree == 2:
        terms += [(i, j) for i in range(d) for j in range(i + 1, d) if (i, j) not in same]
        terms += [(i, i) for i in range(d) if i not in set(categorical)]
    return terms


def term_name(term, names):
    """``1``, ``x1``, ``x1*x2`` or ``x1^2`` (with the given factor names)."""
    if not term:
        return "1"
    if len(term) == 2 and term[0] == term[1]:
        return f"{names[term[0]]}^2"
    return "*".join(names[i] for i in term)


def term_matrix(X, terms):
    """Model matrix: one column per term, the product of the listed factor columns."""
    X = np.asarray(X, dtype=float)
    return np.column_stack([np.prod(X[:, list(t)], axis=1) if t else np.ones(X.shape[0]) for t in terms])


def parents(term):
    """Lower-order terms a hierarchical model must keep while ``term`` stays."""
    if not term:
        return set()
    if len(term) == 1:
        return {()}
    return {(term[0],), (term[1],)}


def information_criterion(rss, n, p, criterion="aicc"):
    """AICc or BIC of a Gaussian linear model with ``p`` coefficients and residual sum of squares ``rss``.

    ``k = p + 1`` parameters (the coefficients and the noise variance); ``AIC = n ln(RSS / n) + 2k``,
    ``AICc = AIC + 2k(k + 1) / (n - k - 1)`` (Hurvich & Tsai 1989, Biometrika 76, 297-307), infinite
    when ``n <= k + 1``; ``BIC = n ln(RSS / n) + k ln n`` (Schwarz 1978).
    """
    k = p + 1
    fit = n * math.log(max(rss, 1e-300) / n)
    if criterion == "bic":
        return fit + k * math.log(n)
    if n - k - 1 <= 0:
        return math.inf
    return fit + 2 * k + 2 * k * (k + 1) / (n - k - 1)


def backward_eliminate(X, z, terms, criterion="aicc"):
    """Hierarchical backward elimination of polynomial terms by an information criterion.

    At each step every term that no remaining term needs as a parent (:func:`parents`; the intercept
    always stays) is tried for removal; the removal that lowers the criterion most is made, until none
    lowers it (Montgomery 2013, §10.2 on variable selection; criterion as
    :func:`information_criterion`). Residual sums of squares of the sub-models come from the Gram matrix
    of the centred data (the intercept is always in), so each trial costs a p x p Cholesky solve.

    Parameters
    ----------
    X : ndarray (n, d), coded ±1 units
    z : ndarray (n,), latent response
    terms : list of tuple
    criterion : {"aicc", "bic"}

    Returns
    -------
    list of tuple
        The kept terms, in the order of ``terms``.
    """
    if criterion not in CRITERIA:
        raise InputError(f"term selection criterion '{criterion}' is unknown; use aicc or bic")
    n = X.shape[0]
    F = term_matrix(X, terms)
    zc = z - z.mean()
    G, c, zz = F.T @ F, F.T @ zc, float(zc @ zc)
    index = {t: k for k, t in enumerate(terms)}
    current = list(terms)

    def score(ts):
        idx = [index[t] for t in ts]
        Gs = G[np.ix_(idx, idx)]
        try:
            L = np.linalg.cholesky(Gs)
        except np.linalg.LinAlgError:
            return math.inf
        if np.min(np.diag(L)) ** 2 < 1e-10 * np.max(np.diag(Gs)):   # numerically rank deficient
            return math.inf
        w = solve_triangular(L, c[idx], lower=True)
        return information_criterion(max(zz - float(w @ w), 0.0), n, len(ts), criterion)

    best = score(current)
    while True:
        needed = set().union(*(parents(t) for t in current))
        trials = [(score([u for u in current if u != t]), k, t)
                  for k, t in enumerate(current) if t and t not in needed]
        if not trials:
            return current
        value, _, drop = min(trials)
        if not value < best:
            return current
        best = value
        current = [u for u in current if u != drop]


class PolynomialModel(_ResponseModel):
    """Polynomial response model with a given term list, fitted by least squares.

    Montgomery (2013), *Design and Analysis of Experiments*, 8th ed., §10.2-10.7 (least squares,
    coefficient tests, mean and prediction intervals, PRESS) and ch. 11 (response surfaces).

    Parameters
    ----------
    terms : list of tuple or None
        Terms as described in the module docstring; None: the full polynomial of ``degree``.
    transform : {"none", "log", "logit"} or Transform
    bounds : (float, float) or None
    degree : {1, 2}
        Order of the full polynomial used when ``terms`` is None.
    coding : {"pm1", "unit"}
        Units of ``coef_``: ``"pm1"`` uses ``x = 2u - 1``; ``"unit"`` the [0, 1] inputs directly.
        Predictions of the full polynomial do not depend on it (a reduced one does, since dropping a term
        means something different in the two codings).
    categorical : tuple of int
        Indicator (dummy) columns of categorical factors: 0/1 whatever ``coding`` says, and without a
        square term (:func:`full_terms`); a two-level factor is 1 at its second level.
    groups : tuple of tuple of int
        Indicator columns of one factor with more than two levels (treatment coding,
        :class:`windowfinder.models.encoding.LevelEncoder`): no products among them.

    Attributes
    ----------
    terms_ : list of tuple
    coef_ : ndarray (p,)
        Coefficients in ``terms_`` order (latent scale, ``coding`` units).
    xtx_inv_ : ndarray (p, p)
    hat_ : ndarray (n,)
        Leverages ``h_ii``.
    s2_, noise_std_ : float
        Residual mean square and its root (latent units).
    df_resid_, dof_ : int
        ``n - p``; ``dof_`` tells feasibility to use a Student-t predictive with that many degrees of
        freedom.
    """

    def __init__(self, terms=None, transform="none", bounds=None, degree=2, coding="pm1", categorical=(),
                 groups=()):
        self.terms = terms
        self.transform = transform
        self.bounds = bounds
        self.degree = degree
        self.coding = coding
        self.categorical = categorical
        self.groups = groups

    @property
    def kind(self):
        """``"linear"`` or ``"quadratic"`` for a full polynomial, else ``"reduced"``."""
        terms = getattr(self, "terms_", None)
        if terms is None:
            return "quadratic" if self.terms is None and self.degree == 2 else "polynomial"
        d = self.X_train_.shape[1]
        for name, deg in (("linear", 1), ("quadratic", 2)):
            if list(terms) == full_terms(d, deg, self.categorical, self.groups):
                return name
        return "reduced"

    def _basis_size(self):
        return self.coef_.shape[0]

    def _coded(self, X):
        if self.coding != "pm1":
            return X
        C = 2.0 * X - 1.0
        cat = list(self.categorical)
        if cat:   # indicator columns stay 0/1 (dummy coding)
            C[:, cat] = X[:, cat]
        return C

    def _features(self, X):
        return term_matrix(self._coded(X), self.terms_)

    def feature_names(self, d=None, names=None):
        """Names of the fitted terms (``x1, x2, ...`` unless ``names`` are given)."""
        d = self.X_train_.shape[1] if d is None else d
        names = [f"x{i + 1}" for i in range(d)] if names is None else list(names)
        return [term_name(t, names) for t in self.terms_]

    def _order_name(self):
        return "polynomial" if self.terms is not None else (
            "second-order model" if self.degree == 2 else "first-order model")

    def fit(self, X, y):
        """Least-squares fit to coded settings ``X`` and natural-unit responses ``y``."""
        if self.degree not in (1, 2) or self.coding not in ("pm1", "unit"):
            raise InputError(f"polynomial model: degree must be 1 or 2 and coding pm1 or unit, "
                             f"got {self.degree}, {self.coding}")
        X, y = _check_xy(X, y)
        terms = (full_terms(X.shape[1], self.degree, self.categorical, self.groups) if self.terms is None
                 else [tuple(t) for t in self.terms])
        if () not in terms or any(max(t, default=-1) >= X.shape[1] for t in terms):
            raise InputError("polynomial model: the terms must include the intercept () and name only "
                             f"factors 0..{X.shape[1] - 1}")
        self.terms_ = terms
        self.transform_ = _as_transform(self.transform, self.bounds)
        z, self.at_bound_ = self.transform_.measured(y)  # values at a bound kept
        F = self._features(X)
        n, p = F.shape
        if n <= p:
            raise InputError(
                f"the {self._order_name()} in {X.shape[1]} factors has {p} coefficients and needs at "
                f"least {p + 1} runs (one more than its coefficients, to estimate the noise); got {n}; "
                "add runs or use the Gaussian-process model")
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
        self.df_resid_ = self.dof_ = F.shape[0] - F.shape[1]
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
        return float(stats.t.ppf(0.5 + level / 2.0, self.loo_dof if loo else self.df_resid_))

    @property
    def loo_dof(self):
        """Degrees of freedom of a deleted residual's t distribution, ``n - p - 1`` (``n - p`` when 1)."""
        return self.df_resid_ - 1 if self.df_resid_ > 1 else self.df_resid_

    def loo(self):
        """Leave-one-out predictions from the hat matrix, exact for least squares.

        ``mu_i = y_i - e_i / (1 - h_ii)`` (PRESS residuals) and predictive variance
        ``s_(i)^2 / (1 - h_ii)`` with ``s_(i)^2 = ((n - p) s^2 - e_i^2 / (1 - h_ii)) / (n - p - 1)``
        (Montgomery 2013, §10.7, PRESS and R-student); ``(y_i - mu_i) / sd_i`` is Student t with
        ``n - p - 1`` degrees of freedom (Cook & Weisberg 1982, *Residuals and Influence in Regression*,
        §2.2). With ``n = p + 1`` the full-data ``s^2`` is used. Runs with leverage 1 get NaN.

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

    def term_table(self, names=None) -> pd.DataFrame:
        """Coefficient, standard error, t and two-sided p-value per term (latent scale, coded units).

        ``se_j = sqrt(s^2 [(X'X)^-1]_jj)``, ``t_j = b_j / se_j``, ``p_j = 2 P(T > |t_j|)`` with
        ``T ~ t(n - p)`` (Montgomery 2013, §10.4.1).
        """
        se = np.sqrt(self.s2_ * np.diag(self.xtx_inv_))
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(se > 0, self.coef_ / se, np.nan)
        p = 2.0 * stats.t.sf(np.abs(t), self.df_resid_)
        return pd.DataFrame({"term": self.feature_names(names=names), "coefficient": self.coef_,
                             "std_error": se, "t": t, "p_value": p})
