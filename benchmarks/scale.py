"""Scale: wall time and peak memory of the full cycle from 30 to 2,000 runs.

Full cycle = load the study, fit one GP per response with leave-one-out diagnostics, find the window,
search the trade-off and propose 4 next runs, on the synthetic study of :mod:`benchmarks.speed` (three
limited responses, two goals). Each size runs in a fresh Python process (single-threaded BLAS), so its
peak resident memory (``getrusage(RUSAGE_SELF).ru_maxrss``) is its own; the memory after imports and
data generation is given too. The largest size is then profiled (cProfile, one profile per stage, in
another fresh process) and the hottest functions of each stage are listed.
``main(quick)`` returns the Markdown section; figures are printed as they come, never asserted.
"""

from __future__ import annotations

import cProfile
import json
import os
import pstats
import resource
import subprocess
import sys
import tempfile
import time

SIZES = ((30, 2), (60, 4), (200, 6), (1000, 8), (2000, 10))
QUICK_SIZES = ((30, 2), (60, 4), (200, 6))
TARGETS = {(60, 4): 10.0, (2000, 10): 120.0}   # seconds, full cycle
MEMORY_TARGET_MB = 2048.0
STAGES = ("fit", "window", "tradeoff", "suggest")
TOP = 6


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0   # Linux: kilobytes


def cycle(n: int, d: int, profile: bool = False) -> dict:
    """Run the full cycle once in this process; stage times (s), peak RSS (MB) and notes."""
    from windowfinder.answers import build_tradeoff, build_window
    from windowfinder.study import Study

    from .speed import synthetic_study

    out = {"n": n, "d": d}
    with tempfile.TemporaryDirectory() as tmp:
        study = Study.load(synthetic_study(tmp, n, d))
        out["rss_start_mb"] = _rss_mb()
        state = {}
        steps = {"fit": lambda: state.setdefault("fit", study.fit()),
                 "window": lambda: build_window(study.spec, state["fit"]),
                 "tradeoff": lambda: build_tradeoff(study.spec, state["fit"]),
                 "suggest": lambda: study.suggest(4, fit=state["fit"])}
        hot = {}
        for name in STAGES:
            prof = cProfile.Profile() if profile else None
            t0 = time.perf_counter()
            if prof:
                prof.enable()
            result = steps[name]()
            if prof:
                prof.disable()
            out[name] = time.perf_counter() - t0
            state[name] = result
            if prof:
                hot[name] = _hot(prof)
        out["total"] = sum(out[s] for s in STAGES)
        out["rss_peak_mb"] = _rss_mb()
        out["window_message"] = state["window"].message
        out["notes"] = sorted({getattr(m, "note_", "") for m in state["fit"].surrogates.models.values()} - {""})
        out["loo_q2"] = [round(dg.loo_q2, 3) for dg in state["fit"].diagnostics]
        if profile:
            out["hot"] = hot
    return out


def _hot(prof) -> list:
    """The ``TOP`` functions with the most own time: (where, own s, cumulative s, calls)."""
    stats = pstats.Stats(prof).stats
    rows = sorted(stats.items(), key=lambda kv: -kv[1][2])[:TOP]
    return [(f"{os.path.relpath(f, os.getcwd()) if f.startswith('/') else f}:{line}({fn})", tt, ct, nc)
            for (f, line, fn), (cc, nc, tt, ct, _) in rows]


def _child(n, d, profile=False) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    args = [sys.executable, "-m", "benchmarks.scale", "--child", str(n), str(d)] + (["--profile"] if profile else [])
    done = subprocess.run(args, env=env, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"scale child ({n}, {d}) failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _verdict(ok: bool) -> str:
    return "met" if ok else "NOT met"


def main(quick: bool = False) -> str:
    from .speed import load_text, say

    sizes = QUICK_SIZES if quick else SIZES
    say(f"scale: {load_text()}")
    rows = []
    for n, d in sizes:
        r = _child(n, d)
        w = r["window"]
        target = TARGETS.get((n, d))
        say(f"n={n:5d} d={d:2d}: fit {r['fit']:.1f} s, window {w:.1f} s, trade-off {r['tradeoff']:.1f} s, "
            f"suggest {r['suggest']:.1f} s, total {r['total']:.1f} s"
            + (f" (target < {target:g} s: {_verdict(r['total'] < target)})" if target else "")
            + f"; peak RSS {r['rss_peak_mb']:.0f} MB (after loading {r['rss_start_mb']:.0f} MB); "
            f"LOO Q2 {r['loo_q2']}")
        for note in r["notes"]:
            say(f"    model note: {note}")
        rows.append(r)
    n_big, d_big = sizes[-1]
    say(f"profiling n={n_big}, d={d_big} ...")
    prof = _child(n_big, d_big, profile=True)
    for stage in STAGES:
        say(f"  {stage}: " + "; ".join(f"{w} {tt:.1f} s" for w, tt, _, _ in prof["hot"][stage][:3]))
    say(f"scale done; {load_text()}")

    lines = ["## Scale", "",
             "Full cycle (load, fit with LOO diagnostics, window, trade-off, 4 suggestions) on the synthetic "
             "study of the speed section, three limited responses, each size in a fresh process with "
             f"single-threaded BLAS; {load_text()} at the end (other work on the machine slows every "
             "figure). Peak memory is the process's peak resident set size (whole Python process).", "",
             "| runs | factors | fit s | window s | trade-off s | suggest s | total s | time target | "
             "peak RSS MB | memory < 2 GB | LOO Q2 |",
             "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        target = TARGETS.get((r["n"], r["d"]))
        lines.append(
            f"| {r['n']} | {r['d']} | {r['fit']:.1f} | {r['window']:.1f} | {r['tradeoff']:.1f} | "
            f"{r['suggest']:.1f} | {r['total']:.1f} | "
            + (f"< {target:g} s: {_verdict(r['total'] < target)}" if target else "")
            + f" | {r['rss_peak_mb']:.0f} | {_verdict(r['rss_peak_mb'] < MEMORY_TARGET_MB)} | "
            + ", ".join(f"{q:.2f}" for q in r["loo_q2"]) + " |")
    notes = sorted({note for r in rows for note in r["notes"]})
    if notes:
        lines += ["", "Model notes printed by the fit:", ""] + [f"- {note}" for note in notes]
    lines += ["", f"### Where the time goes at {n_big} runs, {d_big} factors (cProfile, own time)", "",
              f"Profiled run: fit {prof['fit']:.1f} s, window {prof['window']:.1f} s, trade-off "
              f"{prof['tradeoff']:.1f} s, suggest {prof['suggest']:.1f} s (profiling adds overhead).", "",
              "| stage | function | own s | cumulative s | calls |", "|---|---|---|---|---|"]
    for stage in STAGES:
        for where, tt, ct, nc in prof["hot"][stage]:
            lines.append(f"| {stage} | `{where}` | {tt:.2f} | {ct:.2f} | {nc} |")
    return "\n".join(lines)


if __name__ == "__main__":
    if "--child" in sys.argv:
        i = sys.argv.index("--child")
        import windowfinder  # noqa: F401  (single-threaded BLAS before numpy loads)

        print(json.dumps(cycle(int(sys.argv[i + 1]), int(sys.argv[i + 2]), profile="--profile" in sys.argv)))
    else:
        print(main(quick="--quick" in sys.argv))
