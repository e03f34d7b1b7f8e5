"""runs.csv as a campaign sees it: re-read before every write, other editors' changes kept, writes atomic.

:class:`RunLedger` appends each issued batch as ``planned`` rows and writes every finished run into the
table at once (planned -> done/failed) by an atomic rewrite. Before every write the file is read again:
rows another editor added or changed meanwhile are kept, a run another editor already filled in is not
overwritten, and a table made invalid by another editor is never written over (the result is parked in
``out/unsaved-runs.csv`` instead). :func:`admissible` keeps out response values the run table could not
read back (outside the range a response's transform allows).
"""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd

from windowfinder.campaign.evaluators import RunOutcome, one_line
from windowfinder.errors import InputError
from windowfinder.inputs.runs import append_runs, format_header, format_rows, next_ids, read_runs, write_atomic, write_runs
from windowfinder.study import Study

UNSAVED = "unsaved-runs.csv"


class RunLedger:
    """runs.csv for a campaign: re-read before every write, other editors' changes kept, writes atomic.

    Parameters
    ----------
    study : Study
        The loaded study; ``study.runs`` is kept up to date with the file.
    """

    def __init__(self, study: Study):
        self.study = study
        self.path = Path(study.runs_path)
        if self.path.suffix.lower() != ".csv":
            raise InputError(f"{self.path.name}: a campaign records runs in a CSV run table; save the "
                             "runs as runs.csv (nothing was changed)")
        self._seen = self._bytes()
        self.issued: dict[str, dict] = {}
        self.conflicts: list[str] = []

    def _bytes(self) -> bytes | None:
        return self.path.read_bytes() if self.path.exists() else None

    def refresh(self) -> Study:
        """Re-read runs.csv if anyone changed it since the campaign last read or wrote it."""
        now = self._bytes()
        if now != self._seen:
            self.study.runs = read_runs(self.path, self.study.spec)
            self._seen = now
        return self.study

    def _wrote(self) -> None:
        self._seen = self._bytes()
        self.study.runs = read_runs(self.path, self.study.spec)

    def add(self, frame: pd.DataFrame) -> pd.DataFrame:
        """Append rows as ``planned`` with fresh run ids; returns them as written."""
        study = self.refresh()
        taken = [*study.runs.frame["run"].astype(str), *self.issued]
        frame = frame.copy()
        frame["run"] = next_ids(taken, len(frame))
        frame["status"] = "planned"
        append_runs(self.path, study.spec, frame)
        self._wrote()
        for rec in frame.to_dict("records"):
            self.issued[rec["run"]] = rec
        return frame

    def record(self, outcome: RunOutcome) -> str:
        """Write one result into runs.csv (atomic rewrite); returns the status written or 'conflict'."""
        spec = self.study.spec
        try:
            study = self.refresh()
        except InputError as e:
            where = self._park(outcome)
            raise InputError(f"{self.path.name} was changed by another editor and is no longer valid "
                             f"({e}); the campaign stopped without touching it; fix it and rerun "
                             f"(the result of run {outcome.run} is in {where})") from None
        frame = study.runs.frame.copy()
        rows = frame.index[frame["run"].astype(str) == outcome.run]
        if len(rows) and frame.loc[rows[0], "status"] != "planned":
            self.conflicts.append(f"run {outcome.run}: already {frame.loc[rows[0], 'status']} in "
                                  f"{self.path.name} (another editor); campaign result not written")
            return "conflict"
        if not len(rows):  # another editor removed the planned row; the run happened, so record it
            rec = dict(self.issued.get(outcome.run, {"run": outcome.run}))
            rec["note"] = one_line("; ".join(filter(None, [str(rec.get("note", "") or ""),
                                                            "row re-added by the campaign"])))
            frame = pd.concat([frame, pd.DataFrame([rec])], ignore_index=True)
            rows = frame.index[frame["run"].astype(str) == outcome.run]
        i = rows[0]
        values, note = admissible(spec, outcome)
        for name, v in values.items():
            frame.loc[i, name] = v
        old = frame.loc[i, "note"]
        old = "" if not isinstance(old, str) else old
        frame.loc[i, "note"] = one_line("; ".join(filter(None, [old, note])))
        frame.loc[i, "status"] = outcome.status
        write_runs(self.path, spec, frame)
        self._wrote()
        return outcome.status

    def _park(self, outcome: RunOutcome) -> Path:
        """Append a result that could not be written to runs.csv to ``out/unsaved-runs.csv``."""
        path = self.study.out / UNSAVED
        rec = {**self.issued.get(outcome.run, {}), **outcome.responses, "run": outcome.run,
               "status": outcome.status, "note": outcome.note}
        header = ["run", *self.study.spec.factor_names, *self.study.spec.response_names, "status", "note"]
        old = path.read_text(encoding="utf-8") if path.exists() else format_header(header)
        write_atomic(path, old + format_rows(pd.DataFrame([rec]), header))
        return path


def admissible(spec, outcome: RunOutcome) -> tuple[dict, str]:
    """Response values the run table accepts, and the run's note.

    A value beyond the range a response's transform allows (``log``: below its lower bound, 0 by
    default; ``logit``: outside its bounds) would make runs.csv unreadable; it is kept as "not measured"
    and named in the note. A value exactly at a bound is recorded as measured (the models fit it just
    inside the bound, :mod:`windowfinder.models.transform`).
    """
    values, notes = {}, [outcome.note]
    for r in spec.responses:
        v = outcome.responses.get(r.name)
        if v is None:
            continue
        lo, hi = r.bounds if r.bounds else (0.0, math.inf)
        bad = (r.transform == "logit" and not lo <= v <= hi) or (r.transform == "log" and not v >= lo)
        if bad:
            notes.append(f"{r.name} = {v:g} rejected (transform '{r.transform}' needs values within "
                         f"[{lo:g}, {hi:g}])")
        else:
            values[r.name] = v
    return values, "; ".join(filter(None, notes))


__all__ = ["UNSAVED", "RunLedger", "admissible"]
