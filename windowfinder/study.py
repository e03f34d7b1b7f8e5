"""A study on disk: the study file plus its run table, and the steps an engineer takes with them.

``Study`` is the Python API behind the command line: ``Study.load(dir)`` reads and validates
``study.toml`` and ``runs.csv``; ``study.design(...)``, ``study.fit()`` and the later steps return
dataclasses and DataFrames a notebook can use. It only orchestrates: the work is done by the modules
below it in the data flow (designs, surrogate, diagnostics, feasibility, window, trade-off, ...).
The design steps live in :mod:`windowfinder.planner` (a base class of ``Study``); a new study folder is
made by :func:`windowfinder.template.create_study`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from windowfinder.errors import InputError
from windowfinder.inputs.runs import FAILED_LIMIT, RunTable, append_runs, next_ids, read_runs, write_runs
from windowfinder.inputs.spec import StudySpec
from windowfinder.inputs.storage import ensure_folder
from windowfinder.planner import Planner

STUDY_FILE = "study.toml"
RUNS_FILE = "runs.csv"


@dataclass
class FitResult:
    """Fitted models of a study and their leave-one-out diagnostics."""

    surrogates: object
    diagnostics: list = field(default_factory=list)
    X_runs: np.ndarray | None = None
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"responses": [d.to_dict() for d in self.diagnostics], "warnings": self.warnings}

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame([d.to_dict() for d in self.diagnostics])


class Study(Planner):
    """A study folder: ``study.toml`` + ``runs.csv`` (+ ``out/`` for results)."""

    def __init__(self, directory, spec: StudySpec, runs: RunTable):
        self.dir = Path(directory)
        self.spec = spec
        self.runs = runs

    # -- files -----------------------------------------------------------------------------------
    @classmethod
    def load(cls, directory, runs_file: str | None = None) -> "Study":
        directory = Path(directory)
        if not directory.is_dir():
            raise InputError(f"{directory}: no such study folder; create one with 'windowfinder new "
                             f"{directory}'")
        spec = StudySpec.from_toml(directory / STUDY_FILE)
        if runs_file is None:
            runs_path = directory / RUNS_FILE
            if not runs_path.exists() and (directory / "runs.xlsx").exists():
                runs_path = directory / "runs.xlsx"
        else:
            runs_path = directory / runs_file
        return cls(directory, spec, read_runs(runs_path, spec))

    @property
    def runs_path(self) -> Path:
        return self.runs.path or self.dir / RUNS_FILE

    @property
    def out(self) -> Path:
        return self.dir / "out"

    def reload(self) -> "Study":
        return Study.load(self.dir, self.runs_path.name)

    # -- designs: windowfinder.planner.Planner (design, augment, snap_allowed) ---------------------
    # -- runs and results ------------------------------------------------------------------------
    def add_runs(self, frame: pd.DataFrame) -> None:
        """Append rows (e.g. a design or suggestions) to the run table atomically."""
        append_runs(self.runs_path, self.spec, frame)
        self.runs = read_runs(self.runs_path, self.spec)

    def record_results(self, results: pd.DataFrame, replace: bool = True, source: str = "results"):
        """Merge measured results into their runs by run id; rewrite the table atomically.

        See :mod:`windowfinder.inputs.measurements` for the checks; on any refusal nothing is written.
        From code (simulators, scripts) a value already recorded is overwritten by default, as before;
        give ``replace=False`` for the guarded behaviour of ``windowfinder record`` / :meth:`record_file`.
        Returns the :class:`~windowfinder.inputs.measurements.Recorded` summary.
        """
        from windowfinder.inputs.measurements import frame_rows

        return self._record(*frame_rows(results), source=source, replace=replace)

    def record_file(self, path, replace: bool = False):
        """Merge a results file (CSV, or XLSX with openpyxl) into its runs by run id; see :meth:`record_results`."""
        from windowfinder.inputs.cells import _raw_rows

        path = Path(path)
        if not path.exists():
            raise InputError(f"{path}: results file not found; give a CSV with a run column and the "
                             "measured responses")
        return self._record(*_raw_rows(path), source=path.name, replace=replace)

    def _record(self, header, rows, lines, source, replace):
        from windowfinder.inputs.measurements import merge_results

        if self.runs_path.suffix.lower() != ".csv":
            raise InputError(f"{self.runs_path.name}: results are only merged into a CSV run table; save "
                             "it as runs.csv")
        if not len(self.runs):
            raise InputError(f"{self.runs_path.name}: no runs to record results for; plan runs first "
                             "(windowfinder design)")
        rec = merge_results(self.runs, header, rows, lines, source, replace=replace)
        write_runs(self.runs_path, self.spec, rec.frame)
        self.runs = read_runs(self.runs_path, self.spec)
        return rec

    def record_verification(self, verification, plan_path) -> dict:
        """Record a verdict in out/record.json, then append the verification runs to the run table.

        The entry holds the verdict, the UTC time, the filled plan's SHA-256 and the window the plan was
        drawn in (``testplan.window.json``); a confirmed entry becomes the window of record
        (:mod:`windowfinder.export.record`). Its provenance hashes the inputs as they were before the
        runs are appended.
        """
        from windowfinder.export.provenance import MEANING_MEAN, provenance, sha256_of, utc_now
        from windowfinder.export.record import add_entry, read_plan_window

        win = read_plan_window(plan_path, self.out)
        prov = (win or {}).get("provenance", {})
        entry = {"confirmed": bool(verification.confirmed), "verdict": verification.verdict,
                 "verified_utc": utc_now(), "plan": Path(plan_path).name,
                 "plan_sha256": sha256_of(plan_path), "runs": int(len(verification.results)),
                 "window": win,
                 "provenance": provenance(self, prov.get("confidence"),
                                          prov.get("confidence_applies_to") == MEANING_MEAN)}
        self.add_runs(verification.results)  # validates first: a refused append records nothing
        ensure_folder(self.out)
        add_entry(self.out, entry)
        return entry

    def control_plan(self, fit: FitResult | None = None, confidence: float | None = None):
        """Control-plan table of the window of record (else of the current window), with its source.

        Returns ``(frame, source)``: :func:`windowfinder.export.controlplan.control_plan` with the
        current models, and a line naming the window used. Refused when there is no window.
        """
        from windowfinder.answers.results import build_window
        from windowfinder.export.controlplan import control_plan
        from windowfinder.export.files import window_document
        from windowfinder.export.provenance import provenance
        from windowfinder.export.record import of_record

        fit = self.fit() if fit is None else fit
        entry = of_record(self.out)
        if entry is not None:
            window = entry["window"]
            source = f"window of record, verified {entry['verified_utc']}: {entry['verdict']}"
        else:
            win = build_window(self.spec, fit, confidence)
            if not win.found:
                raise InputError(f"no window at confidence {win.confidence:g}, so no control plan: "
                                 f"{win.message}")
            window = window_document(win, provenance(self, win.confidence, win.mean_only, fit))
            source = ("current window, NOT verified: run 'windowfinder testplan' and 'verify' before "
                      "handing it on")
        return control_plan(self.spec, fit, window), source

    # -- models ----------------------------------------------------------------------------------
    def training_data(self):
        """Coded settings of completed runs, measured responses (NaN = not measured), works flags."""
        comp = self.runs.completed()
        X = self.runs.X_coded(comp)
        works = (comp["status"] == "done").to_numpy()
        Y = {r: np.where(works, comp[r].to_numpy(dtype=float), np.nan) for r in self.spec.response_names}
        return X, Y, works

    def censored_data(self):
        """Censored values per response: ``{response: (mask, bound, side)}``.

        Failed runs that name the limit they broke, and values below a detection limit (``<10`` cells).
        ``mask`` runs over the completed runs (the rows of :meth:`training_data`); ``side`` is
        ``"above"`` for a broken max (the value lay above it) and ``"below"`` for a broken min or a
        detection limit; ``bound`` and ``side`` are one value each for broken limits alone, else arrays
        over the masked runs.
        """
        broke = self.runs.broken_limits(self.runs.completed()).to_numpy()
        out = {}
        for r in self.spec.responses:
            for side, bound, word in (("max", r.max, "above"), ("min", r.min, "below")):
                mask = broke == f"{r.name}:{side}"
                if mask.any():
                    if r.name in out:   # both limits of one response named: min and max runs differ
                        raise InputError(f"{self.runs_path.name}: failed runs name both the min and the max of "
                                         f"'{r.name}'; censored values on both sides are not supported, "
                                         f"clear {FAILED_LIMIT} on one side")
                    out[r.name] = (mask, float(bound), word)
        # values below a detection limit ("<10" cells, or 0 with detection_limit) of runs that were done
        done = (self.runs.completed()["status"] == "done").to_numpy()
        for r in self.spec.responses:
            below = self.runs.below(r.name, self.runs.completed())
            dmask = np.isfinite(below) & done
            if not dmask.any():
                continue
            mask = dmask.copy()
            bounds, sides = np.where(dmask, below, np.nan), np.where(dmask, "below", "").astype(object)
            if r.name in out:   # also failed runs past a limit of this response: one censored set
                fmask, fbound, fside = out[r.name]
                mask |= fmask
                bounds[fmask], sides[fmask] = fbound, fside
            out[r.name] = (mask, bounds[mask], sides[mask])
        return out

    def fit(self, kind: str | None = None, n_restarts: int = 5) -> FitResult:
        """Fit one model per response (and a failure model when runs failed); LOO diagnostics.

        ``kind=None`` (what every verb uses) takes each response's ``model`` from study.toml (default
        ``auto``: the best of Gaussian process, full quadratic and reduced polynomial by leave-one-out,
        :mod:`windowfinder.models.choice`); a string overrides it for every response.
        """
        from windowfinder.models.diagnostics import diagnose
        from windowfinder.models.encoding import LevelEncoder
        from windowfinder.models.polynomial import full_terms
        from windowfinder.models.surrogates import Surrogates

        X, Y, works = self.training_data()
        kinds = {r.name: r.model if kind is None else kind for r in self.spec.responses}
        d = self.spec.d
        blocks = self.runs.blocks(self.runs.completed())
        if blocks is not None and any(k not in ("gp", "auto") for k in kinds.values()):
            raise InputError(f"{self.runs_path.name}: the block column needs the Gaussian-process model "
                             "(its random block offsets); set model = 'gp' or 'auto' in study.toml or remove the block column")
        censored = self.censored_data()
        for mask, _, _ in censored.values():   # explained by the limit they broke, not by the failure model
            works = works | mask
        if blocks is not None and censored:
            raise InputError(f"{self.runs_path.name}: censored values (failed_limit, or '<' values below a "
                             "detection limit) together with a block column are not supported yet; clear "
                             "failed_limit (the runs then feed the failure model) or the block column")
        enc = LevelEncoder(self.spec.level_map)
        names = self.spec.term_names   # the polynomial's columns: indicators for categorical factors
        for r in self.spec.responses:
            n = int(np.isfinite(Y[r.name]).sum())
            need = {"quadratic": len(full_terms(len(names), 2, enc.indicators(d), enc.groups(d))) + 1,
                    "linear": len(names) + 2}.get(kinds[r.name], 3)
            if n < need:
                raise InputError(f"{self.runs_path.name}: response '{r.name}' has {n} measured runs; "
                                 f"fitting a {kinds[r.name]} model needs at least {need}; add runs first "
                                 "(windowfinder design)")
        from threadpoolctl import threadpool_limits

        transforms = {r.name: (r.transform, r.bounds) for r in self.spec.responses}
        with threadpool_limits(1, user_api="blas"):  # small matrices: threads cost more than they give
            sur = Surrogates.fit_arrays(X, Y, transforms, works=works if (~works).any() else None,
                                        kind=kinds, n_restarts=n_restarts, seed=self.spec.seed,
                                        blocks=blocks, censored=censored,
                                        categorical=enc)
        diags = []
        for r in self.spec.responses:
            y = Y[r.name]
            # with blocks the model holds the block-corrected values: checks run on those
            y = None if blocks is not None or r.name in censored else y[np.isfinite(y)]
            diags.append(diagnose(sur.models[r.name], y, r.name, self.spec.factor_names,
                                  self.spec.spans, choice=sur.choices.get(r.name),
                                  term_names=names))
        warnings = list(self.runs.warnings)
        ids = self.runs.completed()["run"].astype(str).to_numpy()
        for r in self.spec.responses:
            moved = getattr(sur.models[r.name], "at_bound_", None)
            if moved is not None and moved.any():
                obs = ids[np.isfinite(Y[r.name])]
                at = obs[moved[:len(obs)]]   # censored runs, when any, follow the measured ones
                warnings.append(f"{r.name}: {len(at)} value(s) exactly at a physical bound kept; the "
                                f"{r.transform} transform fits them just inside it (runs "
                                f"{', '.join(at[:10])}{' ...' if len(at) > 10 else ''})")
        for dg in diags:
            warnings += [f"{dg.response}: {w}" for w in dg.warnings]
        for name in censored:
            warnings.append(f"{name}: {sur.models[name].note_}")
        if sur.failure is not None and getattr(sur.failure, "note_", ""):
            warnings.append(f"failure model: {sur.failure.note_}")
        return FitResult(sur, diags, X, warnings)

    def probability(self, settings, fit: FitResult | None = None, mean_only: bool = False) -> pd.DataFrame:
        """Probability that a new run at each of ``settings`` meets each limit, all of them, and works.

        ``settings``: a DataFrame (or a list of dicts) with one column per factor in natural units, level
        names for categorical factors. Returns the settings with ``p_<response>`` for each limited
        response, ``p_all_limits`` (their product: the responses' errors are independent given the
        settings), ``p_works`` (1 without failed runs), ``p_joint`` = ``p_all_limits * p_works`` (the
        figure a window must keep above the confidence) and ``allowed`` (inside the bounds and every
        constraint; outside, the figures are extrapolation). ``mean_only``: for the process mean
        instead of a new run (no run-to-run noise), as ``window --mean``.
        """
        from windowfinder.answers.results import feasibility_of

        spec = self.spec
        frame = pd.DataFrame(settings).reset_index(drop=True)
        missing = [f for f in spec.factor_names if f not in frame.columns]
        if missing:
            raise InputError(f"probability: no column for factor(s) {', '.join(missing)}; give every factor "
                             f"({', '.join(spec.factor_names)}) in natural units, level names for categorical ones")
        if not spec.limited:
            raise InputError(f"{spec.source}: no response has a min or max; there is no limit to meet")
        try:
            X = spec.level_indices(frame)[spec.factor_names].to_numpy(dtype=float)
        except (TypeError, ValueError):
            raise InputError("probability: a numeric factor's setting is not a number") from None
        if not np.isfinite(X).all():
            raise InputError("probability: every setting must be a finite number (or a level name)")
        fit = self.fit() if fit is None else fit
        U = spec.to_coded(X).reshape(-1, spec.d)
        feas = feasibility_of(spec, fit, mean_only)
        _, p_each, p_works, p_joint, _ = feas._chunks(U)   # P(works) as it enters p_joint, predicted once
        out = spec.labelled(frame[spec.factor_names].copy())
        for k, r in enumerate(spec.limited):
            out[f"p_{r.name}"] = p_each[:, k]
        out["p_all_limits"] = np.prod(p_each, axis=1)
        out["p_works"] = np.ones(len(U)) if p_works is None else p_works
        out["p_joint"] = p_joint
        out["allowed"] = np.all((U >= -1e-12) & (U <= 1 + 1e-12), axis=1) & spec.linear.feasible(U)
        return out

    def suggest(self, count: int, aim: str = "balanced", fit: FitResult | None = None,
                confidence: float | None = None, seed: int | None = None) -> NextRuns:
        """The next ``count`` runs that most sharpen the window or improve the trade-off."""
        from windowfinder.answers.results import limits_of
        from windowfinder.nextruns.suggestions import suggest

        fit = self.fit() if fit is None else fit
        spec = self.spec
        confidence = spec.confidence if confidence is None else confidence
        # a fresh candidate set for every state of the run table, reproducible from the seed
        seed = (spec.seed if seed is None else seed) + len(self.runs)
        planned = self.runs.X_coded(self.runs.planned())
        X_known = np.vstack([fit.X_runs, planned]) if len(planned) else fit.X_runs

        sug = suggest(fit.surrogates, limits_of(spec), [(r.name, r.goal, r.target) for r in spec.goals],
                      X_known, count, aim=aim, confidence=confidence, seed=seed, snap=self.snap_allowed,
                      tolerance=spec.tolerances_coded, factor_names=spec.factor_names,
                      study_dir=str(self.dir))
        frame = spec.labelled(sug.to_frame(spec.factor_names,
                                           to_natural=lambda U: spec.round_to_step(spec.to_natural(U))))
        frame.insert(0, "run", next_ids(self.runs.frame["run"], len(frame)))
        frame["repeats"] = self._repeats(frame, sug.replicate)
        return NextRuns(frame, sug.advice, sug.message, sug)

    def _repeats(self, frame: pd.DataFrame, replicate) -> list[str]:
        """For each proposed row flagged a replicate, the id of the completed run it repeats ("" else)."""
        made = self.runs.completed()
        names = self.spec.factor_names
        X_made = self.spec.level_indices(made)[names].to_numpy(float) if len(made) else np.empty((0, len(names)))
        X_new = self.spec.level_indices(frame)[names].to_numpy(float)
        out = []
        for x, rep in zip(X_new, replicate):
            same = np.flatnonzero(np.all(np.isclose(X_made, x, rtol=0, atol=1e-9), axis=1)) if rep else []
            out.append(str(made["run"].iloc[same[0]]) if len(same) else "")
        return out


@dataclass
class NextRuns:
    """Proposed next runs: ``frame`` (run ids, natural settings, aim, expected gain, predictions)."""

    frame: pd.DataFrame
    advice: str
    message: str
    suggestions: object = None

    def to_frame(self) -> pd.DataFrame:
        return self.frame.copy()

    def to_dict(self) -> dict:
        return {"advice": self.advice, "message": self.message, "runs": self.frame.to_dict("records")}

    def planned_rows(self, spec: StudySpec) -> pd.DataFrame:
        rows = self.frame[["run", *spec.factor_names]].copy()
        for r in spec.response_names:
            rows[r] = np.nan
        rows["status"] = "planned"
        rows["note"] = [f"suggested ({a})" + (f", replicate of {r}" if r else "")
                        for a, r in zip(self.frame["aim"], self.frame.get("repeats", [""] * len(self.frame)))]
        return rows
