"""The model each response deserves: Gaussian process, warped GP or polynomial, chosen by leave-one-out.

``model = "auto"`` (a response's default in study.toml) fits the candidates below and keeps the one
whose leave-one-out predictive log density of the measured values, in natural units, is highest; the
Gaussian process is kept unless another candidate strictly beats it:

- ``gp``: the Gaussian-process model; Gaussian LOO predictive at fixed hyperparameters (Rasmussen &
  Williams 2006, §5.4.2, eq. 5.10);
- ``warped`` (only with :data:`AUTO_WARPED`; off by default, see there): the Gaussian process of a
  fitted monotone warp of the response (:class:`~windowfinder.models.warping.WarpedGPModel`; Snelson,
  Rasmussen & Ghahramani 2004); its two warp parameters are fitted on all runs and held fixed in its
  LOO, so it must beat the others by
  :data:`EXTRA_PARAMETERS` nats, one per warp parameter (Akaike's penalty, Akaike 1974, "A new look at
  the statistical model identification", IEEE Trans. Autom. Control 19(6));
- ``quadratic``: the full second-order polynomial;
- ``reduced``: that polynomial after hierarchical backward elimination by AICc
  (:func:`~windowfinder.models.polynomial.backward_eliminate`); kept as a candidate only when it drops a
  term.

Natural units make candidates on different latent scales comparable: a latent density ``p_z`` at
``z = g(y)`` is the density ``p_z(g(y)) g'(y)`` of ``y`` (change of variables), so the score adds
``-sum log(dy/dz)`` at the runs to the latent one; for candidates sharing one transform it is the same
constant. A polynomial's LOO predictive is a Student t with ``n - p - 1`` degrees of freedom around the
PRESS prediction (Cook & Weisberg 1982, §2.2). The LOO scores hold the fitted structure fixed (the GP's
hyperparameters, the warp, the polynomial's selected terms), so all are somewhat optimistic; the
comparison is like with like. A polynomial that cannot be fitted (too few runs, too few levels) or
leaves a run unpredictable (leverage 1), or with fewer than 2 residual degrees of freedom, is not a
candidate. When the second-order model cannot be fitted, the first-order one takes its place.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from windowfinder.errors import InputError
from windowfinder.inputs.spec import MODELS
from windowfinder.models.blocks import fit_blocked
from windowfinder.models.encoding import LevelEncoder
from windowfinder.models.gp import GPModel
from windowfinder.models.polynomial import PolynomialModel, backward_eliminate
from windowfinder.models.warping import WarpedGPModel

# Parameters a candidate fits beyond the plain GP's, each costing one nat of LOO log density in ``auto``
EXTRA_PARAMETERS = {"warped": 2.0}
# The warped GP is a candidate from this many runs per parameter (the GP's d + 3 and the warp's 2), as
# for the hyperparameter mixture (windowfinder.models.gp); common practice, no source
WARP_MIN_RUNS_PER_PARAMETER = 2
# Whether ``auto`` fits the warped GP as a candidate. Off: on the calibration benchmark
# (docs/benchmarks.md) auto with it raised window recall on five of six simulator cases (reactor 0.56 ->
# 0.77, spot weld windows in 4 of 5 seeds instead of 1, bonding grown 0.21 -> 0.36) but not on the
# held-out problem (hardening 0.52 -> 0.50), and fits take several times longer; ``model = "warped"``
# asks for it per response.
AUTO_WARPED = False


def loo_log_density(model) -> float:
    """Sum over the runs of the leave-one-out predictive log density of the measured values, natural units.

    Normal on the latent scale for a model without ``loo_dof`` (the GP); Student t with
    ``model.loo_dof`` degrees of freedom for least squares; the change of variables to natural units
    subtracts ``log(dy/dz)`` at each run (module notes). NaN when some run cannot be predicted from the
    others.
    """
    mu, sd = model.loo()
    z = model.z_train_
    if not (np.all(np.isfinite(mu)) and np.all(np.isfinite(sd)) and np.all(sd > 0)):
        return float("nan")
    dof = getattr(model, "loo_dof", None)
    dist = stats.norm if dof is None else stats.t(dof)
    jacobian = np.sum(np.log(model.transform_.inverse_slope(z)))
    return float(np.sum(dist.logpdf((z - mu) / sd) - np.log(sd)) - jacobian)


@dataclass
class ModelChoice:
    """Which model a response got and why.

    Attributes
    ----------
    requested : {"auto", "gp", "warped", "quadratic", "linear"}
    chosen : str
        ``gp``, ``warped``, ``quadratic``, ``linear`` or ``reduced``.
    scores : dict[str, float or None]
        Candidate -> LOO log density (natural units, summed over runs); None where it could not be
        computed.
    notes : list[str]
        Why a candidate was left out.
    terms : list[str]
        Terms of the chosen polynomial (coded units); empty for the Gaussian process.
    """

    requested: str
    chosen: str
    scores: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    terms: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"requested": self.requested, "chosen": self.chosen, "terms": list(self.terms),
                "scores": {k: (None if v is None or not np.isfinite(v) else float(v))
                           for k, v in self.scores.items()},
                "notes": list(self.notes)}

    @classmethod
    def from_dict(cls, data: dict) -> "ModelChoice":
        """Inverse of :meth:`to_dict` (None scores become NaN)."""
        scores = {k: float("nan") if v is None else v for k, v in data.get("scores", {}).items()}
        return cls(data["requested"], data["chosen"], scores, list(data.get("notes", [])),
                   list(data.get("terms", [])))

    def text(self) -> str:
        """One line: each candidate's score and the choice."""
        parts = [f"{k} {'n/a' if v is None or not np.isfinite(v) else f'{v:.2f}'}"
                 for k, v in self.scores.items()]
        how = "chosen" if self.requested == "auto" else "as set in study.toml"
        terms = f", {len(self.terms)} terms" if self.terms else ""
        return f"LOO log density {', '.join(parts)} -> {self.chosen} ({how}{terms})"


