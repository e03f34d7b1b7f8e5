"""Next runs: the batch that most sharpens the process window or most improves the trade-off.

Every run is expensive, so each proposed setting is chosen by a criterion, on coded settings in
``[0, 1]^d``:

**Window** (grow and sharpen the window). A setting belongs to the window when a new run there meets
every limit with probability at least the confidence ``c``, and the window is the largest box of such
settings (:mod:`windowfinder.answers.window`). With exact GP models the criterion is the expected growth of that
window from one more run, looked ahead on the models' posterior (:mod:`windowfinder.nextruns.windowgain`): the
expected advance of each face of the current window times its area. Before any window exists, the
expected growth of the confirmed volume anywhere. ``window_rule="grow"`` alternates the two even with
a window in hand (to look for a larger window elsewhere) and ``"edge"`` uses the criterion below
throughout; docs/benchmarks.md ("Window rules compared") measures the three against each other and
against a one-shot design, and the default is the one that did best there.

Where the look-ahead is unavailable (sparse or quadratic models) or expects no growth anywhere, the
edge criterion is used: with the true process means ``f_k(x)`` known, ``x`` is in the window when
``P_works(x) * prod_k P(lo_k <= f_k(x) + noise <= hi_k) >= c``; the models know ``f_k`` up to their
posterior ``N(mu_k, s_k^2)``, so the probability that ``x`` truly belongs to the window is
``pi(x) = P_f(... >= c)``, estimated from ``S`` = 128 posterior draws with common random numbers, and
the score is the misclassification probability ``min(pi, 1 - pi)``: the ambiguity of the level-set
estimation of Gotovos, Casati, Hitz & Krause (2013, "Active learning for level set estimation", IJCAI)
and the straddle idea of Bryan, Schneider, Nichol, Miller, Genovese & Wasserman (2005, "Active learning
for identifying function threshold boundaries", NIPS 18).

**Trade-off** (improve the constrained front). Expected hypervolume improvement (Emmerich,
Giannakoglou & Naujoks 2006, "Single- and multiobjective evolutionary optimization assisted by
Gaussian random field metamodels", IEEE Trans. Evol. Comput. 10(4)) in its Monte Carlo form (Daulton,
Balandat & Bakshy 2020, qEHVI, NeurIPS), times the probability that the setting is feasible (the usual
weighting of an improvement by the probability of feasibility; Schonlau, Welch & Jones 1998,
"Global versus local search in constrained optimization of computer models", IMS Monograph Series vol. 34).
A setting is feasible when a new run there meets every limit with probability at least ``c``, so its
probability of feasibility is ``pi(x)`` of the edge criterion below, not the noisy ``P(all limits met)``
of one new run (which no number of repeats raises above ``c`` where a mean lies close to a limit).
Draws of each goal's process mean are mapped to natural units and to minimisation form (maximize:
``-Y``; minimize: ``Y``; target: ``|Y - target|``). The current front is the predicted medians at the
completed runs whose joint probability reaches the confidence (predicted, not observed, values:
responses may be unmeasured at some runs and predictions carry no run-to-run noise); the reference
point is the nadir of the predicted values at all completed runs plus 10 % of their range.

**Batches** (kriging believer; Ginsbourger, Le Riche & Carraro 2010, "Kriging is well-suited to
parallelize optimization", in *Computational Intelligence in Expensive Optimization Problems*,
Springer): after each pick every response model is conditioned on its own predicted mean there (same
hyperparameters) and the candidates are scored again; a feasible pick joins the front. The failure
model is left unconditioned; settings where the process is predicted to fail (``P(works) < 0.5``) are
not proposed while any other candidate is.

**Candidates** (:mod:`windowfinder.nextruns.candidates`): a scrambled Sobol set (for the window aim, half of it
around the current window), perturbations around the best few and a short polish, snapped to the
factor steps. A setting closer than ``min_distance`` to a completed run or an earlier pick is refused;
the default ``0.05 * sqrt(d)`` is the finest length scale the models may fit (0.05 coded units per
factor, see :mod:`windowfinder.models.gp`) taken in every factor at once: closer settings are
practically the same run for the model (common practice, no source). A completed run is repeated only
when its score beats the best new setting by a factor of 2 (common practice, no source).

**Stopping advice**: the uncertain share is the fraction of the space (Sobol candidates) whose window
class is still undecided at the confidence (``1 - c < pi < c``); the relative gain is the best
probability-weighted expected hypervolume improvement divided by the hypervolume of the current front.
Another batch is advised while the uncertain share exceeds 5 % or the relative gain 1 % (common
practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from windowfinder.nextruns.candidates import on_grid, pick
from windowfinder.inputs.designs import sobol
from windowfinder.errors import InputError
from windowfinder.answers.support import judge_support, space_filling_batch
from windowfinder.answers.window import find_window
from windowfinder.nextruns.acquisition import Acquisition
from windowfinder.nextruns.windowgain import MARGIN, WindowGain

AIMS = ("balanced", "window", "tradeoff")
WINDOW_RULES = ("faces", "grow", "edge")
SENSES = ("maximize", "minimize", "target")
MAX_CANDIDATES_MANY_GOALS = 256
MIN_WORKS = 0.5
PAY_UNCERTAIN, PAY_GAIN = 0.05, 0.01
BASES = ("window growth", "edge", "hypervolume gain", "space-filling")
BASIS_OF_AIM = {"window": "window growth", "tradeoff": "hypervolume gain"}


@dataclass
class Suggestions:
    """Proposed next runs.

    Attributes
    ----------
    X : ndarray (q, d)
        Coded settings.
    aim : list of str
        ``"window"`` or ``"tradeoff"`` per run: the criterion that chose it.
    gain : ndarray (q,)
        Gain of each pick when chosen: expected window growth in coded volume (share of the factor
        space) or probability-weighted expected hypervolume improvement in goal units (trade-off); NaN
        where the edge criterion chose the pick (it measures no gain) and for space-filling runs.
    p_joint : ndarray (q,)
        Current joint probability that a run there meets every limit (and works).
    predicted : dict[str, ndarray (q,)]
        Predicted median of each response, natural units.
    advice : str
        One line: whether another batch is likely to pay.
    message : str
        One line: what was proposed and why.
    replicate : ndarray (q,) of bool
        True where a pick repeats a completed run.
    basis : list of str
        The score that chose each pick (:data:`BASES`): ``"window growth"``, ``"edge"`` (no setting
        was expected to grow the window: the misclassification criterion), ``"hypervolume gain"`` or
        ``"space-filling"``.
    edge_score : ndarray (q,)
        Misclassification probability ``min(pi, 1 - pi)`` where the edge criterion chose the pick,
        NaN elsewhere.
    """

    X: np.ndarray
    aim: list
    gain: np.ndarray
    p_joint: np.ndarray
    predicted: dict
    advice: str
    message: str
    replicate: np.ndarray = field(default=None)
    basis: list = field(default=None)
    edge_score: np.ndarray = field(default=None)

    def __post_init__(self):
        if self.replicate is None:
            self.replicate = np.zeros(len(self.X), dtype=bool)
        if self.basis is None:
            self.basis = [BASIS_OF_AIM.get(a, a) for a in self.aim]
        if self.edge_score is None:
            self.edge_score = np.full(len(self.X), np.nan)

    def to_frame(self, factor_names, to_natural=None) -> pd.DataFrame:
        """One row per proposed run: settings (natural units when ``to_natural`` is given), aim, basis,
        gain, edge_score, ``p_joint``, ``<response>_predicted`` columns and the replicate flag."""
        X = self.X if to_natural is None else np.asarray(to_natural(self.X), dtype=float)
        frame = pd.DataFrame(X, columns=list(factor_names))
        frame["aim"] = list(self.aim)
        frame["basis"] = list(self.basis)
        frame["gain"] = self.gain
        frame["edge_score"] = self.edge_score
        frame["p_joint"] = self.p_joint
        for name, values in self.predicted.items():
            frame[f"{name}_predicted"] = values
        frame["replicate"] = self.replicate
        return frame

    def to_dict(self) -> dict:
        """JSON-safe form."""
        return {"X": self.X.tolist(), "aim": list(self.aim), "gain": self.gain.tolist(),
                "p_joint": self.p_joint.tolist(),
                "predicted": {k: np.asarray(v).tolist() for k, v in self.predicted.items()},
                "replicate": [bool(r) for r in self.replicate], "basis": list(self.basis),
                "edge_score": [None if np.isnan(v) else float(v) for v in self.edge_score],
                "advice": self.advice,
                "message": self.message}


def _aims(aim, count, found, has_limits, has_goals):
    if not has_goals:
        return ["window"] * count
    if not has_limits:
        return ["tradeoff"] * count
    return [aim] * count if aim != "balanced" else [("window", "tradeoff")[(found + j) % 2] for j in range(count)]


def _advice(acq, base, base_tradeoff):
    parts, pay = [], False
    if acq.limits:
        pi = acq.window(base)[1]
        share = float(np.mean((pi > 1.0 - acq.confidence) & (pi < acq.confidence)))
        parts.append(f"{share:.0%} of the space is uncertain")
        pay |= share > PAY_UNCERTAIN
    if acq.goals:
        rel = float(np.max(acq.tradeoff(base_tradeoff))) / acq.scale_ if acq.scale_ > 0 else 0.0
        what = "the front" if len(acq.front_) else "the reference box (no completed run meets every limit yet)"
        parts.append(f"the best expected hypervolume gain is {rel:.1%} of {what}")
        pay |= rel > PAY_GAIN
    lead = "another batch is still likely to pay: " if pay else "little left to gain: "
    tail = "" if pay else "; confirm with verification runs"
    return lead + "; ".join(parts) + tail


def _check(surrogates, goals, X_runs, count, aim, confidence):
    if not isinstance(count, (int, np.integer)) or count < 1:
        raise InputError(f"suggest: count = {count!r}; ask for at least 1 run")
    if aim not in AIMS:
        raise InputError(f"suggest: aim '{aim}' is unknown; use one of {', '.join(AIMS)}")
    if not 0.5 < confidence < 1.0:
        raise InputError(f"suggest: confidence = {confidence}; it must lie between 0.5 and 1 (e.g. 0.95)")
    for name, sense, target in goals:
        if sense not in SENSES:
            raise InputError(f"goal on '{name}': sense '{sense}' is unknown; use one of {', '.join(SENSES)}")
        if sense == "target" and target is None:
            raise InputError(f"goal on '{name}': goal = \"target\" needs target = <value>")
    d = next(iter(surrogates.models.values())).X_train_.shape[1]
    X_runs = np.asarray(X_runs, dtype=float)
    X_runs = X_runs.reshape(0, d) if X_runs.size == 0 else X_runs
    if X_runs.ndim != 2 or X_runs.shape[1] != d or not np.all(np.isfinite(X_runs)):
        raise InputError(f"suggest: completed run settings must be a finite table with {d} factor columns")
    return X_runs, d


def _scorer(state, kind, avoid):
    """Score function of one pick: ``kind`` in gain | window | tradeoff; likely failures score -1."""
    def score_fn(X):
        s = (state.window_gain(X) if kind == "gain" else state.window_gain(X, True) if kind == "explore"
             else state.window(X)[0] if kind == "window" else state.tradeoff(X))
        return np.where(state.p_works(X) >= MIN_WORKS, s, -1.0) if avoid else s
    return score_fn


def _gain_setup(acq, base, d, tolerance, seed, snap, explore=False):
    """Window candidates for the expected-window-growth criterion, or None where it does not apply.

    It applies when every limited response has an exact GP model (posterior cross-covariances). The
    current window (:func:`windowfinder.answers.window.find_window`) fixes the faces to push; half the
    candidates are drawn around it (the window widened by its own width on every side).
    """
    exact = all(getattr(acq.models[n], "sparse_", True) is None for n, _, _ in acq.feas_.limits_)
    if not exact:
        return None
    w = find_window(acq.feas_.joint, d, acq.confidence, tolerance=tolerance, seed=seed)
    box = (w.lower, w.upper) if w.found else None
    acq.gain_ = WindowGain(d, acq.confidence, box, tolerance, seed=seed)
    if explore and box is not None:   # rule "grow": confirmed volume anywhere, every other run
        acq.explore_ = WindowGain(d, acq.confidence, None, seed=seed)
    if box is None:
        return base
    pad = np.maximum(w.upper - w.lower, 2 * MARGIN) + (0.0 if tolerance is None else np.asarray(tolerance))
    lo, hi = np.clip(w.lower - pad, 0.0, 1.0), np.clip(w.upper + pad, 0.0, 1.0)
    near = on_grid(snap, lo + (hi - lo) * sobol(d, len(base) // 2, seed + 2))
    return np.vstack([near, base[: len(base) // 4]])


def suggest(surrogates, limits, goals, X_runs, count, aim="balanced", confidence=0.95, seed=0,
            snap=None, n_candidates=None, min_distance=None, tolerance=None,
            window_rule="faces", factor_names=None, study_dir="DIR") -> Suggestions:
    """Propose ``count`` next runs (see the module docstring for the criteria).

    Parameters
    ----------
    surrogates : Surrogates
    limits : list of (name, lo, hi)
        Natural units; ``None`` for an open side.
    goals : list of (name, sense, target)
        ``sense`` in maximize | minimize | target.
    X_runs : ndarray (n, d)
        Coded settings of completed runs (failed ones included: they are not repeated).
    count : int
    aim : {"balanced", "window", "tradeoff"}
        ``balanced`` alternates, starting with the window while no setting reaches the confidence.
        Without goals every pick aims at the window; without limits, at the trade-off.
    confidence : float
    seed : int
    snap : callable (m, d) -> (m, d) or None
        Rounds coded settings to each factor's step.
    n_candidates : int or None
        Sobol candidates (default 1024 for d <= 2, 2048 for d <= 4, else 4096).
    min_distance : float or None
        Default ``0.05 * sqrt(d)``.
    tolerance : ndarray (d,) or None
        Coded factor tolerances, for the current window that the window criterion grows.
    window_rule : {"faces", "grow", "edge"}
        Window runs: ``faces`` (default) push the current window's faces; ``grow`` alternates that with
        growing the confirmed volume anywhere; ``edge`` uses the misclassification criterion throughout
        (the three are compared in docs/benchmarks.md).
    factor_names : sequence of str or None
        For the support check's messages (default ``x1 .. xd``).
    study_dir : str
        Study folder named in the advice when the runs cannot support model-guided picks.

    Returns
    -------
    Suggestions
    """
    limits, goals = list(limits or []), list(goals or [])
    if not limits and not goals:
        raise InputError("study.toml [[response]]: no limits and no goals; give a response a min/max or a goal")
    X_runs, d = _check(surrogates, goals, X_runs, count, aim, confidence)
    if window_rule not in WINDOW_RULES:
        raise InputError(f"suggest: window rule '{window_rule}' is unknown; use one of {', '.join(WINDOW_RULES)}")
    snap = snap if snap is not None else (lambda U: U)
    names = [n for n, _, _ in limits] + [n for n, _, _ in goals]
    sup = judge_support(surrogates.models, names, factor_names or [f"x{j + 1}" for j in range(d)],
                        study_dir, spread=False)
    if not sup.supported:   # no model-guided picks: a space-filling batch (windowfinder.answers.support)
        works = surrogates.failure
        X = space_filling_batch(X_runs, count, d, seed, snap, accept=None if works is None else
                                (lambda C: np.ravel(works.predict_proba(C)) >= MIN_WORKS))
        nan = np.full(len(X), np.nan)
        return Suggestions(X=X, aim=["space-filling"] * len(X), gain=nan, p_joint=nan.copy(),
                           basis=["space-filling"] * len(X),
                           predicted={n: nan.copy() for n in surrogates.models}, advice=sup.advice,
                           message=(f"{len(X)} space-filling runs proposed instead of model-guided ones: "
                                    f"{sup.reason}"))
    acq = Acquisition(surrogates, limits, goals, X_runs, confidence, seed)
    n_candidates = n_candidates or (1024 if d <= 2 else 2048 if d <= 4 else 4096)
    min_distance = 0.05 * np.sqrt(d) if min_distance is None else float(min_distance)
    base = on_grid(snap, sobol(d, n_candidates, seed))
    if len(base) == 0:
        raise InputError("suggest: no setting survives rounding to the factor steps; check each step")
    base_tradeoff = base if len(goals) < 3 else base[:MAX_CANDIDATES_MANY_GOALS]
    avoid = acq.failure is not None and bool(np.any(acq.p_works(base) >= MIN_WORKS))
    found = bool(np.any(acq.p_joint(base) >= confidence))
    aims = _aims(aim, count, found, bool(limits), bool(goals))
    rng = np.random.default_rng([seed, 1])
    use_gain = "window" in aims and window_rule != "edge"
    base_window = (_gain_setup(acq, base, d, tolerance, seed, snap, window_rule == "grow") if use_gain
                   else None)

    picks, gains, bases, replicate, state = [], [], [], [], acq
    for a in aims:
        kind = "gain" if a == "window" and base_window is not None else a
        alternate = (len(X_runs) + aims[:len(picks)].count(a)) % 2
        if kind == "gain" and acq.explore_ is not None and alternate:
            kind = "explore"       # every other window run: confirmed volume anywhere
        cands = (base_tradeoff if a == "tradeoff" else base if kind in ("window", "explore")
                 else base_window)
        x, g, rep = pick(_scorer(state, kind, avoid), cands, X_runs, picks, min_distance, snap, rng)
        if kind in ("gain", "explore") and not g > 0:   # no growth expected anywhere: sharpen the edge instead
            kind = "window"
            x, g, rep = pick(_scorer(state, kind, avoid), base, X_runs, picks, min_distance, snap, rng)
        picks.append(np.asarray(x, dtype=float))
        gains.append(float(g))
        bases.append("edge" if kind == "window" else BASIS_OF_AIM[a])
        replicate.append(rep)
        state = state.believe(x)

    X = np.vstack(picks)
    predicted = {n: m.transform_.inverse(np.asarray(m.predict(X, return_std=False)))
                 for n, m in surrogates.models.items()}
    n_win = aims.count("window")
    msg = (f"{count} run{'s' if count > 1 else ''} proposed: {n_win} to grow or sharpen the window, "
           f"{count - n_win} to improve the trade-off")
    if any(replicate):
        rows = ", ".join(str(i + 1) for i, r in enumerate(replicate) if r)
        msg += f"; run {rows} repeats a completed run (replicate: it scores far above any new setting)"
    if avoid:
        msg += "; settings likely to fail (P(works) < 0.5) avoided"
    edge = np.array([b == "edge" for b in bases])
    gains = np.array(gains)
    return Suggestions(X=X, aim=aims, gain=np.where(edge, np.nan, gains), p_joint=acq.p_joint(X),
                       predicted=predicted, advice=_advice(acq, base, base_tradeoff), message=msg,
                       replicate=np.array(replicate), basis=bases, edge_score=np.where(edge, gains, np.nan))
