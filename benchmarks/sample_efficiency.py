"""Sample efficiency: how many runs each strategy needs before its 95 % window can be trusted.

Problems with known truth (:mod:`benchmarks.problems`), strategies and the judge
(:mod:`benchmarks.strategies`); this module runs every (problem, strategy, seed) on a local process pool,
summarises medians over seeds, times NSGA-II on the noise-free truth against windowfinder's front, runs
the closed-loop campaign on the bundled reactor and writes the Markdown section.
``main(quick)`` returns the Markdown and prints each table as soon as it is known.
"""

from __future__ import annotations

import os
import resource
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

import numpy as np
import pandas as pd

from . import strategies as st
from .problems import ANALYTIC, SIMULATORS, get_problem, reference

RECALL_TARGET, PRECISION_TARGET = 0.5, 0.95
FULL = {"problems": SIMULATORS + ANALYTIC, "seeds": (1, 2, 3, 4, 5),
        "budgets": {2: (10, 15, 20, 30, 40), 3: (15, 20, 30, 45)},
        "campaign_seeds": (1, 2, 3, 4, 5), "campaign_budget": 30, "nsga_seeds": (1, 2, 3, 4, 5)}
QUICK = {"problems": ("gramacy", "bnh"), "seeds": (1,), "budgets": {2: (10, 20), 3: (15, 30)},
         "campaign_seeds": (1,), "campaign_budget": 12, "nsga_seeds": (1,)}
STRATEGIES = st.ONE_SHOT + st.SEQUENTIAL
WORKERS = min(2, os.cpu_count() or 1)


def say(text: str) -> None:
    print(text, flush=True)


def _fmt(v, digits=2) -> str:
    if v is None or (isinstance(v, float) and np.isnan(v)):
        return "–"
    return "∞" if np.isinf(v) else f"{v:.{digits}f}"


def _table(header, rows) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    return "\n".join(lines + ["| " + " | ".join(str(c) for c in r) + " |" for r in rows])


# -- the grid of experiments ----------------------------------------------------------------------

_LIMITS = []


def _one_thread() -> None:
    """Pool-worker start-up: one BLAS thread per worker process (the matrices are small; threads would
    oversubscribe the cores the other worker needs), whatever imported numpy first."""
    from threadpoolctl import threadpool_limits

    _LIMITS.append(threadpool_limits(limits=1))


def _task(name, strategy, seed, budgets, ref):
    problem = get_problem(name)
    t0 = time.perf_counter()
    rows = st.run_strategy(problem, ref, strategy, budgets, seed)
    secs = time.perf_counter() - t0
    return [{"problem": name, "strategy": strategy, "seed": seed, "seconds": secs, **r} for r in rows]


def run_grid(cfg, refs) -> tuple[pd.DataFrame, list]:
    """Every (problem, strategy, seed) and the reactor campaigns on one process pool.

    Returns one row per (problem, strategy, seed, budget) and the campaign results.
    """
    jobs = [(name, s, seed, cfg["budgets"][get_problem(name).d], refs[name])
            for name in cfg["problems"] for s in STRATEGIES for seed in cfg["seeds"]]
    # problem by problem (so each table prints as soon as it can), the long sequential runs first
    order = {name: i for i, name in enumerate(cfg["problems"])}
    jobs.sort(key=lambda j: (order[j[0]], j[1] not in st.SEQUENTIAL))
    rows, camps, left = [], [], {name: sum(j[0] == name for j in jobs) for name in cfg["problems"]}
    with ProcessPoolExecutor(max_workers=WORKERS, initializer=_one_thread) as pool, \
            tempfile.TemporaryDirectory() as tmp:
        futures = {pool.submit(st.campaign_once, Path(tmp) / f"s{seed}", seed, cfg["campaign_budget"]):
                   ("campaign", seed) for seed in cfg["campaign_seeds"]}
        futures.update({pool.submit(_task, *j): j for j in jobs})
        for fut in as_completed(futures):
            name, *what = futures[fut]
            if name == "campaign":
                camps.append(fut.result())
                _say_campaign(camps[-1])
                continue
            rows += fut.result()
            print(f"  {name} {what[0]} seed {what[1]}: {rows[-1]['seconds']:.0f} s", file=sys.stderr,
                  flush=True)
            left[name] -= 1
            if left[name] == 0:
                frame = pd.DataFrame([r for r in rows if r["problem"] == name])
                say(f"\n{name}: median precision / recall / hypervolume ratio by budget\n"
                    + _detail_table(summarise(frame), get_problem(name).noisy))
    return pd.DataFrame(rows), sorted(camps, key=lambda c: c["seed"])


