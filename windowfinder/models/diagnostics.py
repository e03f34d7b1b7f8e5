"""Leave-one-out checks of a fitted response model, with warnings in plain words.

Each run is predicted from all the others (closed form, see ``model.loo()``); from these predictions
come Q^2 (share of the variation the model predicts for runs it has not seen), the root-mean-square
error and the coverage of the 95% intervals. A Gaussian-process model also reports its length scales:
one at a bound means the runs cannot pin the model down along that factor.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from windowfinder.errors import InputError
from windowfinder.models.gp import LENGTH_SCALE_BOUNDS, NOISE_BOUNDS

# Thresholds for the warnings (common practice, no source).
Q2_MIN = 0.5
COVERAGE_MIN = 0.80  # of the 95% intervals; coverage cannot exceed 1, so only "too narrow" is testable
COVERAGE_MIN_RUNS = 10
BOUND_SLACK = 1.01  # a hyperparameter within 1% of its bound counts as "at the bound"
# Spread of the leave-one-out errors against the model's own predictive sd: with calibrated predictions
# the standardised errors are standard normal, so their sum of squares is chi-square with n degrees of
# freedom; outside its central 99 % the model's probabilities are flagged as too sure or too timid
# (LOO errors are slightly correlated, so the band is approximate; level: common practice, no source).
SPREAD_LEVEL = 0.01
SPREAD_MIN_RUNS = 10


def _json_number(v):
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass
class ModelDiagnostics:
    """Leave-one-out (LOO) checks of one response model.

    Attributes
    ----------
    response : str
    model : {"gp", "quadratic", "linear", "reduced"}
    n : int
        Runs the model was fitted on.
    loo_q2 : float
        ``1 - PRESS / SS_tot`` with ``PRESS = sum (z_i - zhat_(i))^2`` (Allen 1974, PRESS; Montgomery
        2013, §10.7) on the model's own scale ``z = g(y)`` (the latent scale of a log or logit response,
        where the model is fitted and Gaussian; natural units without a transform). On the natural
        scale a few large values of a log response dominate both sums, and a model that predicts the
        log well could score near zero there. NaN when every measured value is equal.
    loo_rmse : float
        ``sqrt(PRESS / n)`` on the model's scale (equal to ``loo_rmse_natural`` without a transform).
    loo_rmse_natural : float
        The same in natural units: inverse-transformed LOO medians against the measured values.
    coverage95 : float
        Share of runs whose measured value lies inside its 95% LOO interval (noise included); the same
        on either scale, the transform being monotone.
    loo_spread : float
        Root mean square of the standardised LOO errors (each error over its own predictive sd, a
        Student-t error first mapped to the normal score with the same tail probability): about 1
        when the model's stated uncertainty is right, above 1 when it is too sure, below 1 when too
        timid. NaN with fewer than two predictable runs.
    scale : str
        The model's scale: ``"natural"`` (no transform), ``"log"``, ``"logit"`` or ``"warped"`` (a fitted
        warp, :mod:`windowfinder.models.warping`).
    length_scales : dict[str, float]
        Gaussian-process length scale per factor in factor units (coded length * (high - low));
        empty for the quadratic model.
    noise_sd : float
        Run-to-run noise sd in natural units; for a transformed response a delta-method approximation at
        the mean latent response.
    block_offsets : dict[str, float]
        Fitted offset of each block (day, lot, operator) in natural units (delta method at the mean
        latent response for a transformed response); empty without a block column
        (:mod:`windowfinder.models.blocks`).
    block_sd : float
        Standard deviation of the block offsets (natural units); NaN without blocks.
    warnings : list[str]
    measured, loo_median, loo_low, loo_high : list[float]
        Per-run measured value and LOO median and 95% interval (natural units), for plots.
    """

    response: str
    model: str
    n: int
    loo_q2: float
    loo_rmse: float
    coverage95: float
    loo_rmse_natural: float = float("nan")
    loo_spread: float = float("nan")
    scale: str = "natural"
    length_scales: dict = field(default_factory=dict)
    noise_sd: float = float("nan")
    block_offsets: dict = field(default_factory=dict)
    block_sd: float = float("nan")
    warnings: list = field(default_factory=list)
    measured: list = field(default_factory=list)
    loo_median: list = field(default_factory=list)
    loo_low: list = field(default_factory=list)
    loo_high: list = field(default_factory=list)
    choice: dict = field(default_factory=dict)
    terms: list = field(default_factory=list)

    def to_dict(self):
        """JSON-safe dict (NaN and infinities become None)."""
        out = asdict(self)
        for key, value in out.items():
            if key == "choice":
                continue
            if key == "terms":
                out[key] = [{k: v if k == "term" else _json_number(v) for k, v in row.items()}
                            for row in value]
            elif isinstance(value, float):
                out[key] = _json_number(value)
            elif isinstance(value, list) and key != "warnings":
                out[key] = [_json_number(v) for v in value]
            elif isinstance(value, dict):
                out[key] = {k: _json_number(v) for k, v in value.items()}
        return out

    def to_frame(self):
        """One-row summary table (length scales as ``length_scale:<factor>`` columns)."""
        row = {k: getattr(self, k) for k in ("response", "model", "n", "scale", "loo_q2", "loo_rmse",
                                              "loo_rmse_natural", "loo_spread", "coverage95", "noise_sd")}
        row.update({f"length_scale:{k}": v for k, v in self.length_scales.items()})
        row["warnings"] = "; ".join(self.warnings)
        return pd.DataFrame([row])

    def loo_frame(self):
        """Per-run table: measured value, LOO median, 95% interval and whether the value is inside."""
        df = pd.DataFrame({"measured": self.measured, "loo_median": self.loo_median,
                           "loo_low": self.loo_low, "loo_high": self.loo_high})
        df["inside"] = (df["loo_low"] <= df["measured"]) & (df["measured"] <= df["loo_high"])
        return df


def _effect(model, j: int, n_base: int = 16, levels: int = 9) -> float:
    """Largest swing of the model's latent mean along factor ``j`` (others held at Sobol base points).

    A long Matern length scale alone does not make a factor inactive when the kernel also carries a
    polynomial trend (and the length-scale prior keeps it from its upper bound), so activity is judged
    from the prediction itself.
    """
    from scipy.stats import qmc

    d = model.X_train_.shape[1]
    base = qmc.Sobol(d, scramble=True, seed=0).random(n_base)
    X = np.repeat(base, levels, axis=0)
    X[:, j] = np.tile(np.linspace(0.0, 1.0, levels), n_base)
    mean = model.predict(X, return_std=False)
    mean = np.asarray(mean[0] if isinstance(mean, tuple) else mean, dtype=float)
    return float(np.max(np.ptp(mean.reshape(n_base, levels), axis=1)))


def _inactive(model, j: int) -> bool:
    effects = [_effect(model, k) for k in range(model.X_train_.shape[1])]
    return effects[j] <= max(model.noise_std_, 0.05 * max(effects), 1e-12 * model.y_scale_)


def _length_scale_checks(model, response, factor_names, factor_spans):
    """Length scales in factor units and plain-words warnings for those at a bound.

    A model on one-hot columns (:class:`~windowfinder.models.encoding.EncodedModel`) has one length
    scale per level of a factor with more than two levels, reported as ``factor[level]`` (an indicator
    has no unit); the activity check is per factor.
    """
    coded = np.asarray(getattr(model, "length_scales_", []), dtype=float)
    if model.kind != "gp" or coded.size == 0:
        return {}, []
    owner = list(range(len(factor_names)))
    labels, spans = list(factor_names), list(factor_spans)
    if hasattr(model, "column_names") and len(factor_names) == model.X_train_.shape[1]:
        layout = model.encoder.layout(len(factor_names), model.scheme)
        owner = [j for j, _ in layout]
        labels = model.column_names(factor_names)
        spans = [factor_spans[j] if k is None else 1.0 for j, k in layout] if len(factor_spans) == len(
            factor_names) else []
    if len(labels) != coded.size or len(spans) != coded.size:
        raise InputError(f"response {response}: the model has {coded.size} factors but "
                         f"{len(factor_names)} names and {len(factor_spans)} spans were given")
    scales = {str(f): float(c * s) for f, c, s in zip(labels, coded, spans)}
    notes = []
    low = LENGTH_SCALE_BOUNDS[0]
    at_low = set()
    for f, c, j in zip(labels, coded, owner):
        if c <= low * BOUND_SLACK:
            at_low.add(j)
            notes.append(f"response changes faster along {f} than the runs can resolve (length scale at "
                         f"its lower bound); add runs along {f} or narrow its range")
    for j in dict.fromkeys(owner):
        if j not in at_low and _inactive(model, j):
            notes.append(f"factor {factor_names[j]} looks inactive (across its range the model's "
                         "prediction moves less than the run-to-run scatter or 5 % of the strongest "
                         "factor's effect)")
    noise_var = (model.noise_std_ / model.y_scale_) ** 2
    if noise_var <= NOISE_BOUNDS[0] * BOUND_SLACK ** 2:
        notes.append("model passes through every run (noise estimated near zero); replicate runs would "
                     "show the real scatter")
    return scales, notes


def _press_q2(v, v_loo):
    """Q^2 and RMSE of leave-one-out predictions ``v_loo`` of values ``v`` (Allen 1974, PRESS)."""
    # sums of squares on v / max|v|, so values near 1e-300 (or 1e+300) neither underflow nor overflow
    unit = float(np.max(np.abs(v))) if v.size else 0.0
    unit = unit if np.isfinite(unit) and unit > 0 else 1.0
    resid = (v - v_loo) / unit
    press = float(resid @ resid)
    ss_tot = float(np.sum((v / unit - np.mean(v / unit)) ** 2)) if v.size else 0.0
    # a constant response has no variation to explain: Q^2 is undefined (float noise of a constant
    # must not pass for variation, hence the relative tolerance)
    q2 = 1.0 - press / ss_tot if ss_tot > max(v.size, 1) * 1e-24 else float("nan")
    return q2, unit * math.sqrt(press / max(v.size, 1))


def loo_spread(model, mu, sd, ok):
    """Standardised LOO errors as normal scores, their root mean square and the chi-square band.

    Returns ``(spread, low, high)``: ``sqrt(mean u^2)`` and the bounds of ``sqrt(chi2_n / n)`` at
    ``SPREAD_LEVEL / 2`` and ``1 - SPREAD_LEVEL / 2`` (scipy.stats.chi2), ``n`` the predictable runs.
    """
    z = np.asarray(model.z_train_, float)[ok]
    r = (z - np.asarray(mu, float)[ok]) / np.asarray(sd, float)[ok]
    dof = getattr(model, "loo_dof", None)
    if dof is not None:   # Student t error -> the normal score with the same tail probability
        r = stats.norm.isf(stats.t.sf(r, dof))
    n = r.size
    if n < 2:
        return float("nan"), float("nan"), float("nan")
    lo, hi = stats.chi2.ppf([SPREAD_LEVEL / 2, 1 - SPREAD_LEVEL / 2], n) / n
    return float(np.sqrt(np.mean(r ** 2))), float(np.sqrt(lo)), float(np.sqrt(hi))


def diagnose(model, y=None, response_name="response", factor_names=(), factor_spans=(), choice=None,
             term_names=None):
    """Leave-one-out diagnostics of a fitted :class:`~windowfinder.models.gp.GPModel` or ``QuadraticModel``.

    Parameters
    ----------
    model : fitted GPModel or QuadraticModel
    y : array (n,) or None
        Measured values (natural units) of the runs the model was fitted on, in the same order.
        ``None`` recovers them from the model (inverse transform of ``z_train_``).
    response_name : str
    factor_names : sequence of str
        Factor names in column order (used for GP length scales).
    factor_spans : sequence of float
        ``high - low`` per factor, to express length scales in factor units.
    choice : ModelChoice or None
        Recorded as ``choice``.
    term_names : sequence of str or None
        Column names for a polynomial's term table (``gas[mix]`` for a categorical factor's indicator,
        one per level after the first, :attr:`StudySpec.term_names`); default ``factor_names``.

    Returns
    -------
    ModelDiagnostics

    Notes
    -----
    LOO predictions at fixed hyperparameters: Rasmussen & Williams (2006), §5.4.2 for the Gaussian
    process; PRESS residuals from the hat matrix for least squares (Montgomery 2013, §10.7). Intervals
    use the model's own quantile (normal for the GP, Student t with ``n - p - 1`` degrees of freedom for
    least squares). Q^2 and RMSE are computed on the model's scale (log or logit of the response when
    it is transformed), the natural-unit RMSE beside them. Warnings: Q^2 below 0.5; with at least 10 runs, 95% coverage below 0.80 (coverage
    cannot exceed 1, so intervals that are too wide do not show in this count); GP length scales or noise
    level at a bound; with at least 10 runs, standardised LOO errors whose root mean square lies outside
    the central 99 % of ``sqrt(chi2_n / n)`` (model too sure or too timid).
    """
    tr = model.transform_
    y = tr.inverse(model.z_train_) if y is None else np.asarray(y, dtype=float).ravel()
    n = model.z_train_.shape[0]
    if y.shape[0] != n:
        raise InputError(f"response {response_name}: {y.shape[0]} measured values for a model fitted on {n} runs")
    mu, sd = model.loo()
    q = model.interval_quantile(0.95, loo=True)
    median, low, high = tr.inverse(mu), tr.inverse(mu - q * sd), tr.inverse(mu + q * sd)
    ok = np.isfinite(median) & np.isfinite(sd)
    notes = [model.warning_] if getattr(model, "warning_", "") else []
    if not ok.all():
        notes.append(f"{int((~ok).sum())} run(s) cannot be predicted from the others (each alone fixes a "
                     "model term); they are left out of these checks")
    z = np.asarray(model.z_train_, float)
    q2, rmse = _press_q2(z[ok], np.asarray(mu, float)[ok])       # the model's scale
    rmse_natural = _press_q2(y[ok], median[ok])[1]
    if not np.isfinite(q2):
        notes.append("leave-one-out Q^2 cannot be computed: the measured values do not vary (or too few "
                     "runs can be predicted); the model's accuracy is unchecked")
    inside = (low[ok] <= y[ok]) & (y[ok] <= high[ok])
    coverage = float(inside.mean()) if ok.any() else float("nan")

    if q2 < Q2_MIN:
        notes.append(f"model explains little of the variation (leave-one-out Q^2 = {q2:.2f}); do not trust "
                     "its window")
    if n >= COVERAGE_MIN_RUNS and coverage < COVERAGE_MIN:
        notes.append(f"intervals are too narrow: only {int(inside.sum())} of {inside.size} runs fall inside "
                     "their 95% leave-one-out interval")
    spread, spread_lo, spread_hi = loo_spread(model, mu, sd, ok & (np.asarray(sd) > 0))
    if int(ok.sum()) >= SPREAD_MIN_RUNS and spread > spread_hi:
        notes.append(f"the model is too sure of itself: runs left out miss its prediction by {spread:.2f} "
                     f"times its own predictive sd (about 1 expected; above {spread_hi:.2f} happens by "
                     "chance less than once in 200); its probabilities and windows are optimistic; look for "
                     "a missing effect or a wrong transform, or replicate runs to measure the scatter")
    elif int(ok.sum()) >= SPREAD_MIN_RUNS and spread < spread_lo:
        notes.append(f"the model is too timid: runs left out miss its prediction by only {spread:.2f} times "
                     f"its own predictive sd (about 1 expected; below {spread_lo:.2f} happens by chance less "
                     "than once in 200); its probabilities and windows are pessimistic")
    scales, ls_notes = _length_scale_checks(model, response_name, list(factor_names), list(factor_spans))
    notes += ls_notes
    terms = []
    if hasattr(model, "term_table"):
        names = list(term_names or factor_names)   # term_names: gas[mix] for a categorical factor
        names = names if len(names) == getattr(model, "model_columns_", model.X_train_.shape[1]) else None
        terms = model.term_table(names).to_dict("records")
    z_bar = float(np.mean(model.z_train_))
    slope = float(tr.inverse_slope(z_bar))
    noise_sd = float(model.noise_std_ * slope)
    offsets = {k: v * slope for k, v in getattr(model, "block_offsets_", {}).items()}
    block_sd = float(model.block_sd_ * slope) if offsets else float("nan")
    return ModelDiagnostics(
        response=response_name, model=model.kind, n=n, loo_q2=q2, loo_rmse=rmse, coverage95=coverage,
        loo_rmse_natural=rmse_natural, loo_spread=spread, scale="natural" if tr.kind == "none" else tr.kind,
        length_scales=scales, noise_sd=noise_sd, block_offsets=offsets, block_sd=block_sd,
        warnings=notes, measured=y.tolist(),
        loo_median=median.tolist(), loo_low=low.tolist(), loo_high=high.tolist(),
        choice=_choice_record(choice, terms), terms=terms)


def _choice_record(choice, terms):
    """The choice as a dict, its term list named as the term table names it (``flux[chloride]``, not
    the polynomial's internal ``x3``), so fit.json speaks one naming."""
    if choice is None:
        return {}
    out = choice.to_dict()
    if terms and len(terms) == len(out.get("terms", [])):
        out["terms"] = [t["term"] for t in terms]
    return out


def diagnose_all(surrogates, factor_names=(), factor_spans=()):
    """:func:`diagnose` for every response model of a :class:`~windowfinder.models.gp.Surrogates`."""
    return [diagnose(m, None, name, factor_names, factor_spans) for name, m in surrogates.models.items()]


def summary_frame(diagnostics):
    """One row per response, from a list of :class:`ModelDiagnostics`."""
    return pd.concat([d.to_frame() for d in diagnostics], ignore_index=True)
