"""The design steps of a study: new designs and top-ups in natural units, on the step grid.

:class:`Planner` is a base class of :class:`windowfinder.study.Study` (its ``design``, ``augment`` and
``snap_allowed`` methods); it reads ``spec``, ``runs``, ``dir`` and ``runs_path`` of the study and does the
work through :mod:`windowfinder.inputs.designs` and :mod:`windowfinder.inputs.slices`. Nothing is written
here: the study appends the planned rows (:meth:`Study.add_runs <windowfinder.study.Study.add_runs>`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from windowfinder.errors import InputError
from windowfinder.inputs import designs
from windowfinder.inputs.runs import next_ids, read_runs
from windowfinder.inputs.spec import MAX_SEED


class Planner:
    """Designs of a study (mixed into :class:`windowfinder.study.Study`)."""

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
        inner = type(self)(self.dir, sub, read_runs(self.dir / "__none__.csv", sub))
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