METRICS = {"truth": ("precision", "recall"), "run": ("run_precision", "run_recall")}


def summarise(df: pd.DataFrame) -> pd.DataFrame:
    """Medians over seeds per (problem, strategy, budget); precisions over the seeds that found a window."""
    g = df.groupby(["problem", "strategy", "budget"], sort=False)
    out = g.agg(found=("found", "mean"), recall=("recall", "median"), run_recall=("run_recall", "median"),
                hv_ratio=("hv_ratio", "median"), igd=("igd", "median"), seeds=("seed", "count"))
    for col in ("precision", "run_precision"):
        out[col] = g[[col, "found"]].apply(lambda x, c=col: x.loc[x["found"], c].median())
    return out.reset_index()


def _detail_table(summary: pd.DataFrame, noisy: bool) -> str:
    def cell(r):
        if not noisy:
            return f"{_fmt(r.precision)} / {_fmt(r.recall)} / {_fmt(r.hv_ratio)}"
        return (f"{_fmt(r.precision)} ({_fmt(r.run_precision)}) / {_fmt(r.recall)} ({_fmt(r.run_recall)}) / "
                f"{_fmt(r.hv_ratio)}")

    budgets = sorted(summary["budget"].unique())
    rows = []
    for s in STRATEGIES:
        part = summary[summary["strategy"] == s].set_index("budget")
        if not part.empty:
            rows.append([st.LABELS[s]] + [cell(part.loc[b]) if b in part.index else "–" for b in budgets])
    return _table(["strategy"] + [f"{b} runs" for b in budgets], rows)


def runs_needed(summary: pd.DataFrame, kind: str = "truth") -> pd.DataFrame:
    """Smallest budget whose median recall >= 0.5 and median precision >= 0.95 (inf when none);
    ``kind="run"`` uses the run-level precision and the recall of the perfect-model window."""
    precision, recall = METRICS[kind]
    out = []
    for (p, s), part in summary.groupby(["problem", "strategy"], sort=False):
        ok = part[(part[recall] >= RECALL_TARGET) & (part[precision] >= PRECISION_TARGET)]
        out.append({"problem": p, "strategy": s, "runs": float(ok["budget"].min()) if len(ok) else np.inf,
                    "max_budget": int(part["budget"].max())})
    return pd.DataFrame(out)


def _runs_text(runs, max_budget) -> str:
    return f"> {max_budget}" if np.isinf(runs) else f"{int(runs)}"


def _ratio_text(base, top, wf) -> tuple[str, float]:
    """``base / wf`` as text, and the value it proves (a lower bound when only windowfinder reached the
    target; NaN when windowfinder did not reach it)."""
    if np.isinf(wf):
        return ("neither reached it" if np.isinf(base) else f"< {base / top:.2f}"), np.nan
    if np.isinf(base):
        return f"> {top / wf:.2f}", top / wf
    return f"{base / wf:.2f}", base / wf


# -- NSGA-II on the truth ---------------------------------------------------------------------------

NSGA_POPS = (40, 100)  # a small population, and pymoo's default


def nsga_table(df, refs, cfg) -> tuple[str, dict]:
    """Evaluations NSGA-II on the noise-free truth needs to match windowfinder's median IGD."""
    rows, ratios = [], {pop: [] for pop in NSGA_POPS}
    top = df[df["budget"] == df.groupby("problem")["budget"].transform("max")]
    for name in cfg["problems"]:
        p = get_problem(name)
        if len(p.goals) < 2:
            continue
        part = top[(top["problem"] == name) & (top["strategy"] == "tradeoff")]
        wf_igd, wf_runs = float(part["igd_default"].median()), int(part["budget"].max())
        if not np.isfinite(wf_igd):
            rows.append([name, wf_runs, "∞ (no truly feasible front point)"] + ["–"] * len(NSGA_POPS))
            continue
        cells = []
        for pop in NSGA_POPS:
            need = float(np.median([st.nsga_evaluations(p, refs[name], wf_igd, seed, pop_size=pop)
                                    for seed in cfg["nsga_seeds"]]))
            ratios[pop].append(need / wf_runs)
            cells.append(f"{_runs_text(need, 20000)} (x{_fmt(need / wf_runs, 1)})")
        rows.append([name, wf_runs, _fmt(wf_igd, 3), *cells])
        say(f"NSGA-II {name}: windowfinder IGD {wf_igd:.3f} with {wf_runs} runs; NSGA-II evaluations "
            + ", ".join(f"population {pop}: {c}" for pop, c in zip(NSGA_POPS, cells)))
    header = ["problem", "windowfinder runs", "windowfinder IGD (median)"] + [
        f"NSGA-II evaluations, population {pop} (ratio)" for pop in NSGA_POPS]
    return _table(header, rows), ratios


