"""The model each response deserves: Gaussian processes only against ``model = "auto"``.

On each bundled simulator: space-filling designs of two sizes per seed, the response models fitted as
Gaussian processes only (the former default), with ``kind="auto"`` (Gaussian process, full quadratic
or AICc-reduced polynomial by leave-one-out log density) and with the warped GP among auto's candidates
(``choice.AUTO_WARPED``; by leave-one-out log density, :mod:`windowfinder.models.choice`). Reported:
which model auto chose, the held-out error of the models' means against the noise-free truth (RMSE over
1024 Sobol points, as a share of the truth's sd), and the claimed 95 % window judged against the truth as
in the sample-efficiency section. ``main(quick)`` returns the Markdown.
"""

from __future__ import annotations

import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd
from scipy.stats import qmc

from windowfinder.models import choice

from . import strategies as st
from .problems import SIMULATORS, get_problem, reference
from .sample_efficiency import WORKERS, _fmt, _one_thread, _table, say

DEFAULT_AUTO_WARPED = choice.AUTO_WARPED
FULL = {"problems": SIMULATORS, "seeds": tuple(range(1, 7)), "runs": (16, 30)}
QUICK = {"problems": ("tempering",), "seeds": (1,), "runs": (16,)}


def held_out_error(problem, sur, seed):
    """Mean over responses of RMSE(model mean - truth) / sd(truth), where the process works."""
    U = qmc.Sobol(problem.d, scramble=True, seed=seed).random(1024)
    truth = problem.truth(U)
    ok = np.asarray(truth["works"], bool)
    errs = []
    for name, m in sur.models.items():
        t = np.asarray(truth[name], float)[ok]
        pred = m.transform_.inverse(m.predict(U[ok], return_std=False))
        errs.append(float(np.sqrt(np.mean((pred - t) ** 2)) / np.std(t)))
    return float(np.mean(errs))


def _task(name, seed, runs):
    problem, ref = get_problem(name), reference(name)
    X = st.one_shot_design("space-filling", problem.d, runs, seed)
    Y, works = problem.run(X, st.run_seeds(seed, f"space-filling-{runs}", runs))
    rows = []
    for label, kind in (("GP only", "gp"), ("auto", "auto"), ("auto + warped", "auto")):
        t0 = time.perf_counter()
        choice.AUTO_WARPED = label == "auto + warped"
        try:
            sur = st.fit(problem, X, Y, works, kind=kind, seed=seed)
        finally:
            choice.AUTO_WARPED = DEFAULT_AUTO_WARPED
        fit_s = time.perf_counter() - t0
        row = {"problem": name, "runs": runs, "seed": seed, "fit": label, "fit_s": fit_s,
               **st.judge(problem, ref, sur, X, seed)}
        if sur is not None:
            row["error"] = held_out_error(problem, sur, seed)
            row["chosen"] = [c.chosen for c in sur.choices.values()]
        rows.append(row)
    return rows


def main(quick: bool = False) -> str:
    cfg = QUICK if quick else FULL
    t0 = time.perf_counter()
    jobs = [(n, seed, runs) for n in cfg["problems"] for runs in cfg["runs"] for seed in cfg["seeds"]]
    with ProcessPoolExecutor(max_workers=WORKERS, initializer=_one_thread) as pool:
        df = pd.DataFrame([r for out in pool.map(_task, *zip(*jobs)) for r in out])
    minutes = (time.perf_counter() - t0) / 60
    table = []
    for (name, runs, label), g in df.groupby(["problem", "runs", "fit"], sort=False):
        found = g[g.found.astype(bool)]
        honest = int((found.run_precision >= 0.95).sum())
        picks = Counter(k for ks in g["chosen"].dropna() for k in ks) if label != "GP only" else None
        table.append([name, runs, label,
                      ", ".join(f"{k} {v}" for k, v in sorted(picks.items())) if picks else "gp (all)",
                      _fmt(float(g["error"].median())), f"{len(found)} of {len(g)}",
                      f"{honest} of {len(found)}", _fmt(float(g.recall.median())),
                      _fmt(float(g.run_recall.median())), _fmt(float(g.fit_s.median()), 1)])
    header = ["problem", "runs", "models", "chosen (response fits)", "median held-out error (share of sd)",
              "windows found", "run-level precision >= 0.95", "median recall",
              "median recall vs perfect model", "median fit s"]
    parts = ["## Model choice: Gaussian processes only vs `model = \"auto\"`",
             "",
             f"Space-filling designs of {' and '.join(map(str, cfg['runs']))} runs, {len(cfg['seeds'])} seeds "
             "per simulator; every response fitted as a Gaussian process, with the leave-one-out choice "
             "between Gaussian process, full quadratic and AICc-reduced polynomial (auto, the default), and "
             "with the warped Gaussian process among the candidates too (auto + warped, "
             "`choice.AUTO_WARPED`). Held-out error: RMSE of "
             "each model's mean against the noise-free truth on 1024 Sobol points, over the truth's sd, "
             "averaged over the responses. Windows: the claimed 95 % window judged as in the "
             "sample-efficiency section. "
             f"{minutes:.0f} min wall clock on {WORKERS} worker processes.",
             "",
             _table(header, table)]
    say(parts[-1])
    return "\n".join(parts) + "\n"
