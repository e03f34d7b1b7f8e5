"""Support: whether the runs can carry a claim (a window, a trade-off, model-guided next runs).

A Gaussian-process model fitted to a degenerate run set can be confidently wrong: fourteen runs at one
setting give a tiny predictive sd everywhere once the length scales run to their upper bound, and five
runs in eight factors let a smooth trend pass through every run. No probability computed from such a
model means anything, so the answers refuse it before searching, with one line saying why and what to
run instead. The checks (coded settings, per response with the runs where it was measured):

* **distinct settings** at least ``d + 2``: ``d + 1`` fix a plane through the runs, one more leaves a
  run to check it against (common practice, no source);
* **levels** at least 2 distinct values of every factor: a factor held at one level has no measured
  effect, yet the window would extend over its whole range;
* **spread** the runs span at least :data:`MIN_SPREAD` of every factor's range (coded 0..1): beyond the
  runs' span along a factor the model only extrapolates (common practice, no source);
* **leave-one-out** every run can be predicted from the others (finite leave-one-out prediction,
  Rasmussen & Williams 2006, §5.4.2), so the model's accuracy can be checked at all;
* **extent** (:func:`judge_extent`, after the search) at most :data:`MAX_FAR_SHARE` of the found window
  lies farther from every run than the extrapolation distance measured against the box: there a
  model shows only its prior, whose spread comes from the runs' spread (in eight factors, ten runs of
  y = the factors' sum have an sd of 0.9 while y spans 0..8 over the box, and the whole box was claimed
  at P = 0.98 though y = 0 at the origin).

Where the runs do not support a claim, the advice is a space-filling design of
``N = max(10 d - k, d + 2)`` runs, ``k`` the distinct settings already run: the ``n = 10 d`` rule for the
size of a computer experiment (Loeppky, Sacks & Welch 2009, "Choosing the sample size of a computer
experiment: a practical guide", Technometrics 51(4)), counting the settings already run, and never fewer
than the ``d + 2`` the first check needs. :func:`space_filling_batch` picks such runs as far as possible
from the runs already made (greedy maximin on a Sobol set; Johnson, Moore & Ylvisaker 1990, "Minimax and
maximin distance designs", J. Statist. Plann. Inference 26).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

MIN_SPREAD = 0.5     # runs must span at least half of every factor's range (common practice, no source)
MIN_LEVELS = 2       # distinct levels per factor
RUNS_PER_FACTOR = 10  # Loeppky, Sacks & Welch (2009): n = 10 d
MAX_FAR_SHARE = 0.5   # most of a window far from every run: not supported (common practice, no source)


@dataclass
class Support:
    """Whether the runs support a claim; ``reason`` and ``advice`` are one line each when they do not.

    Attributes
    ----------
    supported : bool
    reason : str
        Empty when supported, else the first failed check in plain words.
    advice : str
        What to run (a space-filling design of ``runs_needed`` runs); empty when supported.
    runs_needed : int
        Suggested size of that design (0 when supported).
    checks : list of dict
        One entry per response judged: ``response``, ``runs``, ``distinct``, ``levels``, ``spread``.
    """

    supported: bool
    reason: str = ""
    advice: str = ""
    runs_needed: int = 0
    checks: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return asdict(self)

    @property
    def message(self) -> str:
        """``reason; advice`` in one line (empty when supported)."""
        return "" if self.supported else f"the runs do not support it: {self.reason}; {self.advice}"


def runs_needed(d: int, distinct: int) -> int:
    """Size of the advised space-filling design: ``max(10 d - distinct, d + 2)`` (see module notes)."""
    return int(max(RUNS_PER_FACTOR * d - distinct, d + 2))


def _judge_runs(X: np.ndarray, factor_names, spread_check: bool = True) -> tuple[str, dict]:
    """First failed check on the coded settings ``X`` of one response's runs ('' when all pass)."""
    d = X.shape[1]
    distinct = np.unique(X, axis=0) if len(X) else X
    inside = np.clip(distinct, 0.0, 1.0)
    levels = [int(len(np.unique(distinct[:, j]))) for j in range(d)]
    spread = [float(np.ptp(inside[:, j])) if len(inside) else 0.0 for j in range(d)]
    info = {"runs": int(len(X)), "distinct": int(len(distinct)), "levels": levels, "spread": spread}
    if len(distinct) < d + 2:
        same = " (all at one setting)" if len(distinct) == 1 and len(X) > 1 else ""
        return (f"{len(X)} runs at {len(distinct)} distinct setting(s){same}; {d} factors need at least "
                f"d + 2 = {d + 2}"), info
    for j, name in enumerate(factor_names):
        if levels[j] < MIN_LEVELS:
            return f"factor '{name}' was held at one level in every run, so its effect is unknown", info
    for j, name in enumerate(factor_names if spread_check else ()):
        if spread[j] < MIN_SPREAD:
            return (f"the runs span only {spread[j]:.0%} of factor '{name}''s range (at least "
                    f"{MIN_SPREAD:.0%} needed); elsewhere the model only extrapolates"), info
    return "", info