# -- the closed-loop campaign on the reactor --------------------------------------------------------

def _say_campaign(r: dict) -> None:
    a, b = r["loop"], r["oneshot"]
    say(f"reactor campaign seed {r['seed']}: closed loop precision {_fmt(a['precision'])}, volume "
        f"{a['volume']:.2e}, runs.csv rows {a['runs']}; one-shot precision {_fmt(b['precision'])}, volume "
        f"{b['volume']:.2e}")


def campaign_table(camps, budget, ref) -> tuple[str, dict]:
    def judged(r):
        return (f"{_fmt(r['precision'])} ({_fmt(r['run_precision'])})",
                f"{_fmt(r['volume'] / ref.box_volume)} ({_fmt(r['volume'] / ref.run_volume)})")

    rows, ratios = [], []
    for r in camps:
        a, b = r["loop"], r["oneshot"]
        ratio = a["volume"] / b["volume"] if b["volume"] > 0 else (np.inf if a["volume"] > 0 else np.nan)
        ratios.append(ratio)
        rows.append([r["seed"], a["runs"], *judged(a), *judged(b), _fmt(ratio)])
    stats = {"precise": sum(r["loop"]["found"] and r["loop"]["precision"] >= 0.9 for r in camps),
             "bigger": sum(bool(x >= 1.5) for x in ratios), "n": len(camps), "budget": budget,
             "exact": sum(r["loop"]["runs"] == r["loop"]["completed"] == budget for r in camps),
             "median_ratio": float(np.median(ratios)) if ratios else np.nan}
    header = ["seed", "runs.csv rows", "closed loop: precision", "closed loop: recall",
              "one-shot: precision", "one-shot: recall", "volume ratio loop / one-shot"]
    return _table(header, rows), stats


# -- the section ------------------------------------------------------------------------------------

def _problems_table(cfg, refs) -> str:
    rows = []
    for name in cfg["problems"]:
        p, r = get_problem(name), refs[name]
        rows.append([name, p.title, p.d, len(p.limits), len(p.goals), "yes" if p.noisy else "no",
                     f"{r.feasible_share:.2f}", f"{r.box_volume:.4f}", f"{r.run_volume:.4f}",
                     "pymoo `pareto_front()`" if p.published_front else "brute force"])
    return _table(["problem", "what", "factors", "limits", "goals", "noisy runs", "feasible share",
                   "largest true window", "largest perfect-model 95 % window", "true front"], rows)


def _needed_table(needed, problems) -> tuple[str, dict]:
    rows, ratios = [], {"space-filling": {}, "ccd": {}}
    for name in problems:
        part = needed[needed["problem"] == name].set_index("strategy")
        top = int(part["max_budget"].max())
        cells = [_runs_text(part.at[s, "runs"], top) for s in STRATEGIES]
        wf = part.at["window", "runs"]
        extra = []
        for base in ("space-filling", "ccd"):
            text, value = _ratio_text(part.at[base, "runs"], top, wf)
            ratios[base][name] = value
            extra.append(text)
        rows.append([name] + cells + extra)
    header = ["problem"] + [st.LABELS[s] for s in STRATEGIES] + ["space-filling / windowfinder (window)",
                                                                  "central composite / windowfinder (window)"]
    return _table(header, rows), ratios


def _honesty_table(df) -> tuple[str, dict]:
    rows, share = [], {}
    for s in STRATEGIES:
        part = df[(df["strategy"] == s) & df["found"]]
        ok, run_ok = part["precision"] >= PRECISION_TARGET, part["run_precision"] >= PRECISION_TARGET
        share[s] = (float(ok.mean()), float(run_ok.mean())) if len(part) else (np.nan, np.nan)
        rows.append([st.LABELS[s], len(part), f"{int(ok.sum())} ({_fmt(share[s][0])})",
                     _fmt(part["precision"].min() if len(part) else np.nan),
                     f"{int(run_ok.sum())} ({_fmt(share[s][1])})",
                     _fmt(part["run_precision"].min() if len(part) else np.nan)])
    return _table(["strategy", "windows claimed", "precision >= 0.95 (share)", "lowest precision",
                   "run-level precision >= 0.95 (share)", "lowest run-level precision"], rows), share


