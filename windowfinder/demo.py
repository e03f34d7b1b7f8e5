"""``make demo``: the story of a study on a bundled case, in two windows.

1. ``new --example reactor``: the study file and its example run table, 12 space-filling runs done on the
   case's simulator (:mod:`windowfinder.cases.examples`);
2. ``window``: the largest window at the study's confidence from that start;
3. ``run``: the closed loop adds runs chosen by the models (:func:`windowfinder.campaign.run_campaign`
   with the simulator as a Python function, 2 workers) up to the budget;
4. ``window`` again, ``report``;
5. both window volumes, as the share of the factor space each window's ranges span
   (``volume_share`` of :class:`windowfinder.answers.results.ProcessWindow`, read from ``window.json``,
   the same definition for both), and their ratio, then where the report is.

The numbers are whatever the run gives; if the window did not grow, that is what is printed.
Usage: ``python -m windowfinder.demo [FOLDER] [--case NAME] [--budget N]``.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

from windowfinder import cli

MARKER = ".windowfinder-demo"
#: Completed runs after the closed loop: the 12 example runs plus 12 chosen by the models.
BUDGET = 24


def step(argv: list[str]) -> None:
    """Run one CLI verb as a user would type it; stop the demo on a non-zero exit."""
    print(f"\n$ windowfinder {' '.join(argv)}", flush=True)
    code = cli.main(argv)
    if code != 0:
        sys.exit(code)


def window_snapshot(folder: Path) -> dict:
    """The window just written to ``out/window.json`` (kept, because the next window step rewrites it)."""
    return json.loads((folder / "out" / "window.json").read_text(encoding="utf-8"))


def volume(win: dict) -> float:
    """Share of the factor space the window spans (0 when no window was found)."""
    return float(win["volume_share"]) if win["found"] else 0.0


def describe(label: str, win: dict, runs: int) -> str:
    if not win["found"]:
        return f"{label} ({runs} runs): no window at confidence {win['confidence']:g}"
    ranges = ", ".join(f"{f['name']} {f['low']:.4g}..{f['high']:.4g} {f['unit']}" for f in win["factors"])
    return (f"{label} ({runs} runs): {100 * volume(win):.3g} % of the factor space "
            f"(lowest P(all limits met) inside {win['min_probability']:.3f}); {ranges}")


def ratio_line(before: dict, after: dict) -> str:
    """The ratio of the two volumes, or why there is none."""
    v0, v1 = volume(before), volume(after)
    if v0 > 0:
        verdict = "larger" if v1 > v0 else "smaller" if v1 < v0 else "the same size"
        return f"ratio after / start = {v1 / v0:.3g} (the window after the loop is {verdict})"
    if before["found"]:
        flat = [f["name"] for f in before["factors"] if f["high"] <= f["low"]]
        start = f"the start window is a single setting of {', '.join(flat)} (zero volume)"
    else:
        start = "there was no window at the start"
    return f"ratio after / start: none, {start}; " + (
        "after the loop the window has volume" if v1 > 0 else "after the loop it still has none")


def completed(folder: Path) -> int:
    from windowfinder.study import Study

    return len(Study.load(folder).runs.completed())


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m windowfinder.demo")
    p.add_argument("folder", nargs="?", default="demo-study")
    p.add_argument("--case", default="reactor")
    p.add_argument("--budget", type=int, default=BUDGET,
                   help=f"completed runs after the closed loop (default {BUDGET})")
    args = p.parse_args(argv)
    folder = Path(args.folder)
    if folder.exists():
        if not (folder / MARKER).exists():
            print(f"{folder} exists and is not a demo folder; choose another", file=sys.stderr)
            return 2
        shutil.rmtree(folder)
    step(["new", str(folder), "--example", args.case])
    (folder / MARKER).write_text("created by make demo; safe to delete\n")
    step(["check", str(folder)])
    start_runs = completed(folder)
    step(["window", str(folder)])
    before = window_snapshot(folder)
    (folder / "out" / "window-start.json").write_text(json.dumps(before, indent=2), encoding="utf-8")
    step(["run", str(folder), "--function", f"windowfinder.cases.{args.case}.simulator:evaluate",
          "--budget", str(args.budget), "--batch", "2", "--workers", "2", "--aim", "window"])
    end_runs = completed(folder)
    step(["window", str(folder)])
    after = window_snapshot(folder)
    step(["report", str(folder)])
    summary(folder, before, after, start_runs, end_runs)
    return 0


def summary(folder: Path, before: dict, after: dict, start_runs: int, end_runs: int) -> None:
    """Both windows, their volumes by one definition, the ratio, the cautions and the report path."""
    out = folder.resolve() / "out"
    print("\n" + "=" * 78 + "\nSUMMARY  (window volume = share of the factor space its ranges span)")
    print(describe("space-filling start", before, start_runs))
    print(describe("after the closed loop", after, end_runs))
    print(ratio_line(before, after))
    print("cautions:")
    for c in after["cautions"]:
        print(f"  - {c}")
    print(f"report: {out / 'report.html'}")
    print(f"all outputs: {out} (the first window is kept as window-start.json)")


if __name__ == "__main__":
    sys.exit(main())
