"""The strategies the sample-efficiency benchmark compares, and how each one's answer is judged.

Every strategy ends in data (coded settings, measured responses, works flags) at each budget; the same
judge turns data into a claimed window and trade-off front with windowfinder's public pieces
(:meth:`Surrogates.fit_arrays`, :class:`Feasibility`, :func:`find_window`, :func:`find_tradeoff`) and
measures them against the noise-free truth (:mod:`benchmarks.problems`). Only the data (and, for the
central composite design, the model) differ between strategies.

One-shot designs, built anew at every budget:

* ``ofat``: one factor at a time through the centre, the most levels that fit, the rest centre repeats;
* ``ccd``: face-centred central composite design with one centre run, repeated whole as far as the
  budget allows, the remainder a partial repeat (centre, axial, factorial runs in that order), judged
  with the full second-order least-squares model (Montgomery 2013, ch. 11);
* ``space-filling``: windowfinder's Latin hypercube (``make_design("space-filling")``).

Sequential strategies share one initial Latin hypercube and the same run-to-run noise draws per seed,
then add runs in batches until each budget on the grid is reached exactly (the snapshots are nested):

* ``random``: uniform random settings;
* ``window``, ``tradeoff``, ``balanced``: :func:`windowfinder.nextruns.suggestions.suggest` with that aim.

Two more comparisons: NSGA-II run on the noise-free truth (:func:`nsga_evaluations`), and the closed
loop of :func:`windowfinder.campaign.loop.run_campaign` on the bundled reactor against a one-shot design of
the same size, through the study-folder API with windowfinder's full defaults (:func:`campaign_once`).
"""

from __future__ import annotations

import re
import zlib
from pathlib import Path

import numpy as np

from windowfinder.answers import build_window, objectives_of
from windowfinder.campaign import run_campaign, run_seed
from windowfinder.cases import case_dir
from windowfinder.inputs.designs import central_composite, make_design, one_factor_at_a_time
from windowfinder.errors import InputError
from windowfinder.answers.feasibility import Feasibility
from windowfinder.answers.hypervolume import hypervolume, normalised_igd
from windowfinder.nextruns import suggest
from windowfinder.study import Study
from windowfinder.models.surrogates import Surrogates
from windowfinder.answers.tradeoff import find_tradeoff
from windowfinder.answers.window import find_window

from .problems import CONFIDENCE, Problem, box_precision, get_problem, non_dominated, truth_problem

N_RESTARTS = 2               # GP optimizer restarts (windowfinder's default is 5), for speed
TRADEOFF_SEARCH = {"pop_size": 40, "n_gen": 40}   # windowfinder's default is 100 x 150, for speed
BATCH = 2
ONE_SHOT = ("ofat", "ccd", "space-filling")
SEQUENTIAL = ("random", "window", "tradeoff", "balanced")
LABELS = {"ofat": "one factor at a time + GP", "ccd": "central composite + quadratic",
          "space-filling": "space-filling one-shot + GP", "random": "random sequential + GP",
          "window": "windowfinder, aim window", "tradeoff": "windowfinder, aim tradeoff",
          "balanced": "windowfinder, aim balanced"}


def run_seeds(seed: int, tag: str, n: int) -> np.ndarray:
    """``n`` reproducible run seeds for one benchmark seed and a tag naming the design."""
    return np.random.SeedSequence([seed, zlib.crc32(tag.encode())]).generate_state(n)


def initial_size(d: int) -> int:
    """Initial runs of the sequential strategies: 6 for two factors, 8 for three (``2 d + 2``)."""
    return 2 * d + 2


