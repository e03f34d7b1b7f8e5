"""Noise estimates with and without the GP's prior on the noise variance, and what they do to windows.

On each bundled noisy simulator: a 30-run space-filling design per seed, the GP models fitted twice
(windowfinder's default, with the log-normal prior on the noise variance of
:data:`windowfinder.models.gp.NOISE_PRIOR`; and by maximum likelihood, the prior switched off), the
fitted noise sd compared with the simulator's own, and both claimed 95 % windows judged against the
truth as in the sample-efficiency section. ``main(quick)`` returns the Markdown.
"""

from __future__ import annotations

import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd

from windowfinder.models import gp as surrogate

from . import strategies as st
from .problems import SIMULATORS, get_problem, reference
from .sample_efficiency import WORKERS, _fmt, _one_thread, _table, say

FULL = {"problems": SIMULATORS, "seeds": tuple(range(1, 9)), "runs": 30}
QUICK = {"problems": ("tempering",), "seeds": (1, 2), "runs": 20}
PRIOR = surrogate.NOISE_PRIOR


def true_latent_sd(problem, name):
    """The simulator's noise sd on the model's latent scale where it is one number: additive noise on
    an untransformed response, relative noise on a log-transformed one; None otherwise."""
    noise = problem.noise[name]
    kind = next(r.transform for r in problem.spec.responses if r.name == name)
    if (noise.kind, kind) in (("additive", "none"), ("relative", "log")):
        return noise.sd
    return None


def _task(name, seed, runs):
    problem, ref = get_problem(name), reference(name)
    X = st.one_shot_design("space-filling", problem.d, runs, seed)
    Y, works = problem.run(X, st.run_seeds(seed, f"space-filling-{runs}", runs))
    rows = []
    for label, prior in (("prior (default)", PRIOR), ("maximum likelihood", None)):
        surrogate.NOISE_PRIOR = prior
        try:
            sur = st.fit(problem, X, Y, works, seed=seed)
            row = {"problem": name, "seed": seed, "fit": label, **st.judge(problem, ref, sur, X, seed)}
            for r in problem.spec.responses:
                true = true_latent_sd(problem, r.name)
                if true is not None and sur is not None:
                    row[f"ratio:{r.name}"] = sur.models[r.name].noise_std_ / true
            rows.append(row)
        finally:
            surrogate.NOISE_PRIOR = PRIOR
    return rows


def main(quick: bool = False) -> str:
    cfg = QUICK if quick else FULL
    t0 = time.perf_counter()
    jobs = [(n, seed, cfg["runs"]) for n in cfg["problems"] for seed in cfg["seeds"]]
    with ProcessPoolExecutor(max_workers=WORKERS, initializer=_one_thread) as pool:
        df = pd.DataFrame([r for out in pool.map(_task, *zip(*jobs)) for r in out])
    minutes = (time.perf_counter() - t0) / 60
    table = []
    for (name, label), g in df.groupby(["problem", "fit"], sort=False):
        ratios = ", ".join(f"{c.split(':', 1)[1]} {_fmt(float(g[c].median()))} "
                           f"({_fmt(float(g[c].min()))}-{_fmt(float(g[c].max()))})"
                           for c in g.columns if c.startswith("ratio:") and g[c].notna().any())
        found = g[g.found.astype(bool)]
        honest = int((found.run_precision >= 0.95).sum())
        table.append([name, label, ratios or "–", f"{len(found)} of {len(g)}", f"{honest} of {len(found)}",
                      _fmt(float(g.recall.median())), _fmt(float(g.run_recall.median()))])
    header = ["problem", "fit", "fitted / true noise sd: median (range)", "windows found",
              "run-level precision >= 0.95", "median recall", "median recall vs perfect model"]
    parts = ["## Noise estimates: the prior on the noise variance",
             "",
             f"{cfg['runs']}-run space-filling designs, {len(cfg['seeds'])} seeds per simulator; GP models "
             "fitted with windowfinder's default (log-normal prior on the noise variance: median 1 % of the "
             "standardised variance, a factor 10 per sd) and by maximum likelihood (prior off); fitted noise sd "
             "over the simulator's own, on the model's scale (responses whose noise is one number there); the "
             "claimed 95 % window judged as in the sample-efficiency section. "
             f"{minutes:.0f} min wall clock on {WORKERS} worker processes.",
             "",
             _table(header, table)]
    say(parts[-1])
    return "\n".join(parts) + "\n"