def _polynomial(X, y, transform, terms=None, degree=2, enc=None):
    """Polynomial on the treatment-coded columns of ``X`` (indicator terms of categorical factors)."""
    enc = LevelEncoder.of(enc)
    d = X.shape[1]
    return PolynomialModel(terms=terms, transform=transform, degree=degree,
                           categorical=enc.indicators(d), groups=enc.groups(d)).fit(
        enc.transform(X, "treatment"), y)


def _candidates_polynomial(X, y, transform, notes, enc=None):
    """Full second-order (or, failing that, first-order) model and its AICc reduction."""
    out = {}
    full = None
    for degree, name in ((2, "quadratic"), (1, "linear")):
        try:
            m = _polynomial(X, y, transform, degree=degree, enc=enc)
        except InputError as err:
            notes.append(f"{name}: {err}")
            continue
        if m.df_resid_ >= 2:
            full = out[name] = m
            break
        notes.append(f"{name}: {m.df_resid_} residual degree of freedom; leave-one-out needs 2")
    if full is None:
        return out
    kept = backward_eliminate(full._coded(full.X_train_), full.z_train_, full.terms_)
    if kept != full.terms_:
        out["reduced"] = _polynomial(X, y, transform, terms=kept, enc=enc)
    return out


def _gp(X, y, transform, n_restarts, seed, enc=None, cls=GPModel):
    """Gaussian process (``cls``: plain or warped) on the one-hot columns of ``X``."""
    return cls(transform=transform, n_restarts=n_restarts, random_state=seed).fit(
        LevelEncoder.of(enc).transform(X, "onehot"), y)


def candidates(X, y, transform="none", n_restarts=5, seed=0, notes=None, categorical=()):
    """The fitted candidates of ``model = "auto"``: ``{"gp": ..., "warped": ..., "quadratic" | "linear":
    ..., "reduced": ...}`` (polynomials only where they can be fitted and scored; reasons go to ``notes``).
    Fitted on the encoded columns (:class:`~windowfinder.models.encoding.LevelEncoder`), not wrapped."""
    notes = [] if notes is None else notes
    enc = LevelEncoder.of(categorical)
    out = {"gp": _gp(X, y, transform, n_restarts, seed, enc)}
    out.update(_candidates_polynomial(X, y, transform, notes, enc))
    need = WARP_MIN_RUNS_PER_PARAMETER * (out["gp"].X_train_.shape[1] + 5)   # GP columns, one-hot
    if AUTO_WARPED and len(y) >= need:
        out["warped"] = _gp(X, y, transform, n_restarts, seed, enc, WarpedGPModel)
    elif AUTO_WARPED:
        notes.append(f"warped: {len(y)} runs; a fitted warp needs {need}")
    return out


