"""Window rules compared: which criterion for the window runs grows the trustworthy window fastest.

The same sequential loop as the sample-efficiency section (initial Latin hypercube, batches of 2, the
same judge) with aim window and each rule of :func:`windowfinder.nextruns.suggestions.suggest`: ``edge`` (the
misclassification criterion on the joint feasibility), ``faces`` (the default: expected advance of the
current window's faces) and ``grow`` (faces and confirmed-volume growth anywhere, alternately),
against the space-filling one-shot design of the same size. ``main(quick)`` returns the Markdown.
"""

from __future__ import annotations

import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pandas as pd

from .problems import get_problem, reference
from .sample_efficiency import WORKERS, _fmt, _one_thread, _table, _task, say

FULL = {"problems": ("reactor", "tempering", "gramacy", "c2dtlz2"), "seeds": (1, 2, 3, 4, 5),
        "budgets": {2: (10, 20, 30), 3: (15, 20, 30)}}
QUICK = {"problems": ("gramacy",), "seeds": (1,), "budgets": {2: (10, 14), 3: (15, 20)}}
RULES = ("edge", "grow", "faces")
LABELS = {"space-filling": "space-filling one-shot + GP", "window:edge": "edge (misclassification)",
          "window:grow": "grow (faces and volume alternately)", "window:faces": "faces (default)"}


def main(quick: bool = False) -> str:
    cfg = QUICK if quick else FULL
    t0 = time.perf_counter()
    strategies = ["space-filling"] + [f"window:{r}" for r in RULES]
    refs = {n: reference(n) for n in cfg["problems"]}
    jobs = [(n, s, seed, cfg["budgets"][get_problem(n).d], refs[n]) for n in cfg["problems"]
            for s in strategies for seed in cfg["seeds"]]
    jobs.sort(key=lambda j: j[1] == "space-filling")     # the long sequential runs first
    with ProcessPoolExecutor(max_workers=WORKERS, initializer=_one_thread) as pool:
        rows = [r for out in pool.map(_task, *zip(*jobs)) for r in out]
    df = pd.DataFrame(rows)
    say(f"window rules: {len(jobs)} runs in {(time.perf_counter() - t0) / 60:.0f} min")
    parts = [
        "## Window rules compared",
        "",
        f"Aim window with each rule of `suggest(..., window_rule=...)`, {len(cfg['seeds'])} seeds, the "
        "sequential loop and judge of the section above (6 / 8 initial Latin-hypercube runs, batches of 2, "
        "claimed 95 % window against the truth), and the space-filling one-shot design of the same size. "
        f"Cells: median recall over seeds (a seed without a window counts 0) / median precision over the "
        f"seeds that found one; {(time.perf_counter() - t0) / 60:.0f} min wall clock on {WORKERS} worker "
        "processes.",
        "",
    ]
    budgets = sorted({b for bs in cfg["budgets"].values() for b in bs})
    header = ["problem", "strategy"] + [f"{b} runs" for b in budgets]
    table = []
    for name in cfg["problems"]:
        for s in strategies:
            sub = df[(df.problem == name) & (df.strategy == s)]
            cells = []
            for b in budgets:
                at = sub[sub.budget == b]
                if not len(at):
                    cells.append("")
                    continue
                prec = at.loc[at.found.astype(bool), "precision"]
                cells.append(f"{_fmt(float(np.median(at.recall)))} / "
                             f"{_fmt(float(np.median(prec)) if len(prec) else None)}")
            table.append([name, LABELS[s]] + cells)
    parts.append(_table(header, table))
    say(parts[-1])
    return "\n".join(parts) + "\n"