def judge_support(models: dict, names, factor_names, study_dir: str = "DIR",
                  spread: bool = True) -> Support:
    """Judge whether the runs behind the models ``names`` support a claim.

    Parameters
    ----------
    models : dict name -> fitted response model
        Each has ``X_train_`` (coded settings of the runs where the response was measured) and
        ``loo()`` (leave-one-out latent mean and sd).
    names : sequence of str
        The responses the claim rests on (limited ones for a window, also goals for a trade-off).
    factor_names : sequence of str
    study_dir : str
        Study folder, for the advised command.
    spread : bool, default True
        Apply the spread check. Next runs skip it: model-guided picks go where the model is unsure,
        which is what a narrow spread calls for.

    Returns
    -------
    Support
    """
    factor_names = list(factor_names)
    d = len(factor_names)
    checks, reason, worst = [], "", 0
    for name in dict.fromkeys(names):
        model = models[name]
        X = np.atleast_2d(np.asarray(model.X_train_, dtype=float))
        why, info = _judge_runs(X, factor_names, spread)
        info["response"] = name
        checks.append(info)
        if not why and hasattr(model, "loo"):
            mu, sd = model.loo()
            bad = int(np.sum(~(np.isfinite(mu) & np.isfinite(sd))))
            if bad:
                why = (f"{bad} run(s) cannot be predicted from the others, so the leave-one-out check "
                       "is not possible")
        if why and not reason:
            reason = f"{name}: {why}"
            worst = info["distinct"]
    if not reason:
        return Support(True, checks=checks)
    n = runs_needed(d, worst)
    advice = (f"run a space-filling design of {n} runs: windowfinder design {study_dir} --method "
              f"space-filling --runs {n}")
    return Support(False, reason, advice, n, checks)


def judge_extent(far_share: float, threshold: float, d: int, distinct: int, what: str = "window",
                 study_dir: str = "DIR") -> Support:
    """Whether a found region rests on runs: at most :data:`MAX_FAR_SHARE` of it may be far from every run.

    ``far_share`` is the share of settings inside the region farther than ``threshold`` (the
    extrapolation distance of :class:`~windowfinder.answers.feasibility.Feasibility`, measured against
    the box) from every run. There the models show only their prior, so a probability near 1 is not
    constrained by any run.
    """
    if far_share <= MAX_FAR_SHARE:
        return Support(True)
    n = runs_needed(d, distinct)
    return Support(False, f"{far_share:.0%} of the best {what} is farther than {threshold:.2g} coded units "
                          "from every run, where the models only extrapolate",
                   f"run a space-filling design of {n} runs: windowfinder design {study_dir} --method "
                   f"space-filling --runs {n}", n)


def study_folder(spec) -> str:
    """The study folder for the advised command ('DIR' when the spec was not read from a file)."""
    from pathlib import Path

    return str(Path(spec.source).parent) if spec.source and spec.source != "study.toml" else "DIR"


def support_of(spec, fit, names) -> Support:
    """:func:`judge_support` for a study's fitted models (``fit.surrogates.models``)."""
    return judge_support(fit.surrogates.models, names, spec.factor_names, study_folder(spec))


def space_filling_batch(X_known: np.ndarray, count: int, d: int, seed: int = 0, snap=None,
                        n_candidates: int = 2048, accept=None) -> np.ndarray:
    """``count`` coded settings, each in turn the Sobol candidate farthest from all runs and picks.

    Greedy maximin (Johnson, Moore & Ylvisaker 1990) over a scrambled Sobol set snapped by ``snap``;
    with no runs yet the first pick is the candidate nearest the centre of the box. ``accept``
    (callable (m, d) -> bool mask) restricts the candidates, unless it accepts none.
    """
    from scipy.spatial.distance import cdist

    from windowfinder.inputs.designs import sobol

    C = sobol(d, n_candidates, seed)
    if snap is not None:  # a snap marks settings that must never be run with NaN (study constraints)
        C = np.asarray(snap(C), dtype=float)
        C = np.unique(C[np.all(np.isfinite(C), axis=1)], axis=0)
    if accept is not None:
        ok = np.asarray(accept(C), dtype=bool)
        C = C[ok] if ok.any() else C
    known = np.atleast_2d(np.asarray(X_known, dtype=float)) if len(X_known) else np.empty((0, d))
    picks = []
    if not len(known):
        picks.append(C[int(np.argmin(np.abs(C - 0.5).sum(axis=1)))])
        known = np.array(picks)
    near = cdist(C, known).min(axis=1)
    while len(picks) < min(count, len(C)):
        i = int(np.argmax(near))
        picks.append(C[i])
        near = np.minimum(near, cdist(C, C[i:i + 1]).ravel())
    return np.array(picks).reshape(-1, d)
