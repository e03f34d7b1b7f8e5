"""Probability that a run meets every limit, and where the models can be trusted.

For each limited response the fitted model gives a normal predictive distribution on its latent scale
(Student t for a least-squares polynomial, whose ``dof_`` says with how many degrees of freedom);
a limit ``lo <= Y <= hi`` in natural units becomes ``g(lo) <= Z <= g(hi)`` on that scale (``g`` is the
response's monotone transform), so the probability of meeting it is a difference of two normal
distribution functions. The joint probability multiplies these over the limited responses and, when a
failure model exists, by the probability that the process works at all.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree
from scipy.stats import norm
from scipy.stats import t as t_dist

from windowfinder.errors import InputError

CHUNK_ROWS = 20_000
# Default extrapolation threshold: this many times the median nearest-neighbour distance between the
# distinct runs (common practice, no source). For runs scattered uniformly at random, the distance from
# a random point to its nearest run has the same law as a run's distance to its nearest neighbour, so
# one median would flag half of the space between the runs; two medians flag only 0.5^(2^d) of it
# (6 % in 2-D) while points well outside the cloud of runs stay flagged.
EXTRAPOLATION_FACTOR = 2.0
# ... measured against the whole box, not only against the runs' cloud: never more than half of a
# factor's range (coded 0.5). A few runs scattered over many factors are far from one another, and two
# of their spacings reach past most of the box (5 random runs in 8 factors: 1.33 coded units, which
# flagged 0.4 % of the box, against 99 % farther than 0.5 from every run); a point with no run within
# half a factor's range is extrapolation whatever the runs' spacing (common practice, no source).
EXTRAPOLATION_MAX = 0.5


def extrapolation_threshold(runs) -> float:
    """Default extrapolation distance for distinct coded runs ``(n, d)``: ``min(2 * median spacing, 0.5)``.

    :data:`EXTRAPOLATION_FACTOR` times the median nearest-neighbour distance between the runs, at most
    :data:`EXTRAPOLATION_MAX`; 0 with fewer than two runs.
    """
    runs = np.atleast_2d(np.asarray(runs, dtype=float))
    if len(runs) < 2:
        return 0.0
    spacing = np.median(cKDTree(runs).query(runs, k=2)[0][:, 1])
    return float(min(EXTRAPOLATION_FACTOR * spacing, EXTRAPOLATION_MAX))


def limit_probability(mu, sd, lo=None, hi=None, dof=None) -> np.ndarray:
    """Probability that a normal (or location-scale Student-t) variable lies between two limits.

    Parameters
    ----------
    mu, sd : array_like
        Mean and standard deviation of ``Y ~ N(mu, sd^2)`` (broadcast together). ``sd == 0`` is a
        point mass: the result is the indicator ``lo <= mu <= hi``.
    lo, hi : float or array_like or None
        Lower and upper limit; ``None`` leaves that side open.
    dof : int or None
        With degrees of freedom, ``(Y - mu) / sd`` is Student t instead of standard normal: the
        predictive of a least-squares model, whose ``sd`` uses the estimated ``s^2`` (Montgomery 2013,
        §10.6). ``sd`` is then the t scale, not the standard deviation.

    Returns
    -------
    ndarray
        ``P(lo <= Y <= hi) = Phi((hi - mu)/sd) - Phi((lo - mu)/sd)``, clipped to [0, 1]. When both
        standardised limits lie above zero the difference of upper-tail functions is used instead, so
        that small probabilities far in a tail keep their precision.
    """
    mu, sd = np.broadcast_arrays(np.asarray(mu, dtype=float), np.asarray(sd, dtype=float))
    if np.any(sd < 0):
        raise ValueError("sd must be non-negative")
    lo = -np.inf if lo is None else np.asarray(lo, dtype=float)
    hi = np.inf if hi is None else np.asarray(hi, dtype=float)
    if np.any(np.asarray(lo) > np.asarray(hi)):
        raise ValueError("lower limit above upper limit")
    spread = sd > 0
    scale = np.where(spread, sd, 1.0)
    a = (lo - mu) / scale
    b = (hi - mu) / scale
    dist = norm if dof is None else t_dist(dof)
    p = np.where(a > 0, dist.sf(a) - dist.sf(b), dist.cdf(b) - dist.cdf(a))
    p = np.where(spread, p, ((mu >= lo) & (mu <= hi)).astype(float))
    return np.clip(p, 0.0, 1.0)


@dataclass
class FeasibilityMap:
    """Probabilities, classes and trust flags at a set of coded points.

    Attributes
    ----------
    X : ndarray (n, d)
        Coded settings.
    names : list of str
        One label per limit (the response name), column order of ``p_each``.
    p_each : ndarray (n, r)
        Probability of meeting each limit.
    p_works : ndarray (n,) or None
        Probability that the process works (failure model), or None without one.
    p_joint : ndarray (n,)
        Probability of meeting every limit (and working).
    klass : ndarray (n,) of str
        ``"in"`` (``p_joint >= confidence``), ``"out"`` (``p_joint <= 1 - confidence``) or ``"uncertain"``.
    untrusted : ndarray (n,) bool
        True where the models extrapolate or are too unsure against a limit.
    reasons : ndarray (n,) of str
        Why a point is untrusted (empty when trusted), e.g. ``"far from runs; unsure: yield"``.
    confidence : float
    distance : ndarray (n,)
        Euclidean distance in coded units to the nearest run.
    extrapolation_distance : float
        Threshold on ``distance`` above which a point counts as extrapolation.
    """

    X: np.ndarray
    names: list
    p_each: np.ndarray
    p_works: np.ndarray | None
    p_joint: np.ndarray
    klass: np.ndarray
    untrusted: np.ndarray
    reasons: np.ndarray
    confidence: float
    distance: np.ndarray
    extrapolation_distance: float

    @property
    def share_untrusted(self) -> float:
        """Fraction of the points flagged untrusted."""
        return float(np.mean(self.untrusted)) if len(self.untrusted) else 0.0

    def to_frame(self, factor_names=None) -> pd.DataFrame:
        """One row per point: coded settings, probabilities, class and trust flags."""
        d = self.X.shape[1]
        cols = list(factor_names) if factor_names is not None else [f"x{j + 1}" for j in range(d)]
        frame = pd.DataFrame(self.X, columns=cols)
        for k, name in enumerate(self.names):
            frame[f"p_{name}"] = self.p_each[:, k]
        if self.p_works is not None:
            frame["p_works"] = self.p_works
        frame["p_joint"] = self.p_joint
        frame["class"] = self.klass
        frame["untrusted"] = self.untrusted
        frame["reasons"] = self.reasons
        frame["distance"] = self.distance
        return frame

    def to_dict(self) -> dict:
        """JSON-safe summary: counts per class, share untrusted, thresholds."""
        counts = {k: int(np.sum(self.klass == k)) for k in ("in", "out", "uncertain")}
        return {
            "confidence": float(self.confidence),
            "names": list(self.names),
            "n_points": int(len(self.p_joint)),
            "counts": counts,
            "share_untrusted": self.share_untrusted,
            "extrapolation_distance": float(self.extrapolation_distance),
            "max_p_joint": float(np.max(self.p_joint)) if len(self.p_joint) else None,
        }


class Feasibility:
    """Probability that a run at coded settings meets every limit, with trust flags.

    Parameters
    ----------
    limits : list of (str, float or None, float or None)
        ``(response_name, lo, hi)`` in natural units; ``None`` leaves a side open.
    surrogates : object
        Has ``.models`` (dict name -> model with ``predict(X, return_std=True, noise=...)`` returning the
        latent mean and sd, and ``transform_.forward_limit(v)``) and ``.failure`` (model with
        ``predict_proba(X)`` -> P(works), or None).
    X_runs : array_like (n_runs, d)
        Coded settings of the runs the models were fitted to (for the trust flags).
    mean_only : bool, default False
        False: probability for a NEW run, from the predictive distribution including run-to-run noise
        (``predict(..., noise=True)``), because limits apply to every batch made. True: probability that
        the process MEAN meets the limits (model uncertainty only, ``noise=False``).
    extrapolation_distance : float or None
        A point farther than this (Euclidean, coded units) from every run is flagged as extrapolation.
        None: :data:`EXTRAPOLATION_FACTOR` (2) times the median nearest-neighbour distance between the
        distinct runs, i.e. a point counts as extrapolated when it is clearly farther from all data than
        the runs typically are from one another, but at most :data:`EXTRAPOLATION_MAX` (0.5, half a
        factor's range: the flag is measured against the box too). Fewer than two distinct runs give 0
        (everything off a run is flagged).
    spread_ratio : float, default 0.5
        A point is flagged "unsure" for a limit when the model's own sd (without run-to-run noise,
        latent scale) exceeds ``spread_ratio * s``, where ``s`` is the limit span ``g(hi) - g(lo)`` for a
        two-sided limit and, for a one-sided limit, ``max(|g(limit) - m|, sd of the fitted means at the
        runs)`` with ``m`` the median fitted mean at the runs: the model's doubt is then comparable to how
        far the response typically sits from the limit, so the class rests on the model rather than
        the data (common practice, no source).
    chunk_size : int, default 20000
        Rows predicted at a time, to keep memory bounded.

    Attributes
    ----------
    names_ : list of str
        One label per limit.
    limits_ : list of (str, float, float)
        Limits on the latent scale (``-inf`` / ``inf`` for open sides).
    extrapolation_distance_ : float
    spread_scale_ : ndarray (r,)
        The scale ``s`` of each limit used by the "unsure" flag.

    Notes
    -----
    The joint probability is the product of the per-limit probabilities (times P(works)). This assumes
    the responses' predictive errors are independent given the settings: the models are fitted
    separately, so no correlation between responses is estimated. Positively correlated responses
    make the true joint probability higher than the product; negatively correlated ones lower.
    """

    def __init__(self, limits, surrogates, X_runs, mean_only=False, extrapolation_distance=None,
                 spread_ratio=0.5, chunk_size=CHUNK_ROWS):
        self.limits = limits
        self.surrogates = surrogates
        self.X_runs = X_runs
        self.mean_only = mean_only
        self.extrapolation_distance = extrapolation_distance
        self.spread_ratio = spread_ratio
        self.chunk_size = chunk_size
        self._prepare()

    # ------------------------------------------------------------------ set-up
    def _prepare(self):
        models = self.surrogates.models
        if not self.limits:
            raise InputError("study.toml [[response]]: no limits to check; give at least one response "
                             "a min or max")
        self.limits_, self.names_ = [], []
        for name, lo, hi in self.limits:
            if name not in models:
                raise InputError(f"limit on '{name}': no fitted model for this response; fit it first "
                                 f"or drop the limit")
            if lo is None and hi is None:
                raise InputError(f"limit on '{name}': neither min nor max given; set at least one")
            if lo is not None and hi is not None and not lo < hi:
                raise InputError(f"limit on '{name}': min {lo} is not below max {hi}; swap or fix them")
            zlo, zhi = (self._latent(models[name], v) for v in (lo, hi))
            zlo = -np.inf if zlo is None else zlo
            zhi = np.inf if zhi is None else zhi
            if np.isnan(zlo) or np.isnan(zhi):
                raise InputError(f"limit on '{name}': a limit lies outside the range its transform "
                                 f"allows; move it inside the physical bounds")
            zlo, zhi = min(zlo, zhi), max(zlo, zhi)
            self.limits_.append((name, zlo, zhi))
            label = name if name not in self.names_ else f"{name}#{self.names_.count(name) + 1}"
            self.names_.append(label)
        self.failure_ = getattr(self.surrogates, "failure", None)
        X_runs = np.zeros((0, 0)) if self.X_runs is None else np.atleast_2d(np.asarray(self.X_runs, float))
        runs = np.unique(X_runs, axis=0) if X_runs.size else X_runs
        self.tree_ = cKDTree(runs) if len(runs) else None
        if self.extrapolation_distance is not None:
            self.extrapolation_distance_ = float(self.extrapolation_distance)
        else:
            self.extrapolation_distance_ = extrapolation_threshold(runs) if len(runs) else 0.0
        self.spread_scale_ = np.array([self._spread_scale(models[n], lo, hi, X_runs)
                                       for n, lo, hi in self.limits_])

    @staticmethod
    def _latent(model, value):
        if value is None:
            return None
        transform = getattr(model, "transform_", None)
        if transform is None or not hasattr(transform, "forward_limit"):
            return float(value)
        out = transform.forward_limit(value)
        return None if out is None else float(out)

    @staticmethod
    def _spread_scale(model, lo, hi, X_runs):
        if np.isfinite(lo) and np.isfinite(hi):
            return hi - lo
        if not X_runs.size:
            return np.inf
        fitted = np.asarray(model.predict(X_runs, return_std=True, noise=False)[0], float)
        limit = lo if np.isfinite(lo) else hi
        return max(abs(limit - np.median(fitted)), float(np.std(fitted)))

    # ------------------------------------------------------------- probabilities
    def _chunk(self, X, with_model_sd=False):
        """Per-limit probability (n, r), P(works) or None, and optionally the model sd (n, r)."""
        models = self.surrogates.models
        cache = {}
        p_each = np.empty((len(X), len(self.limits_)))
        sd_model = np.empty_like(p_each) if with_model_sd else None
        for k, (name, lo, hi) in enumerate(self.limits_):
            if name not in cache:
                mu, sd = models[name].predict(X, return_std=True, noise=not self.mean_only)
                sdm = None
                if with_model_sd:
                    sdm = sd if self.mean_only else models[name].predict(X, return_std=True, noise=False)[1]
                cache[name] = (np.asarray(mu, float), np.asarray(sd, float), sdm)
            mu, sd, sdm = cache[name]
            p_each[:, k] = limit_probability(mu, sd, lo, hi, getattr(models[name], "dof_", None))
            if with_model_sd:
                sd_model[:, k] = sdm
        p_works = None
        if self.failure_ is not None:
            p_works = np.clip(np.asarray(self.failure_.predict_proba(X), float).reshape(-1), 0.0, 1.0)
        return p_each, p_works, sd_model

    def _chunks(self, X, with_model_sd=False):
        X = np.atleast_2d(np.asarray(X, dtype=float))
        parts = [self._chunk(X[i:i + self.chunk_size], with_model_sd)
                 for i in range(0, len(X), self.chunk_size)] or [self._chunk(X, with_model_sd)]
        p_each = np.vstack([p[0] for p in parts])
        p_works = None if parts[0][1] is None else np.concatenate([p[1] for p in parts])
        sd_model = np.vstack([p[2] for p in parts]) if with_model_sd else None
        joint = np.prod(p_each, axis=1) * (1.0 if p_works is None else p_works)
        return X, p_each, p_works, joint, sd_model

    def probabilities(self, X):
        """Per-limit and joint probability at coded points.

        Parameters
        ----------
        X : array_like (n, d)

        Returns
        -------
        p_each : ndarray (n, r)
        p_joint : ndarray (n,)
            Product of ``p_each`` over the limits, times P(works) when a failure model exists.
        """
        _, p_each, _, joint, _ = self._chunks(X)
        return p_each, joint

    def joint(self, X) -> np.ndarray:
        """Joint probability only: a ``prob_fn`` for :func:`windowfinder.answers.window.find_window`."""
        return self._chunks(X)[3]

    def evaluate(self, X, confidence) -> FeasibilityMap:
        """Probabilities, classes and trust flags at coded points.

        Parameters
        ----------
        X : array_like (n, d)
        confidence : float in (0.5, 1)

        Returns
        -------
        FeasibilityMap
        """
        if not 0.5 < confidence < 1.0:
            raise InputError(f"confidence = {confidence}: must lie between 0.5 and 1 (e.g. 0.95)")
        X, p_each, p_works, joint, sd_model = self._chunks(X, with_model_sd=True)
        klass = np.full(len(X), "uncertain", dtype=object)
        klass[joint >= confidence] = "in"
        klass[joint <= 1.0 - confidence] = "out"
        if self.tree_ is not None:
            distance = self.tree_.query(X)[0]
        else:
            distance = np.full(len(X), np.inf)
        far = distance > self.extrapolation_distance_
        unsure = sd_model > self.spread_ratio * self.spread_scale_
        blank = np.full(len(X), "", dtype=object)
        unsure_txt = blank
        for k, name in enumerate(self.names_):
            unsure_txt = _append(unsure_txt, unsure[:, k], name, ", ")
        far_txt = np.where(far, "far from runs", blank)
        reasons = _append(far_txt, unsure_txt != "", "unsure: " + unsure_txt, "; ")
        return FeasibilityMap(
            X=X, names=list(self.names_), p_each=p_each, p_works=p_works, p_joint=joint,
            klass=klass.astype(str), untrusted=far | unsure.any(axis=1), reasons=reasons.astype(str),
            confidence=float(confidence), distance=distance,
            extrapolation_distance=self.extrapolation_distance_)


def _append(text, flag, item, sep):
    """Elementwise: where ``flag``, append ``item`` to ``text`` (object array), with ``sep`` if non-empty."""
    text = np.asarray(text, dtype=object)
    joined = np.where(text == "", item, text + sep + item)
    return np.where(flag, joined, text).astype(object)
