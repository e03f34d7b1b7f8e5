"""The example run table of each bundled case, and running planned runs on a case's simulator.

Each case folder ships ``runs.csv``: :data:`EXAMPLE_RUNS` space-filling runs (the study's own
``design("space-filling")`` with the study seed) evaluated on the case's simulator, with each run's noise
fixed by the study seed and its position. ``python -m windowfinder.cases.examples`` rewrites them; the
tests check that the shipped files are exactly what this produces.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import pandas as pd

from windowfinder.cases import CASES, RunFailed, case_dir, load_simulator

#: Runs in each case's example run table: a small space-filling start, as a first campaign would have.
EXAMPLE_RUNS = 12


def simulate_planned(study, case: str, seed: int) -> None:
    """Stand-in for the lab: run every planned run of ``study`` on the case's simulator, record results.

    Run ``i`` (in table order) gets noise seed ``seed * 100003 + i``; a failed run is recorded as
    ``failed`` with the simulator's reason in its note.
    """
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


def example_runs_text(case: str, runs: int = EXAMPLE_RUNS) -> str:
    """Text of the example ``runs.csv`` of ``case``: a seeded space-filling design run on its simulator."""
    from windowfinder.study import STUDY_FILE, Study

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / STUDY_FILE).write_bytes((case_dir(case) / STUDY_FILE).read_bytes())
        study = Study.load(folder)
        study.add_runs(study.design("space-filling", runs=runs))
        study = study.reload()
        simulate_planned(study, case, study.spec.seed)
        return study.runs_path.read_text(encoding="utf-8")


def main() -> int:
    """Rewrite every case's example ``runs.csv``."""
    for case in CASES:
        path = case_dir(case) / "runs.csv"
        path.write_text(example_runs_text(case), encoding="utf-8")
        print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
