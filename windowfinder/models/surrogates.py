"""The models of one study: one per response, plus the failure model."""

from __future__ import annotations

import copy

import numpy as np

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy
from windowfinder.models.choice import MODELS, fit_response
from windowfinder.models.censored import fit_censored
from windowfinder.models.encoding import LevelEncoder
from windowfinder.models.failure import FailureModel
from windowfinder.models.transform import Transform


class Surrogates:
    """The models of one study: one per response, plus an optional failure model.

    Parameters
    ----------
    models : dict[str, GPModel | PolynomialModel]
    failure : FailureModel or None
    choices : dict[str, ModelChoice] or None
        How each response's model was chosen (:mod:`windowfinder.models.choice`).
    """

    def __init__(self, models, failure=None, choices=None):
        self.models = dict(models)
        self.failure = failure
        self.choices = dict(choices or {})

    @property
    def names(self):
        return list(self.models)

    def __getitem__(self, name):
        return self.models[name]

    def predict(self, X, noise=False):
        """``{response: (latent mean, latent sd)}``."""
        return {name: m.predict(X, return_std=True, noise=noise) for name, m in self.models.items()}

    def p_works(self, X):
        """P(process works); ones when no run failed."""
        X = _check_xy(X)
        return np.ones(X.shape[0]) if self.failure is None else self.failure.predict_proba(X)

    @classmethod
    def fit_arrays(cls, X, Y, transforms=None, works=None, kind="gp", n_restarts=5, seed=0, blocks=None,
                   censored=None, categorical=()):
        """Fit one model per response.

        Parameters
        ----------
        X : ndarray (n, d), coded
        Y : dict[str, ndarray (n,)]
            Natural units, NaN where not measured (those rows are dropped for that response).
        transforms : dict[str, (kind, bounds) | str | Transform]
        works : bool ndarray (n,) or None
            False for failed runs; they are left out of the response models and, when any run failed,
            feed a :class:`FailureModel`.
        kind : {"gp", "quadratic", "linear", "auto"} or dict[str, str]
            One setting for every response, or one per response (missing ones: ``"gp"``); ``"auto"``
            picks by leave-one-out (:func:`windowfinder.models.choice.fit_response`).
        blocks : array (n,) or None
            Block label of each run (day, lot, operator); with two or more blocks each GP response model
            carries a random offset per block (:func:`windowfinder.models.blocks.fit_blocked`).
        censored : dict[str, (bool ndarray (n,), float or ndarray, str or ndarray)] or None
            Per response: the runs whose value is only known to lie ``"above"`` or ``"below"`` a bound
            (failed runs that broke that limit, values below a detection limit), the bound and the side
            (one each, or one per censored run); they enter that response's model
            as censored values (:func:`windowfinder.models.censored.fit_censored`) and should be passed
            with ``works`` True, since the limit explains them.
        categorical : LevelEncoder, dict[int, levels] or tuple of int
            Categorical columns and their levels (a tuple: two-level factors). Every model (responses,
            censored refits, blocks, the failure model) sees them through one
            :class:`~windowfinder.models.encoding.LevelEncoder`: one-hot columns for the Gaussian
            processes and the failure model, indicator terms for polynomials
            (:func:`windowfinder.models.choice.fit_response`); the fitted models take coded settings.
        """
        enc = LevelEncoder.of(categorical)
        kinds = {name: (kind.get(name, "gp") if isinstance(kind, dict) else kind) for name in Y}
        for k in kinds.values():
            if k not in MODELS:
                raise InputError(f"model kind '{k}' is unknown; use one of {', '.join(MODELS)}")
        X = _check_xy(X)
        n = X.shape[0]
        blocks = None if blocks is None else np.asarray(blocks, object).ravel()
        ok = np.ones(n, bool) if works is None else np.asarray(works, bool).ravel()
        if ok.shape[0] != n:
            raise InputError(f"{n} runs of factor settings but {ok.shape[0]} run outcomes (works)")
        transforms = transforms or {}
        models, choices = {}, {}
        for name, y in Y.items():
            y = np.asarray(y, dtype=float).ravel()
            if y.shape[0] != n:
                raise InputError(f"response {name}: {y.shape[0]} values for {n} runs")
            rows = ok & np.isfinite(y)
            t = transforms.get(name, "none")
            t = t if isinstance(t, (str, Transform)) else Transform(*t)
            try:
                models[name], choices[name] = fit_response(X[rows], y[rows], kinds[name], t,
                                                           n_restarts=n_restarts, seed=seed,
                                                           blocks=None if blocks is None else blocks[rows],
                                                           categorical=enc)
                cens = (censored or {}).get(name)
                if cens is not None and np.asarray(cens[0], bool).any():   # refit the chosen model
                    mask = np.asarray(cens[0], bool)
                    models[name] = enc.refit(
                        models[name], lambda m, A, B: fit_censored(copy.copy(m), A, y[rows & ~mask], B,
                                                                   cens[1], cens[2]),
                        X[rows & ~mask], X[mask])
            except InputError as err:
                raise InputError(f"response {name}: {err}") from None
        failure = None
        if works is not None and not ok.all():
            failure = enc.wrap(FailureModel(random_state=seed).fit(enc.transform(X, "onehot"), ok), "onehot", X)
        return cls(models, failure, choices)