def _verdict(ratios, share, nsga_ratios, camp) -> list[str]:
    def met(flag):
        return "**met**" if flag else "**missed**"

    lines = []
    for base, need in (("space-filling", 2.0), ("ccd", 3.0)):
        n_ok = sum(value >= need for value in ratios[base].values())
        lines.append(f"- windowfinder (aim window) needs <= 1/{need:g} of the runs of {st.LABELS[base]}: "
                     f"{met(n_ok == len(ratios[base]))} (shown on {n_ok} of {len(ratios[base])} problems).")
    aims = ("window", "tradeoff", "balanced")
    for i, what in enumerate(("precision", "run-level precision")):
        lines.append(f"- stated confidence honest ({what} >= 0.95 in >= 90 % of claimed windows): "
                     + ", ".join(f"aim {a} {_fmt(share[a][i])}" for a in aims)
                     + f": {met(all(share[a][i] >= 0.9 for a in aims))}.")
    for pop, values in nsga_ratios.items():
        if values:
            lines.append(f"- >= 50x fewer evaluations than NSGA-II (population {pop}) on the truth for the "
                         f"same IGD: measured x{min(values):.1f} to x{max(values):.1f}: "
                         f"{met(all(r >= 50 for r in values))} (reached on {sum(r >= 50 for r in values)} of "
                         f"{len(values)} problems where windowfinder's front had a truly feasible point).")
    n = camp["n"]
    lines.append(f"- reactor closed loop: window >= 90 % truly feasible in {camp['precise']} of {n} seeds, "
                 f">= 1.5x the one-shot window's volume in {camp['bigger']} of {n} (median ratio "
                 f"{_fmt(camp['median_ratio'])}), runs.csv with exactly "
                 f"{camp['budget']} runs in {camp['exact']} of {n}: "
                 f"{met(camp['precise'] == camp['bigger'] == camp['exact'] == n)}.")
    return lines


SETUP = (
    "**How it is measured.** Every strategy ends in runs; the same judge turns them into the claimed 95 % "
    "window (`find_window` on the joint probability that a new run meets every limit, the study's factor "
    "tolerances included) and the claimed trade-off front (`find_tradeoff` at 95 %). GP models use "
    "windowfinder's defaults except {restarts} optimizer restarts (default 5); the trade-off search runs "
    "{pop} x {gen} (default 100 x 150); both for speed. *Precision*: share of the stated window that is "
    "truly feasible (1024 Sobol points in it, noise-free truth). *Recall*: stated window volume / the "
    "largest axis-aligned box whose tolerance-widened box is truly feasible (exhaustive search on a "
    "201^2 / 81^3 grid of the truth). *HV ratio*: hypervolume of the truly feasible points of the claimed "
    "front / that of the true front (reference point: true-front nadir + 10 % of its range; one goal: the "
    "worst feasible value). The bundled simulators give noisy runs (spot welds also fail); the analytic "
    "problems give the noise-free truth. For the noisy problems two more figures, in parentheses: the "
    "*run-level precision* (share of the stated window where a new run truly meets every limit with "
    "probability >= 0.95, from the truth and the simulator's own noise model; failure scatter left out) and "
    "the recall against the *perfect-model window* (the largest box a model that knew the truth and the "
    "noise would state at 95 %). Sequential strategies start from {n2} (2 factors) / {n3} (3 factors) "
    "Latin-hypercube runs and add batches of {batch}; their snapshots at the budgets are nested. One-shot "
    "designs are built anew at each budget. Medians over seeds; precision is the median over the seeds "
    "that found a window; a seed without a window counts recall 0.")


