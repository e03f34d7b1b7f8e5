"""Command-line entry of a bundled case: ``python -m windowfinder.cases.<name> IN OUT [--seed N]``.

It follows the run protocol of :mod:`windowfinder.campaign.commands`, so a bundled simulator can stand
in for any external program in ``windowfinder run DIR --command "python -m windowfinder.cases.reactor
{in} {out}"``:

* ``IN`` is a CSV file with a header ``run`` plus one column per factor (natural units), one row per run;
* ``OUT`` is written with ``run``, one column per response, ``status`` (``done`` | ``failed``) and
  ``note``, one row per input row, in the same order. A run the simulated process fails
  (:class:`~windowfinder.cases.RunFailed`) is written with blank responses, ``status = failed`` and the
  reason in ``note``.

Without ``--seed`` every call draws fresh run-to-run noise, like a real run. With ``--seed N`` the noise
of a run is fixed by ``N`` and its run id (CRC-32 of ``"N:run"``), so reruns agree.

Exit codes: 0 when ``OUT`` was written; 2 for an unreadable ``IN`` (one line on stderr naming the file,
row or column; ``OUT`` is not written).
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
import zlib
from pathlib import Path
from types import ModuleType

from windowfinder.cases import RunFailed
from windowfinder.errors import InputError
from windowfinder.inputs.runs import write_atomic


def read_settings(path: Path, factors: list[str], levels=None) -> list[tuple[str, dict[str, float]]]:
    """Rows of ``IN`` as ``(run id, {factor: value})``; raises InputError naming the row or column.

    ``levels``: ``{factor: level names}`` of categorical factors, whose cells are level names."""
    levels = levels or {}
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
            header = list(rows[0].keys()) if rows else []
    except OSError as e:
        raise InputError(f"{path}: cannot be read ({e.strerror}); pass the input file of the run protocol")
    if not rows:
        raise InputError(f"{path}: no runs in it; give a header and one row per run")
    missing = [c for c in ["run", *factors] if c not in header]
    if missing:
        raise InputError(f"{path}: column(s) {', '.join(missing)} missing; the header needs run, "
                         f"{', '.join(factors)}")
    out = []
    for i, row in enumerate(rows, start=2):
        settings = {}
        for f in factors:
            if f in levels:
                if row[f] not in levels[f]:
                    raise InputError(f"{path}: row {i}, column '{f}' = {row[f]!r} is not one of its levels "
                                     f"{', '.join(levels[f])}")
                settings[f] = row[f]
                continue
            try:
                settings[f] = float(row[f])
            except (TypeError, ValueError):
                raise InputError(f"{path}: row {i}, column '{f}' = {row[f]!r} is not a number") from None
        out.append((str(row["run"]), settings))
    return out


def run_rows(simulator: ModuleType, rows, seed: int | None) -> list[dict]:
    """One simulated run per row; a failed run gets blank responses and the reason as its note."""
    results = []
    for run, settings in rows:
        run_seed = None if seed is None else zlib.crc32(f"{seed}:{run}".encode())
        rec = {"run": run, **{r: "" for r in simulator.RESPONSES}}
        try:
            rec.update({k: repr(v) for k, v in simulator.evaluate(settings, seed=run_seed).items()})
            rec.update(status="done", note="simulated")
        except RunFailed as e:
            rec.update(status="failed", note=f"simulated: {e.reason}")
        except InputError as e:
            rec.update(status="failed", note=str(e))
        results.append(rec)
    return results


def write_results(path: Path, responses: list[str], results: list[dict]) -> None:
    """Write ``OUT`` atomically (:func:`windowfinder.inputs.runs.write_atomic`)."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=["run", *responses, "status", "note"], lineterminator="\n")
    writer.writeheader()
    writer.writerows(results)
    write_atomic(path, buf.getvalue())


def main(simulator: ModuleType, name: str, argv=None) -> int:
    """Run the protocol for ``simulator`` (a case's simulator module); returns the exit code."""
    p = argparse.ArgumentParser(prog=f"python -m windowfinder.cases.{name}",
                                description=f"Simulate runs of the bundled '{name}' case "
                                            "(run protocol: IN has run + factor columns, OUT gets "
                                            "run + responses + status + note).")
    p.add_argument("input", type=Path, help="CSV with run and one column per factor")
    p.add_argument("output", type=Path, help="CSV written with run, responses, status, note")
    p.add_argument("--seed", type=int, default=None, help="fix the noise of each run by this seed "
                                                          "and its run id (default: fresh noise)")
    args = p.parse_args(argv)
    try:
        rows = read_settings(args.input, list(simulator.FACTORS), getattr(simulator, "LEVELS", None))
    except InputError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    write_results(args.output, list(simulator.RESPONSES), run_rows(simulator, rows, args.seed))
    return 0