def one_shot_design(kind: str, d: int, n: int, seed: int) -> np.ndarray:
    """A one-shot design of exactly ``n`` runs (coded)."""
    if kind == "space-filling":
        return make_design("space-filling", d, runs=n, seed=seed)
    if kind == "ofat":
        levels = 1 + 2 * ((n - 1) // d // 2)  # odd, 1 + d (levels - 1) <= n
        X = one_factor_at_a_time(d, max(levels, 3))
    elif kind == "ccd":
        base = central_composite(d, "face", centre=1)
        order = np.r_[len(base) - 1, np.arange(2**d, len(base) - 1), np.arange(2**d)]
        X = np.vstack([base] * (n // len(base)) + [base[order][: n % len(base)]])
    else:
        raise ValueError(kind)
    return np.vstack([X, np.full((n - len(X), d), 0.5)])[:n]


def fit(problem: Problem, X, Y, works, kind="gp", seed=0):
    """Models of every response (failure model when a run failed); None when they cannot be fitted."""
    try:
        return Surrogates.fit_arrays(X, Y, problem.transforms, works=works if (~works).any() else None,
                                     kind=kind, n_restarts=N_RESTARTS, seed=seed)
    except InputError:
        return None


def judge(problem: Problem, ref, sur, X, seed: int) -> dict:
    """Claimed 95 % window and trade-off front of fitted models, measured against the truth.

    Returns ``found``, ``precision`` (share of the stated window truly feasible), ``run_precision``
    (share of it where a new run truly meets every limit with probability >= 0.95), ``recall`` (stated
    window volume / largest truly feasible window), ``run_recall`` (the same over the largest window a
    perfect model would state at 95 %), ``hv_ratio`` (hypervolume of the truly feasible points of the
    claimed front / that of the true front) and ``igd`` (normalised IGD of those points).
    """
    out = {"found": False, "precision": np.nan, "run_precision": np.nan, "recall": 0.0, "run_recall": 0.0,
           "hv_ratio": 0.0, "igd": np.inf}
    if sur is None:
        return out
    feas = Feasibility(problem.limits, sur, X)
    w = find_window(feas.joint, problem.d, CONFIDENCE, tolerance=problem.spec.tolerances_coded, seed=seed)
    if w.found:
        precision = box_precision(problem.feasible, w.lower, w.upper, seed=seed)
        run_precision = box_precision(lambda U: problem.run_probability(U) >= CONFIDENCE, w.lower, w.upper,
                                      seed=seed) if problem.noisy else precision
        out.update(found=True, precision=precision, run_precision=run_precision,
                   recall=float(w.volume) / ref.box_volume, run_recall=float(w.volume) / ref.run_volume)
    out["hv_ratio"], out["igd"] = judge_front(problem, ref, sur, feas, seed, TRADEOFF_SEARCH)
    return out


def judge_front(problem: Problem, ref, sur, feas, seed: int, search=None) -> tuple[float, float]:
    """Hypervolume ratio and normalised IGD of the truly feasible points of the claimed 95 % front
    (``search``: population and generations of :func:`find_tradeoff`, None for its defaults)."""
    obj, _ = objectives_of(problem.spec, sur)
    front = find_tradeoff(obj, feas.joint, problem.d, CONFIDENCE, len(problem.goals), seed=seed,
                          **(search or {}))
    if not front.found:
        return 0.0, np.inf
    ok = problem.feasible(front.X)
    F = problem.objectives(problem.truth(front.X[ok]))
    if not len(F):
        return 0.0, np.inf
    return hypervolume(F, ref.ref_point) / ref.hv, normalised_igd(F, ref.front)


def one_shot(problem: Problem, ref, kind: str, budgets, seed: int) -> list[dict]:
    """Judge a fresh one-shot design at every budget."""
    rows = []
    for n in budgets:
        X = one_shot_design(kind, problem.d, n, seed)
        Y, works = problem.run(X, run_seeds(seed, f"{kind}-{n}", n))
        sur = fit(problem, X, Y, works, kind="quadratic" if kind == "ccd" else "gp", seed=seed)
        rows.append({"budget": n, **judge(problem, ref, sur, X, seed)})
    return rows


def _propose(problem: Problem, aim: str, sur, X, q: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng([seed, len(X)])
    if aim == "random" or sur is None:
        return rng.random((q, problem.d))
    aim, _, rule = aim.partition(":")      # "window:edge" - aim window with another window rule
    return suggest(sur, problem.limits, problem.goals, X, q, aim=aim, confidence=CONFIDENCE,
                   seed=seed + len(X), tolerance=problem.spec.tolerances_coded, window_rule=rule or "faces").X


def sequential(problem: Problem, ref, aim: str, budgets, seed: int) -> list[dict]:
    """Initial Latin hypercube, then batches of ``BATCH`` runs by ``aim``; judged at every budget."""
    budgets = sorted(budgets)
    seeds = run_seeds(seed, "sequential", budgets[-1])
    X = make_design("space-filling", problem.d, runs=initial_size(problem.d), seed=seed)
    Y, works = problem.run(X, seeds[: len(X)])
    rows = []
    while True:
        n = len(X)
        need_fit = aim != "random" or n in budgets
        sur = fit(problem, X, Y, works, seed=seed) if need_fit else None
        if n in budgets:
            rows.append({"budget": n, **judge(problem, ref, sur, X, seed)})
        if n >= budgets[-1]:
            if aim == "tradeoff" and sur is not None:  # the front a user gets: default search settings
                feas = Feasibility(problem.limits, sur, X)
                rows[-1]["igd_default"] = judge_front(problem, ref, sur, feas, seed)[1]
            return rows
        q = min(BATCH, min(b for b in budgets if b > n) - n)
        X_new = _propose(problem, aim, sur, X, q, seed)
        Y_new, w_new = problem.run(X_new, seeds[n:n + q])
        X = np.vstack([X, X_new])
        Y = {r: np.concatenate([Y[r], Y_new[r]]) for r in Y}
        works = np.concatenate([works, w_new])


def run_strategy(problem: Problem, ref, strategy: str, budgets, seed: int) -> list[dict]:
    if strategy in ONE_SHOT:
        return one_shot(problem, ref, strategy, budgets, seed)
    return sequential(problem, ref, strategy, budgets, seed)


def nsga_evaluations(problem: Problem, ref, target: float, seed: int, pop_size: int = 40,
                     max_evals: int = 20000) -> float:
    """Evaluations NSGA-II on the noise-free truth needs until the normalised IGD of its feasible,
    non-dominated archive is at or below ``target`` (``inf`` when not within ``max_evals``).

    pymoo's NSGA-II with its default operators (SBX crossover, polynomial mutation; Deb et al. 2002),
    run generation by generation and stopped once the target is reached.
    """
    from pymoo.algorithms.moo.nsga2 import NSGA2

    record: list = []
    algorithm = NSGA2(pop_size=pop_size)
    algorithm.setup(truth_problem(problem, record), termination=("n_eval", max_evals), seed=seed,
                    verbose=False)
    archive, evals, seen = np.empty((0, len(problem.goals))), 0, 0
    while algorithm.has_next():
        algorithm.next()
        for F, ok in record[seen:]:
            evals += len(F)
            if ok.any():
                archive = non_dominated(np.vstack([archive, F[ok]]))
                if normalised_igd(archive, ref.front) <= target:
                    return float(evals)
        seen = len(record)
    return np.inf


def _study_folder(root: Path, seed: int) -> Path:
    """A study folder holding the bundled reactor's study file with the given seed."""
    folder = root / f"seed{seed}"
    folder.mkdir(parents=True)
    text = (case_dir("reactor") / "study.toml").read_text()
    (folder / "study.toml").write_text(re.sub(r"(?m)^seed = \d+", f"seed = {seed}", text))
    return folder


def _judge_study(folder: Path) -> dict:
    """Window of a study folder (default fit, 95 %), judged against the reactor's truth."""
    study = Study.load(folder)
    win = build_window(study.spec, study.fit(), CONFIDENCE)
    problem = get_problem("reactor")
    out = {"runs": len(study.runs.frame), "completed": len(study.runs.completed()), "found": win.found,
           "volume": 0.0, "precision": np.nan, "run_precision": np.nan}
    if win.found:
        lo, hi = win.coded_box(study.spec)
        out.update(volume=float(np.prod(hi - lo)), precision=box_precision(problem.feasible, lo, hi),
                   run_precision=box_precision(lambda U: problem.run_probability(U) >= CONFIDENCE, lo, hi))
    return out


def campaign_once(root: Path, seed: int, budget: int) -> dict:
    """windowfinder's closed loop (8 initial, batches of 2, 2 workers, aim window) against a one-shot
    space-filling design of the same size, both judged by the same window at 95 %."""
    from windowfinder.cases.reactor.simulator import evaluate

    loop = _study_folder(root / "loop", seed)
    run_campaign(loop, function="windowfinder.cases.reactor.simulator:evaluate", budget=budget, initial=8,
                 batch=2, workers=2, aim="window", progress=lambda line: None)
    shot = _study_folder(root / "oneshot", seed)
    study = Study.load(shot)
    frame = study.design("space-filling", runs=budget)
    for i, row in frame.iterrows():
        out = evaluate({f: row[f] for f in study.spec.factor_names}, seed=run_seed(seed, row["run"]))
        for r, v in out.items():
            frame.at[i, r] = v
    frame["status"] = "done"
    study.add_runs(frame)
    return {"seed": seed, "loop": _judge_study(loop), "oneshot": _judge_study(shot)}
