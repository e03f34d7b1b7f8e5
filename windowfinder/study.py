"""A study on disk: the study file plus its run table, and the steps an engineer takes with them.

``Study`` is the Python API behind the command line: ``Study.load(dir)`` reads and validates
``study.toml`` and ``runs.csv``; ``study.design(...)``, ``study.fit()`` and the later steps return
dataclasses and DataFrames a notebook can use. It only orchestrates: the work is done by the modules
below it in the data flow (designs, surrogate, diagnostics, feasibility, window, trade-off, ...).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from windowfinder.inputs import designs
from windowfinder.errors import InputError
from windowfinder.inputs.names import toml_string
from windowfinder.inputs.runs import FAILED_LIMIT, RunTable, append_runs, next_ids, read_runs, write_runs
from windowfinder.inputs.spec import MAX_SEED, StudySpec
from windowfinder.inputs.storage import ensure_folder, readable_file, write_atomic

STUDY_FILE = "study.toml"
RUNS_FILE = "runs.csv"

TEMPLATE = """\
# windowfinder study file. Units live here, not in the run table's headers.
[study]
name = {name}
confidence = 0.95     # confidence for windows and feasibility
seed = 1              # same inputs + seed -> same outputs

[[factor]]            # one table per setting you control; order = column order everywhere
name = "temperature"
unit = "degC"
low = 40.0
high = 90.0
step = 0.5            # optional: settable resolution
tolerance = 1.0       # optional: +- how tightly operations hold it

[[factor]]
name = "time"
unit = "min"
low = 30.0
high = 180.0
step = 5.0

# [[factor]]          # a choice, not a number: two named levels, no low/high (runs.csv holds the names)
# name = "solvent"
# levels = ["toluene", "heptane"]

# [[constraint]]      # settings that must never be run: a linear limit on numeric factors, natural units
# name = "heat input"
# terms = {{ temperature = 1.0, time = 0.2 }}   # 1.0 * temperature + 0.2 * time
# max = 110.0         # min and/or max

[[response]]          # one table per measured result
name = "yield"
unit = "%"
goal = "maximize"     # maximize | minimize | target | none
min = 80.0            # optional lower limit
kind = "quality"      # quality | safety

