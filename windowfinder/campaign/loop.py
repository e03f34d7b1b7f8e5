"""The closed loop: propose runs, evaluate them in parallel, record each result, refit, repeat.

A campaign drives a study folder until ``runs.csv`` holds ``budget`` completed (done + failed) runs:

1. planned rows already in ``runs.csv`` are issued first (a crashed campaign resumes with them, so no run
   is duplicated and run ids stay unique);
2. while fewer than ``initial`` runs are completed, a space-filling design tops them up;
3. then batches of ``batch`` proposals (by default ``study.suggest``, which refits the models) follow.

Every issued batch is appended to ``runs.csv`` as ``planned`` rows before any run starts; every finished
run rewrites the table atomically at once (planned -> done/failed), so a crash loses at most the runs in
flight, which the next campaign re-issues. Before every write the file is read again: rows another
editor added or changed meanwhile are kept, a run another editor already filled in is not overwritten,
and a table made invalid by another editor is never written over (the campaign stops and parks the result
in ``out/unsaved-runs.csv``). There is no file lock: an editor saving in the same instant can still race.

Runs are evaluated on a local pool (threads for a command, which is a process of its own; processes for a
Python function) or on a Dask distributed cluster (an existing scheduler, or a local cluster started for
the campaign), taking each result as it completes.
"""

from __future__ import annotations

import math
import sys
import time
import zlib
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from windowfinder.errors import InputError
from windowfinder.campaign.engines import check_count, make_engine
from windowfinder.campaign.commands import CommandEvaluator
from windowfinder.campaign.evaluators import FunctionEvaluator, RunOutcome, one_line
from windowfinder.campaign.ledger import UNSAVED, RunLedger, admissible  # noqa: F401 (re-exported)
from windowfinder.campaign.progress import MISSING_TEXT, VOLUME_METRICS, ModelProgress
from windowfinder.study import Study

AIMS = ("window", "tradeoff", "balanced")


def suggest_runs(study: Study, count: int, aim: str) -> pd.DataFrame:
    """Default proposer: ``study.suggest(count, aim=aim).frame`` (refits the models on the current runs)."""
    return study.suggest(count, aim=aim).frame


def run_seed(study_seed: int, run: str) -> int:
    """Seed of one run, fixed by the study seed and the run id (CRC-32 of both)."""
    return zlib.crc32(f"{study_seed}:{run}".encode())