def main(quick: bool = False) -> str:
    cfg = QUICK if quick else FULL
    t0 = time.perf_counter()
    refs = {name: reference(name) for name in cfg["problems"] + ("reactor",)}
    say("largest true windows: " + ", ".join(f"{n} {refs[n].box_volume:.4f} (perfect model at 95 %: "
                                              f"{refs[n].run_volume:.4f})" for n in cfg["problems"]))
    df, camps = run_grid(cfg, refs)
    summary = summarise(df)
    needed_md, ratios = _needed_table(runs_needed(summary), cfg["problems"])
    say("\nruns needed to reach the window target\n" + needed_md)
    noisy = [n for n in cfg["problems"] if get_problem(n).noisy]
    run_md = _needed_table(runs_needed(summary, "run"), noisy)[0] if noisy else ""
    honesty_md, share = _honesty_table(df)
    say("\nprecision of the claimed windows\n" + honesty_md)
    nsga_md, nsga_ratios = nsga_table(df, refs, cfg)
    camp_md, camp = campaign_table(camps, cfg["campaign_budget"], refs["reactor"])
    say("\nreactor closed loop\n" + camp_md)
    minutes = (time.perf_counter() - t0) / 60
    cpu = sum(getattr(resource.getrusage(who), f) for who in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN)
              for f in ("ru_utime", "ru_stime")) / 60
    budgets = "; ".join(f"{d} factors: {', '.join(map(str, b))}" for d, b in cfg["budgets"].items())
    ceiling = [refs[n].run_volume / refs[n].box_volume for n in noisy]
    parts = [
        "## Sample efficiency: runs to a trustworthy window",
        "",
        f"{len(cfg['problems'])} problems with known truth, {len(cfg['seeds'])} seed(s) each, budgets "
        f"{budgets} runs; {minutes:.0f} min wall clock on {WORKERS} worker processes, {cpu:.0f} CPU-minutes "
        "in all (the wall clock grows when other work shares the machine)"
        f"{' (quick mode: reduced sizes, not the published figures)' if quick else ''}.",
        "",
        SETUP.format(restarts=st.N_RESTARTS, pop=st.TRADEOFF_SEARCH["pop_size"],
                     gen=st.TRADEOFF_SEARCH["n_gen"], n2=st.initial_size(2), n3=st.initial_size(3),
                     batch=st.BATCH),
        "",
        "### Problems",
        _problems_table(cfg, refs),
    ]
    if noisy:
        parts += ["", f"With run-to-run noise even a perfect model's 95 % window covers only "
                  f"{min(ceiling):.0%}-{max(ceiling):.0%} of the largest noise-free feasible box "
                  f"({', '.join(noisy)}): there a recall of 0.5 is out of reach for any window whose 95 % "
                  "is honest for new runs."]
    parts += [
        "",
        "### Runs needed to reach the window target",
        "Smallest budget on the grid where the median recall is >= 0.5 and the median precision >= 0.95; "
        "'> N' when no budget up to N reaches it. Ratios: the other strategy's runs over windowfinder's "
        "(aim window); a bound where only one side reached the target.",
        "",
        needed_md,
    ]
    if noisy:
        parts += ["", "The same with run-level precision and recall against the perfect-model window "
                  "(noisy problems):", "", run_md]
    parts += [
        "",
        "### Is the stated 95 % honest?",
        "All windows claimed, pooled over problems, budgets and seeds; run-level precision as above "
        "(equal to precision on the noise-free problems).",
        "",
        honesty_md,
        "",
        "### Detail: median precision / recall / HV ratio",
        "Noisy problems: precision (run-level) / recall (against the perfect-model window) / HV ratio.",
    ]
    for name in cfg["problems"]:
        p = get_problem(name)
        parts += ["", f"**{name}** ({p.title}; largest true window {refs[name].box_volume:.4f} of the coded "
                  f"cube)", "", _detail_table(summary[summary["problem"] == name], p.noisy)]
    parts += [
        "",
        "### NSGA-II run directly on the noise-free truth",
        "windowfinder: aim tradeoff at the largest budget, its claimed front (default search, 100 x 150) "
        "judged on the truth (truly infeasible points dropped), median normalised IGD over seeds. NSGA-II: "
        f"pymoo's operators, population 40 and pymoo's default 100, cumulative feasible archive, median over "
        f"{len(cfg['nsga_seeds'])} "
        "seed(s) of the evaluations until its normalised IGD is at or below windowfinder's; ratio = NSGA-II "
        "evaluations / windowfinder runs.",
        "",
        nsga_md,
        "",
        "### Closed loop on the bundled reactor (3 factors, 3 limits)",
        f"`run_campaign(..., function='windowfinder.cases.reactor.simulator:evaluate', "
        f"budget={cfg['campaign_budget']}, initial=8, batch=2, workers=2, aim='window')` against a one-shot "
        f"{cfg['campaign_budget']}-run space-filling design (`Study.design`), each judged by "
        "`build_window(spec, study.fit(), 0.95)` with windowfinder's full defaults; the study seed is the "
        "row's seed. Precision (run-level) and recall (against the perfect-model window) as above.",
        "",
        camp_md,
        "",
        "### Targets",
        *_verdict(ratios, share, nsga_ratios, camp),
    ]
    return "\n".join(parts)


if __name__ == "__main__":
    print(main(quick="--quick" in sys.argv))
