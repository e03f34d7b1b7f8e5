"""The failure model: probability that the process works (gives usable product) at a setting."""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessClassifier
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy
from windowfinder.models.gp import CONSTANT_BOUNDS, LENGTH_SCALE_BOUNDS, SUBSET_RUNS
from windowfinder.models.sparse import kcenter


class FailureModel:
    """Probability that the process works (gives usable product) at a setting.

    Gaussian-process classification with the Laplace approximation (Rasmussen & Williams 2006, §3.4),
    scikit-learn ``GaussianProcessClassifier``, kernel ``C * Matern(2.5)`` with the same bounded length
    scales as :class:`GPModel`. When every run worked, or every run failed, there is no boundary to
    learn: the model returns the constant Laplace rule-of-succession estimate ``(k + 1) / (n + 2)``
    (k runs worked out of n). The Laplace approximation costs ``O(n^3)`` per Newton step (about 8 s
    for 500 runs on one core); with more than ``n_subset`` runs the classifier is fitted on that many
    runs chosen by farthest-point selection (:func:`windowfinder.models.sparse.kcenter`) and ``note_`` says so.

    Attributes
    ----------
    gpc_ : GaussianProcessClassifier or None
    constant_ : float or None
        The constant probability when the classifier is not used.
    note_ : str
        Empty, or how many runs the classifier was fitted on.
    """

    def __init__(self, random_state=0, n_restarts=2, n_subset=None):
        self.random_state = random_state
        self.n_restarts = n_restarts
        self.n_subset = n_subset

    def fit(self, X, works):
        X = _check_xy(X)
        works = np.asarray(works, dtype=bool).ravel()
        if works.shape[0] != X.shape[0]:
            raise InputError(f"{X.shape[0]} runs of factor settings but {works.shape[0]} run outcomes")
        self.d_ = X.shape[1]
        k, n = int(works.sum()), works.shape[0]
        self.gpc_, self.constant_, self.note_ = None, None, ""
        if k in (0, n):
            self.constant_ = (k + 1.0) / (n + 2.0)
            return self
        m = SUBSET_RUNS if self.n_subset is None else int(self.n_subset)
        if n > m:
            sub = kcenter(X, m)
            if works[sub].all() or not works[sub].any():  # keep one run of the missing outcome
                sub = np.append(sub, np.flatnonzero(works != works[sub[0]])[0])
            X, works = X[sub], works[sub]
            self.note_ = (f"failure model fitted on {len(sub)} space-filling runs of {n} (classification "
                          "cost grows with the cube of the run count)")
        kernel = ConstantKernel(1.0, CONSTANT_BOUNDS) * Matern(
            length_scale=np.full(self.d_, 0.5), length_scale_bounds=LENGTH_SCALE_BOUNDS, nu=2.5)
        gpc = GaussianProcessClassifier(kernel=kernel, n_restarts_optimizer=self.n_restarts,
                                        random_state=self.random_state)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            self.gpc_ = gpc.fit(X, works.astype(int))
        return self

    def predict_proba(self, X):
        """P(process works) at each row of ``X``, shape (n,)."""
        X = _check_xy(X, d=self.d_)
        if self.gpc_ is None:
            return np.full(X.shape[0], self.constant_)
        col = list(self.gpc_.classes_).index(1)
        return self.gpc_.predict_proba(X)[:, col]
