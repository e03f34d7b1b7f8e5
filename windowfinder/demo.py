"""``make demo``: the main job end to end on a bundled case.

new (example reactor) -> design (space-filling) -> run the planned runs on the case's simulator ->
fit -> window -> trade-off -> next runs -> test plan -> report, printing where every output is.
Usage: ``python -m windowfinder.demo [FOLDER] [--case NAME]``.
"""

from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path

import pandas as pd

from windowfinder import cli
from windowfinder.cases import RunFailed, load_simulator


def simulate_planned(study, case: str, seed: int) -> None:
    """Stand-in for the lab: run every planned run of ``study`` on the case's simulator."""
    sim = load_simulator(case)
    rows = []
    for i, rec in enumerate(study.runs.planned().to_dict("records")):
        settings = {f: rec[f] for f in study.spec.factor_names}
        try:
            res = sim.evaluate(settings, seed=seed * 100_003 + i)
            rows.append({"run": rec["run"], **res, "status": "done", "note": "simulated"})
        except RunFailed as e:
            rows.append({"run": rec["run"], "status": "failed", "note": f"simulated: {e.reason}"})
    study.record_results(pd.DataFrame(rows))


#: Verbs run after fit, with their options.
AFTER_FIT = (["window"], ["tradeoff"], ["suggest", "--count", "4"], ["testplan"], ["report"])


def step(argv: list[str]) -> None:
    print(f"\n$ windowfinder {' '.join(argv)}", flush=True)
    code = cli.main(argv)
    if code != 0:
        sys.exit(code)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m windowfinder.demo")
    p.add_argument("folder", nargs="?", default="demo-study")
    p.add_argument("--case", default="reactor")
    p.add_argument("--runs", type=int, default=16)
    args = p.parse_args(argv)
    folder = Path(args.folder)
    if folder.exists():
        if not (folder / ".windowfinder-demo").exists():
            print(f"{folder} exists and is not a demo folder; choose another", file=sys.stderr)
            return 2
        shutil.rmtree(folder)
    step(["new", str(folder), "--example", args.case])
    (folder / ".windowfinder-demo").write_text("created by make demo; safe to delete\n")
    step(["design", str(folder), "--method", "space-filling", "--runs", str(args.runs),
                    "--centre", "2"])
    from windowfinder.study import Study

    study = Study.load(folder)
    print(f"\n(simulating the {len(study.runs.planned())} planned runs with the '{args.case}' simulator "
          "in place of the lab)")
    simulate_planned(study, args.case, study.spec.seed)
    step(["check", str(folder)])
    step(["fit", str(folder)])
    import json

    for verb in AFTER_FIT:
        if verb[0] == "testplan" and not json.loads((folder / "out" / "window.json").read_text())["found"]:
            print("\n(no window at this confidence, so no verification plan; see the window step)")
            continue
        step([verb[0], str(folder), *verb[1:]])
    summary(folder)
    return 0


def summary(folder: Path) -> None:
    """The answer in one screen: window table, balanced pick, cautions, where the files are."""
    import json

    out = folder.resolve() / "out"
    win = json.loads((out / "window.json").read_text())
    print("\n" + "=" * 78 + "\nSUMMARY")
    if win["found"]:
        print(f"process window at confidence {win['confidence']:g} "
              f"(lowest P(all limits met) inside = {win['min_probability']:.3f}):")
        for f in win["factors"]:
            print(f"  {f['name']:<16} {f['low']:>10.4g} .. {f['high']:<10.4g} {f['unit']}")
    else:
        print(f"no window at confidence {win['confidence']:g}: {win['message']}")
    trade = pd.read_csv(out / "tradeoff.csv")
    pick = trade[trade["balanced_pick"]]
    if len(pick):
        row = pick.iloc[0]
        names = [c for c in trade.columns if not c.endswith(("_pred", "_lo95", "_hi95"))
                 and c not in ("p_all_limits", "balanced_pick")]
        print("balanced pick: " + ", ".join(f"{n} = {row[n]:.4g}" for n in names)
              + f"  (P(all limits met) = {row['p_all_limits']:.3f})")
    print("cautions:")
    for c in win["cautions"]:
        print(f"  - {c}")
    report = out / "report.html"
    if report.exists():
        print(f"report: {report}")
    print(f"all outputs: {out}")


if __name__ == "__main__":
    sys.exit(main())
