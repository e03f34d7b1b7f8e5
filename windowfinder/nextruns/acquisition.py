"""Scores of candidate settings for one state of the models: the window criteria (expected window growth,
misclassification probability of the window's edge) and the trade-off criterion (probability-weighted
expected hypervolume improvement), with the kriging-believer update for batches.

:class:`Acquisition` holds one state of the response models; :func:`windowfinder.nextruns.suggestions.suggest`
scores candidates with it and conditions it after each pick. The criteria and their sources are described
in :mod:`windowfinder.nextruns.suggestions`.
"""

from __future__ import annotations

import copy

import numpy as np

from windowfinder.answers.feasibility import Feasibility, limit_probability
from windowfinder.answers.hypervolume import expected_improvement, hypervolume
from windowfinder.errors import InputError
from windowfinder.models.surrogates import Surrogates

N_SAMPLES = 128              # posterior draws per criterion (common random numbers)
N_SAMPLES_MANY_GOALS = 32    # three or more goals: pymoo hypervolume per draw


class Acquisition:
    """Window and trade-off scores of candidate settings for one state of the models.

    Parameters
    ----------
    surrogates : Surrogates
    limits : list of (name, lo, hi)
        Natural units, ``None`` for an open side.
    goals : list of (name, sense, target)
    X_runs : ndarray (n, d)
        Coded settings of the completed runs.
    confidence : float
    seed : int
        Seeds the common random numbers.

    Attributes
    ----------
    models : dict
        The response models in use (conditioned ones after :meth:`believe`).
    front_, ref_ : ndarray
        Current front (minimisation form) and reference point; ``scale_`` is the front's hypervolume
        (or the reference box volume when the front is empty).
    """

    def __init__(self, surrogates, limits, goals, X_runs, confidence=0.95, seed=0):
        self.limits, self.goals = list(limits or []), list(goals or [])
        self.confidence = confidence
        self.failure = surrogates.failure
        used = [lim[0] for lim in self.limits] + [g[0] for g in self.goals]
        missing = [n for n in used if n not in surrogates.models]
        if missing:
            raise InputError(f"limit or goal on '{missing[0]}': no fitted model for this response; fit it first")
        self.models = {n: surrogates.models[n] for n in dict.fromkeys(used)}
        self.X_runs = np.asarray(X_runs, dtype=float)
        self.gain_ = self.explore_ = None
        self._set_feasibility()
        names = list(self.models)
        s_win, s_goal = np.random.SeedSequence(seed).spawn(2)
        self.eps_ = dict(zip(names, np.random.default_rng(s_win).standard_normal((len(names), N_SAMPLES))))
        m = len(self.goals)
        n_goal = N_SAMPLES if m < 3 else N_SAMPLES_MANY_GOALS
        self.eps_goal_ = np.random.default_rng(s_goal).standard_normal((n_goal, m))
        self.front_, self.ref_, self.scale_ = np.empty((0, m)), None, 1.0
        if m:   # without completed runs, the reference comes from the models' training settings
            X_data = self.X_runs if len(self.X_runs) else next(iter(self.models.values())).X_train_
            F = self.objectives(X_data)[:, 0, :]
            nadir, ideal = F.max(axis=0), F.min(axis=0)
            self.ref_ = nadir + 0.1 * np.where(nadir > ideal, nadir - ideal, np.maximum(np.abs(nadir), 1.0))
            self.front_ = F[self.p_joint(X_data) >= confidence] if len(self.X_runs) else self.front_
            self.scale_ = hypervolume(self.front_, self.ref_) or float(np.prod(self.ref_ - ideal))

    def _set_feasibility(self):
        self.feas_ = (Feasibility(self.limits, Surrogates(self.models, self.failure), self.X_runs)
                      if self.limits else None)

    def p_works(self, X):
        return np.ones(len(X)) if self.failure is None else self.failure.predict_proba(X)

    def p_joint(self, X):
        """Probability that a new run meets every limit and works (noise included)."""
        return self.p_works(X) if self.feas_ is None else self.feas_.probabilities(X)[1]

    def objectives(self, X, eps=None):
        """Goals in minimisation form, (n, S, m): medians (S = 1) or draws ``mu + sd * eps``."""
        cols = []
        for k, (name, sense, target) in enumerate(self.goals):
            model = self.models[name]
            if eps is None:
                z = np.asarray(model.predict(X, return_std=False))[:, None]
            else:
                mu, sd = model.predict(X, return_std=True, noise=False)
                z = mu[:, None] + sd[:, None] * eps[:, k]
            y = model.transform_.inverse(z)
            cols.append(-y if sense == "maximize" else np.abs(y - target) if sense == "target" else y)
        return np.stack(cols, axis=-1)

    def window_gain(self, X, explore=False):
        """Expected window growth from one run at each ``X`` (:mod:`.windowgain`); ``explore``: the
        confirmed volume's growth anywhere instead of the current window's."""
        gain = self.explore_ if explore else self.gain_
        return gain(self.models, self.feas_.limits_, self.p_works, X)

    def window(self, X):
        """Misclassification probability ``min(pi, 1 - pi)`` and ``pi`` = P(x truly in the window)."""
        log_in = np.log(np.maximum(self.p_works(X), 1e-300))[:, None]
        for name, lo, hi in self.feas_.limits_:
            model = self.models[name]
            mu, sd = model.predict(X, return_std=True, noise=False)
            f = mu[:, None] + sd[:, None] * self.eps_[name]
            p = limit_probability(f, getattr(model, "noise_std_", 0.0), lo, hi)
            log_in = log_in + np.log(np.maximum(p, 1e-300))
        pi = np.mean(log_in >= np.log(self.confidence), axis=1)
        return np.minimum(pi, 1.0 - pi), pi

    def tradeoff(self, X):
        """Expected hypervolume improvement times the probability that ``X`` belongs to the window.

        A setting joins the front only when a new run there meets every limit with probability at
        least the confidence, so the improvement is weighted by ``pi`` (:meth:`window`), the posterior
        probability that this holds for the true process means, not by the noisy probability that one
        new run meets the limits (:meth:`p_joint`). The latter stays below the confidence at a setting
        whose mean sits close to a limit however often it is repeated (run-to-run noise does not
        shrink), and it made such a setting, well measured and just outside the window, the best
        trade-off pick again and again. Without limits ``pi`` is P(works).
        """
        gain = expected_improvement(self.objectives(X, self.eps_goal_), self.front_, self.ref_)
        return gain * (self.window(X)[1] if self.limits else self.p_works(X))

    def believe(self, x):
        """Kriging believer: a new state with every model conditioned on its predicted mean at ``x``."""
        x = np.asarray(x, dtype=float).reshape(1, -1)
        new = copy.copy(self)
        new.models = {n: m.condition(x, m.predict(x, return_std=False)) for n, m in self.models.items()}
        new.X_runs = np.vstack([self.X_runs.reshape(-1, x.shape[1]), x])
        new._set_feasibility()
        if self.goals and self.p_joint(x)[0] >= self.confidence:
            new.front_ = np.vstack([self.front_, self.objectives(x)[:, 0, :]])
        return new