[[response]]
name = "impurity"
unit = "%"
goal = "minimize"
max = 2.0
transform = "log"     # none | log | logit (logit needs bounds = [low, high])
"""


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


class Study:
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

    # -- designs ---------------------------------------------------------------------------------
    def design(self, method: str, runs: int | None = None, centre: int | None = None,
               seed: int | None = None, blocks: int | None = None) -> pd.DataFrame:
        """A new design in natural units, rounded to each step, in randomised run order.

        ``centre=None`` adds one centre run to Box–Behnken and rotatable central composite designs,
        which cannot support a full quadratic model without one, and none to the others.
        ``blocks``: spread the runs over this many blocks (days, lots), labelled ``B1``, ``B2``, ... in
        the ``block`` column, run order randomised within each block: a space-filling design becomes a
        sliced Latin hypercube (each block a Latin hypercube of its own), any other design is dealt to the
        blocks in farthest-point order (:mod:`windowfinder.inputs.slices`).
        """
        seed = self.spec.seed if seed is None else seed
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed <= MAX_SEED:
            raise InputError(f"--seed {seed!r}: must be a whole number from 0 to {MAX_SEED}")
        if centre is None:
            centre = 1 if method in ("box-behnken", "ccd-inscribed", "ccd-circumscribed") else 0
        if self.spec.categorical:
            return self._design_by_level(method, runs, centre, seed, blocks)
        block_of = None
        made = self.runs.completed()
        if blocks is not None and len(made) and self.runs.blocks(made) is None:
            raise InputError(f"{self.runs_path.name}: its {len(made)} runs made have no block label; add a "
                             "block column with their labels (day, lot) before designing in blocks")
        if blocks is not None and method == "space-filling":
            from windowfinder.inputs.slices import sliced_latin_hypercube

            n = 10 * self.spec.d if runs is None else int(runs)
            if blocks < 1 or n % blocks:
                raise InputError(f"--runs {n} cannot be split evenly over --blocks {blocks}; use a multiple "
                                 f"of {blocks} (e.g. {max(blocks, n - n % blocks)}) or another block count")
            designs.design_size(method, self.spec.d, runs=n, centre=centre)   # validates the sizes
            U, block_of = sliced_latin_hypercube(self.spec.d, blocks, n // blocks, seed=seed)
            U = designs._with_centre(U, centre)
        else:
            U = designs.make_design(method, self.spec.d, runs=runs, centre=centre, seed=seed)
        if blocks is not None:
            from windowfinder.inputs.slices import spread_over_blocks

            if block_of is None:
                block_of = spread_over_blocks(U, blocks, seed=seed)
            else:   # extra centre runs go to the blocks in turn
                block_of = np.concatenate([block_of, np.arange(centre) % blocks])
        notes: list[str] = []
        if self.spec.constraints:
            X = self._constrained(method, U, centre, seed, notes)
            if blocks is not None:   # the constrained design replaces the layout above: deal it again
                from windowfinder.inputs.slices import spread_over_blocks

                block_of = spread_over_blocks(self.spec.to_coded(X), blocks, seed=seed)
        elif method == "ccd-circumscribed":  # axial runs beyond the bounds on purpose: not clipped
            X = self._on_steps(self.spec.to_natural(U))
        elif method == "space-filling":
            X = self._snap_in_strata(U, len(U) - centre)
        else:
            X = self.spec.round_to_step(self.spec.to_natural(U))
        order = np.random.default_rng(seed).permutation(len(X))
        if block_of is not None:   # blocks in turn, random order inside each (randomised within blocks)
            order = order[np.argsort(block_of[order], kind="stable")]
        X = X[order]
        frame = pd.DataFrame(X, columns=self.spec.factor_names)
        frame.insert(0, "run", next_ids(self.runs.frame["run"], len(frame)))
        if block_of is not None:
            frame["block"] = [f"B{b + 1}" for b in block_of[order]]
        for r in self.spec.response_names:
            frame[r] = np.nan
        frame["status"] = "planned"
        frame["note"] = f"design {method}"
        frame.attrs["notes"] = notes
        return frame

    def augment(self, runs: int, seed: int | None = None) -> pd.DataFrame:
        """``runs`` space-filling runs added to the runs already in the table (made or planned).

        Each new run in turn is the allowed setting (on the step grid, inside every constraint, at a
        level of each categorical factor) farthest from all earlier runs and picks: greedy maximin
        (Johnson, Moore & Ylvisaker 1990; :func:`windowfinder.answers.support.space_filling_batch`). A
        campaign tops its start up with it: a fresh design ignores the runs made and, with the same seed,
        repeated one of them exactly. Planned rows in natural units, note ``design space-filling (added)``.
        """
        from windowfinder.answers.support import space_filling_batch

        spec = self.spec
        seed = spec.seed if seed is None else seed
        frame = self.runs.frame
        X_known = self.runs.X_coded(frame) if len(frame) else np.empty((0, spec.d))
        U = space_filling_batch(X_known, int(runs), spec.d, seed=seed + len(frame), snap=self.snap_allowed)
        out = spec.labelled(pd.DataFrame(spec.round_to_step(spec.to_natural(U)).reshape(-1, spec.d),
                                         columns=spec.factor_names))
        out.insert(0, "run", next_ids(frame["run"], len(out)))
        for r in spec.response_names:
            out[r] = np.nan
        out["status"] = "planned"
        out["note"] = "design space-filling (added)"
        return out

    def snap_allowed(self, U: np.ndarray) -> np.ndarray:
        """Coded settings onto the step grid (and level codes); NaN rows where a constraint is broken."""
        V = self.spec.snap_coded(U)
        V[~self.spec.linear.feasible(V)] = np.nan
        return V

    def _design_by_level(self, method: str, runs, centre: int, seed: int, blocks) -> pd.DataFrame:
        """A design balanced over the levels of the categorical factors (each level combination a slice).

        Space-filling without constraints: a sliced Latin hypercube over the numeric factors, one slice
        per level combination (Qian 2012, :mod:`windowfinder.inputs.slices`): each slice and their union
        are Latin hypercubes. Otherwise the design of the numeric factors is made once per combination
        (classical designs replicated per level; constrained and unevenly split space-filling designs
        drawn per level, counts within one). ``runs`` and ``centre`` count all levels together.
        """
        spec = self.spec
        if blocks is not None:
            raise InputError("--blocks together with a categorical factor is not supported yet; design "
                             "without --blocks (the runs are already balanced over the levels)")
        combos = spec.level_combinations()
        k = len(combos)
        sub = spec.numeric_part()
        inner = Study(self.dir, sub, read_runs(self.dir / "__none__.csv", sub))
        d_num = sub.d
        n = 10 * spec.d if runs is None and method in ("space-filling", "sobol") else runs
        if method not in ("space-filling", "sobol"):   # sizes in the user's terms: numeric factors, per level
            self._check_size_by_level(method, d_num, k, n)
        # the runs that do not split evenly go to the combinations with the fewest runs in the table
        # so far, so that designs added in turn (a campaign's top-ups) stay balanced too
        have = self.runs.X(self.runs.frame)[:, spec.categorical] if len(self.runs) else np.empty((0, 1))
        rank = np.argsort([int(np.all(have == np.array(c, float), axis=1).sum()) for c in combos], kind="stable")
        first = set(rank[: int(n) % k].tolist()) if n is not None else set()
        per = [None] * k if n is None else [int(n) // k + (i in first) for i in range(k)]
        cen = [centre // k + (i < centre % k) for i in range(k)]
        parts, notes = [], []
        if method == "space-filling" and not spec.constraints and len(set(per)) == 1:
            from windowfinder.inputs.slices import sliced_latin_hypercube

            designs.design_size(method, d_num, runs=per[0], centre=0)   # validates the sizes
            U, slice_of = sliced_latin_hypercube(d_num, k, per[0], seed=seed)
            X = inner._snap_in_strata(U, len(U))
            for i in range(k):
                Xi = X[slice_of == i]
                if cen[i]:
                    Xi = np.vstack([Xi, np.repeat(sub.round_to_step(sub.to_natural(np.full((1, d_num), 0.5))),
                                                  cen[i], axis=0)])
                parts.append(Xi)
            notes.append(f"sliced Latin hypercube: {per[0]} runs per level combination ({k} slices)")
        else:
            for i in range(k):
                if per[i] == 0:   # fewer runs than combinations: only centre runs (if any) here
                    c = sub.round_to_step(sub.to_natural(np.full((1, d_num), 0.5)))
                    parts.append(np.repeat(c, cen[i], axis=0))
                    continue
                f = inner.design(method, runs=per[i], centre=cen[i], seed=seed + i)
                parts.append(f[sub.factor_names].to_numpy(dtype=float))
                notes += [x for x in f.attrs.get("notes", []) if x not in notes]
            notes.append(f"{method} made once per level combination ({k})")
        rows = []
        for combo, Xi in zip(combos, parts):
            full = np.empty((len(Xi), spec.d))
            full[:, spec.numeric] = Xi
            full[:, spec.categorical] = np.array(combo, dtype=float)
            rows.append(full)
        X = np.vstack(rows)
        X = X[np.random.default_rng(seed).permutation(len(X))]
        frame = spec.labelled(pd.DataFrame(X, columns=spec.factor_names))
        frame.insert(0, "run", next_ids(self.runs.frame["run"], len(frame)))
        for r in spec.response_names:
            frame[r] = np.nan
        frame["status"] = "planned"
        frame["note"] = f"design {method}"
        frame.attrs["notes"] = notes
        return frame

    def _check_size_by_level(self, method: str, d_num: int, k: int, runs) -> None:
        """A classical design made once per level combination: its size, or why it cannot be made, said
        in numeric factors, runs per level combination and runs in all (one line)."""
        cats = ", ".join(self.spec.factors[j].name for j in self.spec.categorical)
        try:
            size = designs.design_size(method, d_num)
        except InputError as err:
            raise InputError(str(err).replace(" factors, the study has ", " numeric factors, the study has ")
                             .replace(";", f" (besides the categorical {cats});", 1)) from None
        if method == "ofat" and runs is not None and int(runs) % k:   # its runs choose the levels per factor
            raise InputError(f"--runs {runs}: ofat is made once per level combination of {cats} ({k}); give a "
                             f"multiple of {k} or leave --runs unset")
        if method != "ofat" and runs is not None and int(runs) != size * k:
            raise InputError(f"--runs {runs}: {method} on {d_num} numeric factors has {size} runs per level "
                             f"combination of {cats}, {size * k} in all ({k} combinations); give --runs "
                             f"{size * k} or leave --runs unset")

    def _on_steps(self, X: np.ndarray) -> np.ndarray:
        """Round to each factor's step without clipping to the bounds (circumscribed axial runs)."""
        X = X.copy()
        for j, f in enumerate(self.spec.factors):
            if f.step:
                X[:, j] = np.round(np.round(X[:, j] / f.step) * f.step, 10)
        return X

    def _constrained(self, method: str, U: np.ndarray, centre: int, seed: int, notes: list) -> np.ndarray:
        """A design that meets every constraint between factors, on the step grid.

        Space-filling and Sobol designs: the most space-filling subset (Kennard & Stone 1969, see
        :func:`designs.maximin_subset`) of a large Sobol set rounded to the steps and cut to the allowed
        region. Classical designs: the points that break a constraint are dropped (named in ``notes``).
        Centre runs that break one move to the allowed grid setting nearest the centre.
        """
        spec, lin = self.spec, self.spec.linear
        n = len(U) - centre
        pool = designs.sobol(spec.d, max(4096, 64 * n), seed)
        pool = np.unique(spec.round_to_step(spec.to_natural(pool)), axis=0)
        pool = pool[spec.allowed(pool)]
        if not len(pool):
            raise InputError(f"{spec.source}: no setting on the factor steps meets every [[constraint]]; "
                             "refine a step or relax a constraint")
        if method in ("space-filling", "sobol"):
            Pc = spec.to_coded(pool)
            X = pool[designs.maximin_subset(Pc, n)]
            notes.append(f"{method}: {n} runs chosen by maximin from {len(pool)} distinct allowed settings "
                         f"in a Sobol sample (seed {seed}) rounded to the step grid (the constraints rule out "
                         "a Latin hypercube)")
            if len(np.unique(X, axis=0)) < n:
                notes.append(f"only {len(np.unique(X, axis=0))} distinct allowed settings on the step "
                             f"grid; the other runs repeat them")
        else:
            X = (self._on_steps(spec.to_natural(U[:n])) if method == "ccd-circumscribed"
                 else spec.round_to_step(spec.to_natural(U[:n])))
            ok = spec.allowed(X)
            if (~ok).any():
                names = sorted({c for b in lin.broken(spec.to_coded(X[~ok])) for c in b})
                notes.append(f"{method}: {int((~ok).sum())} of {n} points break constraint(s) "
                             + ", ".join(f"'{c}'" for c in names) + " and were dropped; the design is no "
                             "longer balanced, so consider space-filling instead")
            X = X[ok]
        if centre:
            c = spec.round_to_step(spec.to_natural(np.full((1, spec.d), 0.5)))
            if not spec.allowed(c)[0]:
                Pc = spec.to_coded(pool)
                c = pool[[int(np.argmin(((Pc - 0.5) ** 2).sum(axis=1)))]]
                notes.append("the centre breaks a constraint; centre runs moved to the nearest allowed "
                             "setting: " + ", ".join(f"{f} = {v:g}" for f, v in zip(spec.factor_names, c[0])))
            X = np.vstack([X, np.repeat(c, centre, axis=0)])
        if not len(X):
            raise InputError(f"{method}: every point breaks a [[constraint]]; use --method space-filling")
        return X

    def _snap_in_strata(self, U: np.ndarray, n: int) -> np.ndarray:
        """Round a Latin hypercube to each factor's step without leaving any point's stratum.

        Plain rounding can push a point into a neighbouring stratum and break the one-point-per-stratum
        property (McKay, Beckman & Conover 1979); here each value moves to the nearest step multiple
        inside its own stratum. When the stratum holds no multiple (fewer step levels than runs) the value
        is rounded to the nearest multiple anyway: every run must be settable, so the Latin property
        gives way for that factor.
        """
        X = self.spec.to_natural(U)
        for j, f in enumerate(self.spec.factors):
            if not f.step:
                continue
            for i in range(n):
                s = min(int(np.floor(U[i, j] * n)), n - 1)
                a, b = f.low + s / n * f.span, f.low + (s + 1) / n * f.span
                grid = np.arange(np.ceil(a / f.step - 1e-9), np.floor(b / f.step + 1e-9) + 1) * f.step
                grid = grid[(grid >= a) & ((grid < b) | (s == n - 1)) & (grid <= f.high)]
                if len(grid):
                    X[i, j] = np.round(grid[np.argmin(np.abs(grid - X[i, j]))], 10)
                else:  # fewer levels than runs: the step grid wins over the stratum
                    X[i, j] = f.round(X[i, j])
            X[n:, j] = f.round(X[n:, j])
        return X

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
        from windowfinder.inputs.runs import _raw_rows

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
        p_each, p_joint = feas.probabilities(U)
        out = spec.labelled(frame[spec.factor_names].copy())
        for k, r in enumerate(spec.limited):
            out[f"p_{r.name}"] = p_each[:, k]
        out["p_all_limits"] = np.prod(p_each, axis=1)
        failure = fit.surrogates.failure
        out["p_works"] = np.ones(len(U)) if failure is None else np.ravel(failure.predict_proba(U))
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


def create_study(directory, example: str | None = None, name: str | None = None) -> Path:
    """Create a study folder from the template or a bundled example (never overwrites).

    An example brings its study.toml, README.md and example runs.csv (12 simulated space-filling runs).
    """
    directory = Path(directory)
    target = directory / STUDY_FILE
    if os.path.lexists(target) or readable_file(target, "study file"):
        raise InputError(f"{target}: already exists; choose a new folder (nothing was changed)")
    if example is not None:
        from windowfinder import cases

        names = cases.list_cases()
        if example not in names:
            raise InputError(f"--example '{example}' unknown; bundled examples: {', '.join(names)}")
        src = cases.case_dir(example)
        ensure_folder(directory, "study folder")
        write_atomic(target, (src / STUDY_FILE).read_text(encoding="utf-8"))
        for extra in ("README.md", RUNS_FILE):  # the scenario and its example runs (a space-filling start)
            if (src / extra).exists() and not os.path.lexists(directory / extra):
                write_atomic(directory / extra, (src / extra).read_text(encoding="utf-8"))
        return target
    ensure_folder(directory, "study folder")
    write_atomic(target, TEMPLATE.format(name=toml_string(name or directory.name)))
    return target
