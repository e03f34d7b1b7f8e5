"""Reading the study file: checks every table and key of study.toml and builds the
:class:`~windowfinder.inputs.spec.StudySpec`.

Validation is strict: an unknown key, a missing name, ``low >= high`` and the like raise
:class:`~windowfinder.errors.InputError` with one line that names the file and the key, so a typo never
passes silently. :meth:`StudySpec.from_toml <windowfinder.inputs.spec.StudySpec.from_toml>` and
:meth:`~windowfinder.inputs.spec.StudySpec.from_dict` are the entry points.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.constraints import Constraint, LinearConstraints, box_range
from windowfinder.inputs.names import name_problem
from windowfinder.inputs.spec import (GOALS, KINDS, MAX_MAGNITUDE, MAX_SEED, MODELS, TRANSFORMS, Factor,
                                      Response, StudySpec)

STUDY_KEYS = ("name", "confidence", "seed", "description")
FACTOR_KEYS = ("name", "unit", "low", "high", "step", "tolerance", "levels")
# Most level combinations of the categorical factors searched one by one (window per combination,
# designs sliced per combination): beyond that a study should be split (common practice, no source).
MAX_LEVEL_COMBINATIONS = 16
RESPONSE_KEYS = ("name", "unit", "goal", "min", "max", "target", "kind", "transform", "bounds", "model",
                 "detection_limit")
CONSTRAINT_KEYS = ("name", "terms", "min", "max")
TOP_KEYS = ("study", "factor", "response", "constraint")
# Finest step accepted, as a share of the factor's range: a million settable levels is beyond any
# instrument, and a finer grid only costs memory (common practice, no source).
MIN_STEP_SHARE = 1e-6


def _short(v, n: int = 60) -> str:
    """``repr`` of a value, cut to ``n`` characters for a one-line message."""
    r = repr(v)
    return r if len(r) <= n else r[: n - 3] + "..."


def _nearest(key: str, valid) -> str:
    return nearest(key, valid)


@dataclass
class _Parser:
    source: str
    names: set = field(default_factory=set)

    def fail(self, where: str, what: str):
        raise InputError(f"{self.source}: {where}: {what}")

    @staticmethod
    def where(kind: str, t, i: int) -> str:
        n = t.get("name") if isinstance(t, dict) else None
        return f"[[{kind}]] '{n}'" if isinstance(n, str) and n.strip() else f"[[{kind}]] #{i}"

    def keys(self, table: dict, valid, where: str):
        if not isinstance(table, dict):
            self.fail(where, "expected a table of keys")
        for k in table:
            if k not in valid:
                self.fail(where, f"unknown key '{k}'; {_nearest(k, valid)}")

    def number(self, table, key, where, default=None, required=False):
        if key not in table:
            if required:
                self.fail(where, f"missing key '{key}'; add {key} = <number>")
            return default
        v = table[key]
        ok = isinstance(v, (int, float)) and not isinstance(v, bool)
        if ok and isinstance(v, int):
            ok = abs(v) <= MAX_MAGNITUDE
        if not ok or not math.isfinite(v):
            self.fail(where, f"'{key}' must be a finite number, got {_short(v)}")
        if abs(v) > MAX_MAGNITUDE:
            self.fail(where, f"'{key}' = {v:g} is too large; use units in which it lies within "
                      f"+-{MAX_MAGNITUDE:g}")
        return float(v)

    def text(self, table, key, where, default="", choices=None):
        v = table.get(key, default)
        if not isinstance(v, str):
            self.fail(where, f"'{key}' must be text in quotes, got {_short(v)}")
        if choices is not None and v not in choices:
            self.fail(where, f"'{key}' = {_short(v)} is not one of {', '.join(choices)}; "
                      + nearest(v, choices, "choose from"))
        return v

    def name(self, table, where):
        if "name" not in table:
            self.fail(where, "missing key 'name'; every factor and response needs a name")
        n = self.text(table, "name", where)
        if not n.strip():
            self.fail(where, "'name' is empty")
        problem = name_problem(n)
        if problem:
            self.fail(where, problem)
        if n in self.names:
            self.fail(where, f"duplicate name '{n}'; factor and response names must be unique")
        self.names.add(n)
        return n

    def study(self, data: dict) -> StudySpec:
        self.keys(data, TOP_KEYS, "top level")
        st = data.get("study", {})
        self.keys(st, STUDY_KEYS, "[study]")
        conf = self.number(st, "confidence", "[study]", default=0.95)
        if not 0.0 < conf < 1.0:
            self.fail("[study]", f"confidence = {conf:g} must lie strictly between 0 and 1, e.g. 0.95")
        seed = st.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= MAX_SEED:
            self.fail("[study]", f"seed = {_short(seed)} must be a whole number from 0 to {MAX_SEED}")
        factors = data.get("factor", [])
        responses = data.get("response", [])
        if not isinstance(factors, list) or not factors:
            self.fail("[[factor]]", "no factors; add at least one [[factor]] table")
        if not isinstance(responses, list) or not responses:
            self.fail("[[response]]", "no responses; add at least one [[response]] table")
        fs = tuple(self.factor(t, i + 1) for i, t in enumerate(factors))
        combos = math.prod(len(f.levels) for f in fs if f.is_categorical)
        if combos > MAX_LEVEL_COMBINATIONS:
            self.fail("[[factor]]", f"the categorical factors have {combos} level combinations; at most "
                      f"{MAX_LEVEL_COMBINATIONS} are supported: merge levels or split the study")
        if all(f.is_categorical for f in fs):
            self.fail("[[factor]]", "every factor is categorical; a window needs at least one numeric "
                      "factor with low and high")
        rs = tuple(self.response(t, i + 1) for i, t in enumerate(responses))
        cons = data.get("constraint", [])
        if not isinstance(cons, list):
            self.fail("[[constraint]]", "write each constraint as a [[constraint]] table")
        seen: set = set()
        cs = tuple(self.constraint(t, i + 1, fs, seen) for i, t in enumerate(cons))
        self.jointly_feasible(cs, fs)
        return StudySpec(name=self.text(st, "name", "[study]", default="unnamed study"),
                         description=self.text(st, "description", "[study]"),
                         confidence=conf, seed=seed, factors=fs, responses=rs, source=self.source,
                         constraints=cs)

    def constraint(self, t, i, factors, seen) -> Constraint:
        where = self.where("constraint", t, i)
        self.keys(t, CONSTRAINT_KEYS, where)
        if "name" not in t:
            self.fail(where, "missing key 'name'; name the constraint, e.g. name = \"no burn-through\"")
        name = self.text(t, "name", where).strip()
        if not name:
            self.fail(where, "'name' is empty")
        problem = name_problem(name)   # the name is written into window.md, the report and warnings
        if problem:
            self.fail(where, problem)
        if name in seen:
            self.fail(where, f"duplicate constraint name '{name}'; constraint names must be unique")
        seen.add(name)
        terms = t.get("terms")
        if not isinstance(terms, dict) or not terms:
            self.fail(where, "needs terms = { factor = coefficient, ... } with at least one factor")
        names = [f.name for f in factors]
        coef = {}
        for k in terms:
            if k not in names:
                self.fail(where, f"terms: unknown factor '{k}'; " + _nearest(k, names).replace(
                    "valid keys", "factors are"))
            if next(f for f in factors if f.name == k).is_categorical:
                self.fail(where, f"terms: '{k}' is a categorical factor (levels); a linear constraint "
                          "can only weigh numeric factors")
            coef[k] = self.number(terms, k, f"{where} terms")
        if all(c == 0.0 for c in coef.values()):
            self.fail(where, "every coefficient in terms is 0; give at least one non-zero coefficient")
        lo = self.number(t, "min", where)
        hi = self.number(t, "max", where)
        if lo is None and hi is None:
            self.fail(where, "needs min and/or max: the bound on the sum of coefficient x setting")
        if lo is not None and hi is not None and lo > hi:
            self.fail(where, f"min = {lo:g} must not exceed max = {hi:g}")
        c = [coef.get(f.name, 0.0) for f in factors]
        smallest, largest = box_range(c, [f.low for f in factors], [f.high for f in factors])
        if (hi is not None and smallest > hi) or (lo is not None and largest < lo):
            self.fail(where, f"no setting within the factor bounds meets it: the sum ranges over "
                      f"{smallest:g} .. {largest:g} there; fix the coefficients, min/max or the bounds")
        return Constraint(name=name, terms=coef, min=lo, max=hi)

    def jointly_feasible(self, cs, factors):
        """All constraints together must leave some setting within the bounds (LP feasibility)."""
        if len(cs) < 2:
            return
        lin = LinearConstraints(cs, [f.name for f in factors], [f.low for f in factors],
                                [f.high - f.low for f in factors])
        if lin.feasible_point() is None:
            self.fail("[[constraint]]", "the constraints " + ", ".join(f"'{c.name}'" for c in cs)
                      + " together exclude every setting within the factor bounds; relax one of them")

    def factor(self, t, i) -> Factor:
        where = self.where("factor", t, i)
        self.keys(t, FACTOR_KEYS, where)
        name = self.name(t, where)
        if "levels" in t:
            return self.categorical(t, where, name)
        low = self.number(t, "low", where, required=True)
        high = self.number(t, "high", where, required=True)
        if low >= high:
            self.fail(where, f"low = {low:g} must be below high = {high:g}")
        if high - low <= 1e-9 * max(abs(low), abs(high)):
            self.fail(where, f"low = {low:g} and high = {high:g} are too close to tell apart in floating "
                      "point; widen the range or change units")
        step = self.number(t, "step", where)
        if step is not None and not 0 < step <= high - low:
            self.fail(where, f"step = {step:g} must be > 0 and no larger than high - low")
        if step is not None and step < MIN_STEP_SHARE * (high - low):
            self.fail(where, f"step = {step:g} is finer than a millionth of the range {high - low:g}; use a "
                      "coarser step, or drop 'step' for a continuous setting")
        tol = self.number(t, "tolerance", where, default=0.0)
        if not 0 <= tol < (high - low) / 2:
            self.fail(where, f"tolerance = {tol:g} must be >= 0 and below half the range")
        return Factor(name=name, low=low, high=high, unit=self.text(t, "unit", where),
                      step=step, tolerance=tol)

    def categorical(self, t, where, name) -> Factor:
        """A factor with named levels: no low/high/step/tolerance; 2 or more distinct level names."""
        for key in ("low", "high", "step", "tolerance"):
            if key in t:
                self.fail(where, f"'{key}' cannot go with 'levels' (a categorical factor has named levels, "
                          f"no range); remove '{key}' or 'levels'")
        levels = t["levels"]
        if not isinstance(levels, list) or not all(isinstance(v, str) for v in levels):
            self.fail(where, f"levels = {_short(levels)} must be a list of names in quotes, e.g. "
                      "levels = [\"pure\", \"mix\"]")
        if len(levels) < 2:
            self.fail(where, f"levels = {_short(levels)}: a categorical factor needs at least two levels "
                      "(with one level, leave the factor out of the study)")
        for v in levels:
            if not v.strip():
                self.fail(where, "levels: a level name is empty")
            problem = name_problem(v)
            if problem:
                self.fail(where, f"levels: {problem}")
            if levels.count(v) > 1:
                self.fail(where, f"levels: duplicate level '{v}'; level names must be unique")
        return Factor(name=name, low=0.0, high=float(len(levels) - 1), unit=self.text(t, "unit", where),
                      step=1.0, tolerance=0.0, levels=tuple(levels))

    def response(self, t, i) -> Response:
        where = self.where("response", t, i)
        self.keys(t, RESPONSE_KEYS, where)
        name = self.name(t, where)
        goal = self.text(t, "goal", where, default="none", choices=GOALS)
        lo = self.number(t, "min", where)
        hi = self.number(t, "max", where)
        target = self.number(t, "target", where)
        if lo is not None and hi is not None and lo >= hi:
            self.fail(where, f"min = {lo:g} must be below max = {hi:g}")
        if goal == "none" and lo is None and hi is None:
            self.fail(where, "goal = 'none' and no limit: give a goal, a min or a max, or drop it")
        if goal == "target" and target is None:
            self.fail(where, "goal = 'target' needs target = <value>")
        if goal != "target" and target is not None:
            self.fail(where, f"target given but goal = '{goal}'; set goal = 'target' or drop target")
        kind = self.text(t, "kind", where, default="quality", choices=KINDS)
        transform = self.text(t, "transform", where, default="none", choices=TRANSFORMS)
        model = self.text(t, "model", where, default="auto", choices=MODELS)
        bounds = t.get("bounds")
        if bounds is not None:
            ok = (isinstance(bounds, list) and len(bounds) == 2
                  and all(isinstance(b, (int, float)) and not isinstance(b, bool)
                          and math.isfinite(b) for b in bounds) and bounds[0] < bounds[1])
            if not ok:
                self.fail(where, f"bounds = {_short(bounds)} must be [lower, upper] with lower < upper")
            bounds = (float(bounds[0]), float(bounds[1]))
        if transform == "logit" and bounds is None:
            self.fail(where, "transform = 'logit' needs the physical bounds, e.g. bounds = [0, 100]")
        if transform == "log":
            floor = bounds[0] if bounds else 0.0
            for key, v in (("min", lo), ("max", hi), ("target", target)):
                if v is not None and v <= floor:
                    self.fail(where, f"transform = 'log' needs {key} > {floor:g}")
        if bounds is not None:
            for key, v in (("min", lo), ("max", hi), ("target", target)):
                if v is not None and not bounds[0] <= v <= bounds[1]:
                    self.fail(where, f"{key} = {v:g} lies outside bounds {list(bounds)}")
        if target is not None and ((lo is not None and target < lo) or (hi is not None and target > hi)):
            self.fail(where, f"target = {target:g} lies outside the limits")
        dl = self.number(t, "detection_limit", where)
        floor = bounds[0] if bounds else (0.0 if transform == "log" else None)
        if dl is not None and (dl <= 0 if floor is None else dl <= floor):
            self.fail(where, f"detection_limit = {dl:g} must be above {0 if floor is None else floor:g} (a 0 "
                      "in runs.csv then means 'below the detection limit')")
        if dl is not None and bounds is not None and dl > bounds[1]:
            self.fail(where, f"detection_limit = {dl:g} lies outside bounds {list(bounds)}")
        return Response(name=name, unit=self.text(t, "unit", where), goal=goal, min=lo, max=hi,
                        target=target, kind=kind, transform=transform, bounds=bounds, model=model,
                        detection_limit=dl)
