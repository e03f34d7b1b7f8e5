"""Categorical factors at the model boundary: level indices in, unordered model columns out.

Inside the study a categorical factor with ``L`` levels is one coded column holding the level index
``i / (L - 1)``, so designs, snapping, windows and searches treat it like any factor on a step grid.
A model must not read that index as an ordered quantity. :class:`LevelEncoder` rewrites the coded
settings into the columns each kind of model sees, and :class:`EncodedModel` wraps a model fitted on
those columns so that everything above the models keeps passing coded settings of the study:

- ``"onehot"`` (Gaussian processes, the failure model): a factor with ``L > 2`` levels becomes ``L``
  indicator columns, one per level. An ARD Matern kernel on them gives each level its own length scale
  ``l_a``; between two settings at levels ``a != b`` the squared scaled distance gains
  ``1 / l_a^2 + 1 / l_b^2``, so at equal numeric settings the correlation is
  ``tau_ab = m(sqrt(1 / l_a^2 + 1 / l_b^2))`` with ``m`` the Matern correlation. With the squared
  exponential ``m(r) = exp(-r^2 / 2)`` this is exactly the multiplicative correlation
  ``tau_ab = exp(-(theta_a + theta_b))``, ``theta_a = 1 / (2 l_a^2)``, of McMillan, Sacks, Welch & Gao
  (1999), *Analysis of protein activity data by Gaussian stochastic process models*, J. Biopharm.
  Stat. 9(1), 145-160, one of the restricted forms in Qian, Wu & Wu (2008), *Gaussian process models
  for computer experiments with qualitative and quantitative factors*, Technometrics 50(3), 383-396,
  §2. With the Matern 5/2 kernel the models use, ``tau_ab`` is the same increasing function of
  ``theta_a + theta_b`` pushed through ``m`` instead of ``exp``, so it is not a product ``g(a) g(b)``;
  and since the level distance adds to the numeric one inside ``m``, the kernel is not the product of
  a numeric correlation and ``tau`` as in Qian, Wu & Wu, though it is positive definite (a Matern
  kernel on an embedding of the levels). A two-level factor keeps its one 0/1 column: its own length
  scale there is the exchangeable correlation ``tau = m(1 / l)`` (Qian, Wu & Wu 2008, §2), which the
  two one-hot columns would only parametrise twice.
- ``"treatment"`` (polynomials): ``L - 1`` indicator columns, one per level after the first, named
  ``factor[level]`` (treatment or dummy coding, Montgomery, Peck & Vining 2012, *Introduction to
  Linear Regression Analysis*, 5th ed., §8.1). The polynomial gives them no squares and no products
  with each other (both are zero or repeat a column), and keeps their products with numeric factors.

A coded value between level codes (a sweep along the column, a Sobol sample) belongs to level
``floor(u L)`` (clipped to ``L - 1``): every level code maps to its own level, and a uniform ``u``
picks each level with probability ``1 / L``.
"""

from __future__ import annotations

import numpy as np

from windowfinder.models.base import _check_xy

SCHEMES = ("onehot", "treatment")


def _levels_of(v):
    """Level names from a count or a sequence of names."""
    if isinstance(v, (int, np.integer)):
        return tuple(str(i) for i in range(int(v)))
    return tuple(str(x) for x in v)