def default_initial(d: int, budget: int) -> int:
    """Initial space-filling runs: ``10 d`` (Loeppky, Sacks & Welch 2009, Technometrics 51(4)), but at
    most half the budget and at least ``d + 2``, never more than the budget."""
    return min(budget, max(d + 2, min(10 * d, budget // 2)))


@dataclass
class CampaignResult:
    """What a campaign did.

    Attributes
    ----------
    budget : int
    runs_done : int
        Completed (done + failed) runs in runs.csv at the end.
    failed : int
        Failed runs in runs.csv at the end.
    evaluated : int
        Runs evaluated by this call.
    batches : int
        Batches issued by this call (re-issued planned rows and the initial design count as batches).
    elapsed : float
        Wall-clock seconds.
    stopped : str
        Why the loop ended.
    history : list of dict
        One entry per batch: ``batch``, ``source``, ``issued``, ``runs_done``, ``failed``, ``elapsed``
        and one key per progress metric.
    conflicts : list of str
        Results not written because another editor had already filled in the run.
    """

    budget: int
    runs_done: int = 0
    failed: int = 0
    evaluated: int = 0
    batches: int = 0
    elapsed: float = 0.0
    stopped: str = ""
    history: list = field(default_factory=list)
    conflicts: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return asdict(self)

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame(self.history)


class CampaignStopped(RuntimeError):
    """The evaluation engine broke (e.g. a worker process died); rerun the same command to continue."""


# -- the loop ---------------------------------------------------------------------------------------
class Campaign:
    """Closed-loop campaign on a study folder.

    Parameters
    ----------
    evaluator : callable
        ``evaluator(run, settings, seed) -> RunOutcome``, e.g. a
        :class:`~windowfinder.campaign.commands.CommandEvaluator` or
        :class:`~windowfinder.campaign.evaluators.FunctionEvaluator`; it must be picklable for a process pool or Dask.
    budget : int
        Completed (done + failed) runs runs.csv shall hold at the end; never exceeded.
    initial : int or None
        Completed runs before proposals start; missing ones come from a space-filling design.
        Default :func:`default_initial`.
    batch : int
        Runs per proposal round.
    aim : {"window", "tradeoff", "balanced"}
        Passed to the proposer.
    propose : callable or None
        ``propose(study, count, aim) -> DataFrame`` with one natural-unit column per factor (an optional
        ``note`` column is kept); default :func:`suggest_runs`. Settings are rounded to each factor's
        step and clipped to its bounds; run ids are assigned here.
    engine : context manager or None
        From :func:`make_engine`; default a local pool of ``os.cpu_count()`` workers.
    metrics : mapping of str to callable, optional
        ``name -> fn(study) -> float | None`` shown after each batch (e.g. ``"window volume"``,
        ``"front hypervolume"``) and kept in the history. A metric that raises is shown as not available; one that
        returns ``(value, note)`` also has its note printed on a line of its own.
    progress : callable or None
        Receives one line of text per event; default prints to stderr.
    """

    def __init__(self, evaluator: Callable, budget: int, initial: int | None = None, batch: int = 1,
                 aim: str = "balanced", propose: Callable | None = None, engine=None,
                 metrics: Mapping[str, Callable] | None = None,
                 progress: Callable[[str], None] | None = None):
        self.evaluator = evaluator
        self.budget = budget
        self.initial = initial
        self.batch = batch
        self.aim = aim
        self.propose = propose
        self.engine = engine
        self.metrics = metrics
        self.progress = progress

    def _say(self, line: str) -> None:
        if self.progress is None:
            print(line, file=sys.stderr, flush=True)
        else:
            self.progress(line)

    def run(self, study_dir) -> CampaignResult:
        """Run the campaign on ``study_dir`` until runs.csv holds ``budget`` completed runs."""
        t0 = time.monotonic()
        self._warned: set[str] = set()
        check_count("--budget", self.budget, 1)
        check_count("--batch", self.batch, 1)
        if self.aim not in AIMS:
            raise InputError(f"--aim '{self.aim}': choose one of {', '.join(AIMS)}")
        study = Study.load(study_dir)
        initial = default_initial(study.spec.d, self.budget) if self.initial is None else self.initial
        check_count("--initial", initial, 0)
        need = min(initial, self.budget) - len(study.runs.completed())
        if self.initial is None and need > 0 and not len(study.runs.planned()):
            d = study.spec.d
            self._say(f"start design: {need} space-filling run(s) first, to {initial} completed runs "
                      f"(default --initial: 10 per factor = {10 * d}, at most half the budget "
                      f"{self.budget // 2}, at least {d + 2}); give --initial to change it")
        ledger = RunLedger(study)
        res = CampaignResult(budget=self.budget)
        engine = self.engine if self.engine is not None else make_engine(self.evaluator)
        with engine:
            while True:
                study = ledger.refresh()
                runs = study.runs
                room = self.budget - len(runs.completed())
                if room <= 0:
                    res.stopped = f"budget reached: {len(runs.completed())} completed runs"
                    break
                rows, source = self._next_rows(ledger, study, room, initial)
                if rows is None:
                    res.stopped = "the proposer gave no new runs"
                    break
                self._say(f"batch {res.batches + 1}: {len(rows)} run(s) ({source})")
                self._evaluate(engine, ledger, rows, res)
                res.batches += 1
                res.history.append(self._snapshot(ledger.study, res, source, len(rows), t0))
        runs = ledger.refresh().runs
        res.runs_done, res.failed = len(runs.completed()), len(runs.failed())
        res.conflicts = list(ledger.conflicts)
        res.elapsed = time.monotonic() - t0
        self._say(f"campaign finished: {res.runs_done}/{self.budget} runs ({res.failed} failed); "
                  f"{res.stopped}")
        return res

    def _next_rows(self, ledger: RunLedger, study: Study, room: int, initial: int):
        planned = study.runs.planned()
        if len(planned):
            return planned.head(room), "planned rows re-issued"
        need = min(initial, self.budget) - len(study.runs.completed())
        if need > 0:   # a start design, or runs added to those already made (never a repeat of one)
            rows = study.augment(need) if len(study.runs.frame) else study.design("space-filling", runs=need)
            return ledger.add(rows), "space-filling design"
        q = min(self.batch, room)
        propose = self.propose or suggest_runs
        frame = _proposals(study, propose(study, q, self.aim), q, self.aim)
        if frame.empty:
            return None, ""
        return ledger.add(frame), f"proposed, aim {self.aim}"

    def _evaluate(self, engine, ledger: RunLedger, rows: pd.DataFrame, res: CampaignResult) -> None:
        spec = ledger.study.spec
        pending = {}
        for rec in rows.to_dict("records"):
            run = str(rec["run"])
            ledger.issued.setdefault(run, rec)
            # a categorical factor's setting goes to the simulator as its level name
            settings = {f.name: f.label(rec[f.name]) if f.is_categorical else float(rec[f.name])
                        for f in spec.factors}
            pending[engine.submit(self.evaluator, run, settings, run_seed(spec.seed, run))] = run
        for fut in engine.as_completed(pending):
            run = pending[fut]
            try:
                outcome = fut.result()
            except Exception as e:
                if type(e).__name__ != "KilledWorker":  # Dask: the task itself kept killing workers
                    raise CampaignStopped(f"evaluation of run {run} broke the engine ({type(e).__name__}: "
                                          f"{one_line(e, 160)}); runs not finished stay planned in "
                                          "runs.csv; rerun the same command to continue") from e
                outcome = RunOutcome.failed(run, "the run killed its worker process repeatedly")
            if not isinstance(outcome, RunOutcome) or outcome.run != run:
                raise TypeError(f"the evaluator returned {outcome!r} for run {run}; expected a RunOutcome "
                                "of that run")
            status = ledger.record(outcome)
            res.evaluated += 1
            done = len(ledger.study.runs.completed())
            note = f" ({outcome.note})" if outcome.note else ""
            self._say(f"run {run}: {status}{note} - {done}/{self.budget} runs done")

    def _snapshot(self, study: Study, res: CampaignResult, source: str, issued: int, t0: float) -> dict:
        runs = study.runs
        entry = {"batch": res.batches, "source": source, "issued": issued,
                 "runs_done": len(runs.completed()), "failed": len(runs.failed()),
                 "elapsed": time.monotonic() - t0}
        parts = [f"{entry['runs_done']}/{self.budget} runs done ({entry['failed']} failed)"]
        notes = []
        for name, fn in (self.metrics or {}).items():
            try:
                value = fn(study)
                value, note = value if isinstance(value, tuple) else (value, None)
                value = None if value is None or not math.isfinite(float(value)) else float(value)
                if note:
                    notes.append(note)
            except Exception as e:  # a progress figure must not end an expensive campaign
                if name not in self._warned:
                    self._warned.add(name)
                    self._say(f"warning: {name} not available ({type(e).__name__}: {one_line(e, 120)})")
                value = None
            entry[name] = value
            shown = VOLUME_METRICS.get(name, lambda v: f"{v:.4g}")
            missing = MISSING_TEXT.get(name, "not available")
            parts.append(f"{name} " + (missing if value is None else shown(value)))
        self._say(", ".join(parts))
        for note in notes:
            self._say(note)
        return entry


def _proposals(study: Study, frame, count: int, aim: str) -> pd.DataFrame:
    """Proposer output as planned rows: factors rounded to step and clipped to bounds, at most ``count``."""
    spec = study.spec
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"the proposer returned {type(frame).__name__}, expected a DataFrame")
    missing = [f for f in spec.factor_names if f not in frame.columns]
    if missing:
        raise ValueError(f"the proposer's frame lacks factor column(s) {', '.join(missing)}")
    frame = frame.head(count)
    X = spec.level_indices(frame)[spec.factor_names].to_numpy(dtype=float)
    if not np.isfinite(X).all():
        raise ValueError("the proposer returned settings that are not finite numbers")
    out = pd.DataFrame(spec.round_to_step(X).reshape(-1, spec.d), columns=spec.factor_names)
    out.insert(0, "run", "")
    for r in spec.response_names:
        out[r] = np.nan
    out["status"] = "planned"
    out["note"] = (frame["note"].fillna("").astype(str).tolist() if "note" in frame.columns
                   else f"proposed ({aim})")
    if "repeats" in frame.columns:   # a replicate is said so in runs.csv, with the run it repeats
        out["note"] = [n + (f", replicate of {r}" if isinstance(r, str) and r else "")
                       for n, r in zip(out["note"], frame["repeats"])]
    return out


def run_campaign(study_dir, *, command: str | None = None, function=None, budget: int,
                 initial: int | None = None, batch: int = 1, workers: int | None = None,
                 scheduler: str | None = None, dask_local: int | None = None,
                 run_timeout: float | None = None, aim: str = "balanced", propose: Callable | None = None,
                 metrics: Mapping[str, Callable] | None = None,
                 progress: Callable[[str], None] | None = None) -> CampaignResult:
    """Run a closed-loop campaign on ``study_dir`` (the function behind ``windowfinder run``).

    Parameters
    ----------
    study_dir : path-like
        Study folder with study.toml and runs.csv (created when absent).
    command : str, optional
        ``"PROGRAM ARGS {in} {out}"``; see :mod:`windowfinder.campaign.commands` for the file protocol.
    function : str or callable, optional
        ``"module:callable"`` or a callable, ``fn(settings: dict) -> dict`` (optionally ``seed=``).
        Exactly one of ``command`` and ``function``.
    budget, initial, batch, aim, propose, metrics, progress
        See :class:`Campaign`.
    workers, scheduler, dask_local
        See :func:`make_engine`.
    run_timeout : float, optional
        Seconds one command may run (commands only; a Python function cannot be stopped safely).

    Returns
    -------
    CampaignResult

    Raises
    ------
    InputError
        Bad arguments, an unreadable study, a function that cannot be imported; runs.csv is unchanged.
    """
    if (command is None) == (function is None):
        raise InputError("give exactly one of --command \"PROGRAM {in} {out}\" and --function "
                         "module:callable")
    study = Study.load(study_dir)
    spec = study.spec
    if command is not None:
        evaluator = CommandEvaluator(command, spec.factor_names, spec.response_names, timeout=run_timeout)
    else:
        if run_timeout is not None:
            raise InputError("--run-timeout applies to --command only; a Python function cannot be "
                             "stopped safely (make it time out itself, or wrap it as a command)")
        evaluator = FunctionEvaluator(function, spec.response_names)
    if propose is None and metrics is None:
        tracker = ModelProgress()
        propose, metrics = tracker.propose, tracker.metrics()
    engine = make_engine(evaluator, workers=workers, scheduler=scheduler, dask_local=dask_local)
    campaign = Campaign(evaluator, budget, initial=initial, batch=batch, aim=aim, propose=propose,
                        engine=engine, metrics=metrics, progress=progress)
    return campaign.run(study_dir)


__all__ = ["AIMS", "Campaign", "CampaignResult", "CampaignStopped", "ModelProgress", "RunLedger",
           "admissible",
           "default_initial", "make_engine", "run_campaign", "run_seed", "suggest_runs"]