def _choice(requested, key, m, scores, notes=(), enc=None, X=None):
    terms = m.feature_names() if isinstance(m, PolynomialModel) else []
    scheme = "treatment" if isinstance(m, PolynomialModel) else "onehot"
    return LevelEncoder.of(enc).wrap(m, scheme, X), ModelChoice(requested, key, scores, list(notes), terms)


def fit_response(X, y, model="auto", transform="none", n_restarts=5, seed=0, blocks=None, categorical=()):
    """Fit the model a response asks for (or, with ``"auto"``, the best by leave-one-out).

    Parameters
    ----------
    X : ndarray (n, d), coded
    y : ndarray (n,), natural units, all finite
    model : {"auto", "gp", "warped", "quadratic", "linear"}
    transform : str or Transform
    n_restarts, seed : int
        For the Gaussian process.
    blocks : array (n,) or None
        Block label per run: the Gaussian process with a random offset per block
        (:func:`windowfinder.models.blocks.fit_blocked`); ``model`` must then be ``"gp"`` or ``"auto"``.
    categorical : LevelEncoder, dict[int, levels] or tuple of int
        The categorical columns and their levels (a tuple: two-level factors). Each model sees them
        through :class:`~windowfinder.models.encoding.LevelEncoder`: the Gaussian process one indicator
        column per level (two-level factors: their 0/1 column, whose own length scale gives the
        exchangeable correlation of Qian, Wu & Wu 2008), the polynomials ``L - 1`` indicator terms
        (treatment coding). A model fitted on expanded columns comes back as an
        :class:`~windowfinder.models.encoding.EncodedModel`, so it takes the study's coded settings.

    Returns
    -------
    fitted model, ModelChoice
    """
    if model not in MODELS:
        raise InputError(f"model '{model}' is unknown; use one of {', '.join(MODELS)}")
    notes = []
    enc = LevelEncoder.of(categorical)
    if blocks is not None:
        if model not in ("gp", "auto"):
            raise InputError(f"model '{model}' cannot carry block offsets; use model = 'gp' or 'auto', or "
                             "remove the block column")
        m = fit_blocked(GPModel(transform=transform, n_restarts=n_restarts, random_state=seed),
                        enc.transform(X, "onehot"), y, blocks)
        return _choice(model, "gp", m, {"gp": loo_log_density(m)},
                       ["runs in blocks: the Gaussian process with a random offset per block"], enc, X)
    if model in ("gp", "warped"):
        m = _gp(X, y, transform, n_restarts, seed, enc, GPModel if model == "gp" else WarpedGPModel)
        return _choice(model, model, m, {model: loo_log_density(m)}, (), enc, X)
    if model in ("quadratic", "linear"):
        m = _polynomial(X, y, transform, degree=2 if model == "quadratic" else 1, enc=enc)
        return _choice(model, model, m, {model: loo_log_density(m)}, (), enc, X)
    cands = candidates(X, y, transform, n_restarts, seed, notes, enc)
    scores = {k: loo_log_density(m) for k, m in cands.items()}
    best = "gp"
    for k, s in scores.items():
        s_adj, best_adj = s - EXTRA_PARAMETERS.get(k, 0.0), scores[best] - EXTRA_PARAMETERS.get(best, 0.0)
        if s_adj > best_adj or (np.isfinite(s) and not np.isfinite(scores[best])):
            best = k
    for k, s in scores.items():
        if not np.isfinite(s):
            notes.append(f"{k}: some run cannot be predicted from the others; not a candidate")
    return _choice("auto", best, cands[best], scores, notes, enc, X)