class LevelEncoder:
    """Coded study settings -> model columns with categorical factors expanded into indicators.

    Parameters
    ----------
    levels : dict[int, sequence of str | int] or sequence of int
        Categorical column -> its level names (or level count). A plain sequence of columns means
        two-level factors (the form used before factors could have more levels).

    Notes
    -----
    Stateless apart from the level lists; ``transform`` needs no fit. Two-level factors pass
    unchanged, so :attr:`identity` holds for a study whose categorical factors all have two levels.
    """

    def __init__(self, levels=()):
        if not isinstance(levels, dict):
            levels = {int(j): 2 for j in levels}
        self.levels = {int(j): _levels_of(v) for j, v in sorted(levels.items())}

    @classmethod
    def of(cls, categorical):
        """``categorical`` itself when it is an encoder, else ``LevelEncoder(categorical)``."""
        return categorical if isinstance(categorical, cls) else cls(categorical or ())

    @property
    def identity(self) -> bool:
        """True when no factor has more than two levels (every scheme leaves the columns as they are)."""
        return all(len(v) <= 2 for v in self.levels.values())

    def _expanded(self, j, scheme):
        """Levels that get their own column of factor column ``j`` (None: the column itself)."""
        names = self.levels.get(j)
        if names is None or len(names) <= 2:
            return None
        return list(range(len(names))) if scheme == "onehot" else list(range(1, len(names)))

    def layout(self, d, scheme="onehot"):
        """``[(factor column, level index or None), ...]``, one entry per model column."""
        if scheme not in SCHEMES:
            raise ValueError(f"encoding scheme '{scheme}' is unknown; use one of {SCHEMES}")
        out = []
        for j in range(d):
            lv = self._expanded(j, scheme)
            out += [(j, None)] if lv is None else [(j, k) for k in lv]
        return out

    def level_index(self, u, j):
        """Level index of coded values ``u`` of categorical column ``j``: ``floor(u L)`` clipped."""
        L = len(self.levels[j])
        return np.clip(np.floor(np.asarray(u, float) * L + 1e-9), 0, L - 1).astype(int)

    def transform(self, X, scheme="onehot"):
        """Model columns of coded settings ``X`` (n, d) under ``scheme`` (see the module docstring)."""
        X = _check_xy(X)
        if self.identity:
            return X
        cols = []
        for j, k in self.layout(X.shape[1], scheme):
            if k is None:
                cols.append(X[:, j])
            else:
                cols.append((self.level_index(X[:, j], j) == k).astype(float))
        return np.column_stack(cols)

    def indicators(self, d, scheme="treatment"):
        """Model columns that hold 0/1 level indicators (two-level columns included)."""
        return tuple(c for c, (j, _) in enumerate(self.layout(d, scheme)) if j in self.levels)

    def groups(self, d, scheme="treatment"):
        """Model columns of each expanded factor, one tuple per factor with ``L > 2`` levels."""
        lay = self.layout(d, scheme)
        return tuple(tuple(c for c, (jj, k) in enumerate(lay) if jj == j and k is not None)
                     for j in self.levels if self._expanded(j, scheme) is not None)

    def names(self, factor_names, scheme="onehot"):
        """Model column names: a factor's own name, or ``factor[level]`` for an indicator column.

        Under ``"treatment"`` a two-level factor's column is named after its second level too
        (``gas[mix]``: 1 at ``mix``, 0 at the first level).
        """
        out = []
        for j, k in self.layout(len(factor_names), scheme):
            lv = self.levels.get(j)
            if k is None and lv is not None and scheme == "treatment":
                k = 1
            out.append(str(factor_names[j]) if k is None else f"{factor_names[j]}[{lv[k]}]")
        return out

    def wrap(self, model, scheme, X):
        """``model`` (fitted on ``transform(X, scheme)``) as seen from the study's coded settings;
        ``model`` itself when the encoder is the identity."""
        return model if self.identity else EncodedModel(model, self, scheme, X)

    def refit(self, model, fn, *Xs):
        """``fn(inner model, *encoded Xs)`` re-wrapped (censored refits and the like), the new model's
        settings being all rows of ``Xs`` in turn; ``fn(model, *Xs)`` for an unwrapped model."""
        if not isinstance(model, EncodedModel):
            return fn(model, *Xs)
        inner = fn(model.model, *[self.transform(X, model.scheme) for X in Xs])
        return EncodedModel(inner, self, model.scheme, np.vstack(Xs))


# Methods of a wrapped model that take no settings and can be used as they are.
_PASS_METHODS = frozenset({"loo", "interval_quantile", "term_table", "feature_names", "_basis_size"})


class EncodedModel:
    """A model fitted on encoded columns, used with the study's coded settings.

    Every method that takes settings encodes them first (``predict``, ``predict_interval``,
    ``predict_proba``, ``latent``, ``condition``, ``whitened``, ``cross_covariance``); fitted attributes
    (``z_train_``, ``transform_``, ``noise_std_``, ``length_scales_`` with one entry per model column,
    ...) are the wrapped model's, except ``X_train_``, which holds the coded settings of the study.

    Parameters
    ----------
    model : fitted response model or FailureModel
    encoder : LevelEncoder
    scheme : {"onehot", "treatment"}
    X : ndarray (n, d)
        The coded settings the model was fitted on.
    """

    def __init__(self, model, encoder, scheme, X):
        self.model, self.encoder, self.scheme = model, encoder, scheme
        self.X_train_ = np.asarray(X, float)

    def __getattr__(self, name):
        if name.startswith("__") or name in ("model", "encoder", "scheme", "X_train_"):
            raise AttributeError(name)
        value = getattr(self.model, name)
        if callable(value) and name not in _PASS_METHODS:
            raise AttributeError(f"{type(self.model).__name__}.{name} takes model columns; "
                                 "EncodedModel does not pass it through")
        return value

    @property
    def model_columns_(self) -> int:
        """Number of model columns (encoded), e.g. for naming polynomial terms."""
        return len(self.encoder.layout(self.X_train_.shape[1], self.scheme))

    def column_names(self, factor_names):
        """Names of the model columns (:meth:`LevelEncoder.names`)."""
        return self.encoder.names(factor_names, self.scheme)

    def _enc(self, X):
        return self.encoder.transform(_check_xy(X, d=self.X_train_.shape[1]), self.scheme)

    def predict(self, X, return_std=True, noise=False):
        return self.model.predict(self._enc(X), return_std=return_std, noise=noise)

    def predict_interval(self, X, level=0.95, noise=True):
        return self.model.predict_interval(self._enc(X), level=level, noise=noise)

    def predict_proba(self, X):
        return self.model.predict_proba(self._enc(X))

    def latent(self, X):
        return self.model.latent(self._enc(X))

    def condition(self, X_new, y_new_latent):
        X_new = _check_xy(X_new, d=self.X_train_.shape[1])
        return EncodedModel(self.model.condition(self._enc(X_new), y_new_latent), self.encoder,
                            self.scheme, np.vstack([self.X_train_, X_new]))

    def whitened(self, P):
        return self.model.whitened(self._enc(P))

    def cross_covariance(self, A, B, white_a=None):
        return self.model.cross_covariance(self._enc(A), self._enc(B), white_a)
