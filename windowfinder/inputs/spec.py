"""The study file (study.toml): factors, responses, limits and goals.

Parsed with :mod:`tomllib` into frozen dataclasses and validated strictly: an unknown key, a missing name,
``low >= high`` and the like raise :class:`~windowfinder.errors.InputError` with one line that names the
file and the key, so a typo never passes silently. Settings are converted between natural units and coded
units (``[0, 1]`` per factor), in which every model and search works.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.constraints import Constraint, LinearConstraints, bounded_margin, box_range
from windowfinder.inputs.names import name_problem
from windowfinder.inputs.storage import read_bytes, readable_file

GOALS = ("maximize", "minimize", "target", "none")
KINDS = ("quality", "safety")
TRANSFORMS = ("none", "log", "logit")
MODELS = ("auto", "gp", "quadratic", "linear")  # response models (windowfinder.models.choice)

STUDY_KEYS = ("name", "confidence", "seed", "description")
FACTOR_KEYS = ("name", "unit", "low", "high", "step", "tolerance", "levels")
# Most level combinations of the categorical factors searched one by one (window per combination,
# designs sliced per combination): beyond that a study should be split (common practice, no source).
MAX_LEVEL_COMBINATIONS = 16
RESPONSE_KEYS = ("name", "unit", "goal", "min", "max", "target", "kind", "transform", "bounds", "model",
                 "detection_limit")
CONSTRAINT_KEYS = ("name", "terms", "min", "max")
TOP_KEYS = ("study", "factor", "response", "constraint")
# Largest magnitude accepted for a number in the study file: far beyond any physical quantity in sensible
# units, and small enough that squares and differences of such numbers stay finite in float64
# (common practice, no source).
MAX_MAGNITUDE = 1e100
MAX_SEED = 2**32 - 1  # numpy RandomState and scikit-learn accept seeds 0 .. 2**32 - 1
# Finest step accepted, as a share of the factor's range: a million settable levels is beyond any
# instrument, and a finer grid only costs memory (common practice, no source).
MIN_STEP_SHARE = 1e-6


def _short(v, n: int = 60) -> str:
    """``repr`` of a value, cut to ``n`` characters for a one-line message."""
    r = repr(v)
    return r if len(r) <= n else r[: n - 3] + "..."


def _nearest(key: str, valid) -> str:
    return nearest(key, valid)


@dataclass(frozen=True)
class Factor:
    """One setting the engineer controls, with its hard bounds in natural units."""

    name: str
    low: float
    high: float
    unit: str = ""
    step: float | None = None
    tolerance: float = 0.0
    levels: tuple[str, ...] = ()

    @property
    def span(self) -> float:
        return self.high - self.low

    @property
    def is_categorical(self) -> bool:
        """A factor with named levels: natural value = level index (0 .. L-1, step 1), coded index/(L-1)."""
        return bool(self.levels)

    def label(self, x):
        """Level name of a natural value (the level index) of a categorical factor; ``x`` itself else."""
        if not self.levels or isinstance(x, str):
            return x
        return self.levels[int(np.clip(np.round(float(x)), 0, len(self.levels) - 1))]

    def index_of(self, name: str) -> int:
        """Level index of a level name (``InputError`` naming the valid levels when it is not one)."""
        if name not in self.levels:
            raise InputError(f"'{name}' is not a level of factor '{self.name}'; "
                             + nearest(name, self.levels, "levels are"))
        return self.levels.index(name)

    def to_coded(self, x):
        return (np.asarray(x, dtype=float) - self.low) / self.span

    def to_natural(self, u):
        return self.low + np.asarray(u, dtype=float) * self.span

    def round(self, x):
        """Round natural settings to multiples of ``step`` that lie inside the bounds."""
        x = np.asarray(x, dtype=float)
        if not self.step:
            return np.clip(x, self.low, self.high)
        r = np.round(x / self.step) * self.step
        lo = math.ceil(self.low / self.step - 1e-9) * self.step
        hi = math.floor(self.high / self.step + 1e-9) * self.step
        if lo > hi:  # no multiple of step inside the bounds: keep the bounds
            return np.clip(x, self.low, self.high)
        # round away float noise of the multiplication, at least 10 decimals finer than the step
        decimals = max(10, 10 - math.floor(math.log10(self.step)))
        return np.round(np.clip(r, lo, hi), decimals)


@dataclass(frozen=True)
class Response:
    """One measured result, with optional limits (``min``/``max``) and a goal."""

    name: str
    unit: str = ""
    goal: str = "none"
    min: float | None = None
    max: float | None = None
    target: float | None = None
    kind: str = "quality"
    transform: str = "none"
    bounds: tuple[float, float] | None = None
    model: str = "auto"
    detection_limit: float | None = None   # a 0 in runs.csv then reads "below this value" (censored)

    @property
    def has_limits(self) -> bool:
        return self.min is not None or self.max is not None

    @property
    def is_safety(self) -> bool:
        return self.kind == "safety"

    def margin(self, y):
        """Smallest limit margin, ``y - min`` or ``max - y``; a limit is met when it is >= 0."""
        return bounded_margin(y, self.min, self.max)

    def limit_text(self) -> str:
        u = f" {self.unit}" if self.unit else ""
        if self.min is not None and self.max is not None:
            return f"{self.min:g} to {self.max:g}{u}"
        if self.min is not None:
            return f">= {self.min:g}{u}"
        if self.max is not None:
            return f"<= {self.max:g}{u}"
        return "no limit"


@dataclass(frozen=True)
class StudySpec:
    """Everything the study file says: name, confidence, seed, factors and responses."""

    name: str
    factors: tuple[Factor, ...]
    responses: tuple[Response, ...]
    confidence: float = 0.95
    seed: int = 0
    description: str = ""
    source: str = "study.toml"
    constraints: tuple[Constraint, ...] = ()

    # -- names and sizes -------------------------------------------------------------------------
    @property
    def d(self) -> int:
        return len(self.factors)

    @property
    def factor_names(self) -> list[str]:
        return [f.name for f in self.factors]

    @property
    def response_names(self) -> list[str]:
        return [r.name for r in self.responses]

    @property
    def limited(self) -> list[Response]:
        """Responses with at least one limit, safety limits first."""
        lim = [r for r in self.responses if r.has_limits]
        return sorted(lim, key=lambda r: not r.is_safety)

    @property
    def goals(self) -> list[Response]:
        return [r for r in self.responses if r.goal != "none"]

    @property
    def has_safety(self) -> bool:
        return any(r.is_safety for r in self.responses)

    def factor(self, name: str) -> Factor:
        for f in self.factors:
            if f.name == name:
                return f
        raise InputError(f"{self.source}: no factor named '{name}'; factors are "
                         + ", ".join(self.factor_names))

    def response(self, name: str) -> Response:
        for r in self.responses:
            if r.name == name:
                return r
        raise InputError(f"{self.source}: no response named '{name}'; responses are "
                         + ", ".join(self.response_names))

    # -- units -----------------------------------------------------------------------------------
    @property
    def lows(self) -> np.ndarray:
        return np.array([f.low for f in self.factors])

    @property
    def spans(self) -> np.ndarray:
        return np.array([f.span for f in self.factors])

    @property
    def tolerances_coded(self) -> np.ndarray:
        return np.array([f.tolerance / f.span for f in self.factors])

    def to_coded(self, X) -> np.ndarray:
        X = np.atleast_2d(np.asarray(X, dtype=float))
        return (X - self.lows) / self.spans

    def to_natural(self, U) -> np.ndarray:
        U = np.atleast_2d(np.asarray(U, dtype=float))
        return self.lows + U * self.spans

    @property
    def linear(self) -> LinearConstraints:
        """The constraints between factors in coded units (``A u <= b``); empty when there are none."""
        return LinearConstraints(self.constraints, self.factor_names, self.lows, self.spans)

    def allowed(self, X) -> np.ndarray:
        """True for the rows of natural settings ``X`` that meet every constraint between factors."""
        return self.linear.feasible(self.to_coded(X))

    def round_to_step(self, X) -> np.ndarray:
        X = np.atleast_2d(np.asarray(X, dtype=float))
        return np.column_stack([f.round(X[:, j]) for j, f in enumerate(self.factors)])

    def snap_coded(self, U) -> np.ndarray:
        """Coded settings moved onto the factor steps (and into the bounds), still in coded units."""
        return self.to_coded(self.round_to_step(self.to_natural(U)))

    @property
    def has_steps(self) -> bool:
        return any(f.step for f in self.factors)

    # -- categorical factors -----------------------------------------------------------------------
    @property
    def categorical(self) -> list[int]:
        """Column indices of the categorical factors (``levels = [...]``)."""
        return [j for j, f in enumerate(self.factors) if f.is_categorical]

    @property
    def numeric(self) -> list[int]:
        """Column indices of the numeric factors."""
        return [j for j, f in enumerate(self.factors) if not f.is_categorical]

    def level_combinations(self) -> list[tuple[int, ...]]:
        """Every combination of level indices of the categorical factors (one empty tuple when none)."""
        import itertools

        return list(itertools.product(*[range(len(self.factors[j].levels)) for j in self.categorical]))

    def level_codes(self, combo) -> np.ndarray:
        """Coded values of the categorical columns for a combination of level indices."""
        return np.array([i / self.factors[j].span for j, i in zip(self.categorical, combo)], dtype=float)

    @property
    def level_map(self) -> dict[int, tuple[str, ...]]:
        """``{column: level names}`` of the categorical factors (what the models' encoder takes)."""
        return {j: self.factors[j].levels for j in self.categorical}

    @property
    def term_names(self) -> list[str]:
        """Column names for polynomial term tables: a categorical factor has one indicator per level
        after its first, ``supplier[B]``, ``supplier[C]`` (1 at that level, 0 elsewhere; treatment
        coding, :class:`windowfinder.models.encoding.LevelEncoder`)."""
        return [n for f in self.factors
                for n in ([f"{f.name}[{v}]" for v in f.levels[1:]] if f.is_categorical else [f.name])]

    def numeric_part(self) -> "StudySpec":
        """The study without its categorical factors (constraints weigh numeric factors only)."""
        from dataclasses import replace

        return replace(self, factors=tuple(f for f in self.factors if not f.is_categorical))

    def labelled(self, frame):
        """A copy of a table with the categorical factor columns as level names (natural units at the
        edges: runs.csv, next.csv, design.csv, ...); cells already holding a name stay as they are."""
        frame = frame.copy()
        for j in self.categorical:
            f = self.factors[j]
            if f.name in frame.columns:
                frame[f.name] = [v if isinstance(v, str) or v is None or (isinstance(v, float) and
                                 math.isnan(v)) else f.label(v) for v in frame[f.name]]
        return frame

    def level_indices(self, frame):
        """A copy of a table with level names of the categorical factors replaced by their indices (the
        natural values inside); the inverse of :meth:`labelled`."""
        frame = frame.copy()
        for j in self.categorical:
            f = self.factors[j]
            if f.name in frame.columns:
                frame[f.name] = [float(f.index_of(v)) if isinstance(v, str) else v for v in frame[f.name]]
        return frame

    def coded_point(self, values: dict) -> np.ndarray:
        """Coded setting of ``{factor: natural value or level name}``."""
        return self.to_coded([f.index_of(values[f.name]) if f.is_categorical and isinstance(values[f.name], str)
                              else values[f.name] for f in self.factors])[0]

    def point_text(self, values: dict, digits: int = 4) -> str:
        """``a = 1.23, gas = mix``: a setting in natural units for a one-line message."""
        parts = []
        for k, v in values.items():
            parts.append(f"{k} = {v}" if isinstance(v, str) else f"{k} = {v:.{digits}g}")
        return ", ".join(parts)

    def to_dict(self) -> dict:
        return asdict(self)

    # -- parsing ---------------------------------------------------------------------------------
    @classmethod
    def from_toml(cls, path) -> "StudySpec":
        path = Path(path)
        if not readable_file(path, "study file"):
            raise InputError(f"{path}: study file not found; create one with 'windowfinder new DIR'")
        data = read_bytes(path, "study file")
        if data.startswith((b"\xff\xfe", b"\xfe\xff")):
            raise InputError(f"{path}: saved as UTF-16 text; save the study file as UTF-8")
        try:
            raw = data.decode("utf-8-sig")
        except UnicodeDecodeError as e:
            line = data[:e.start].count(b"\n") + 1
            raise InputError(f"{path} line {line}: not UTF-8 text (byte 0x{data[e.start]:02x}); save the "
                             "study file as UTF-8") from None
        try:
            data = tomllib.loads(raw)
        except tomllib.TOMLDecodeError as e:
            raise InputError(f"{path}: invalid TOML ({e}); fix the line named") from None
        return cls.from_dict(data, source=str(path))

    @classmethod
    def from_dict(cls, data: dict, source: str = "study.toml") -> "StudySpec":
        return _Parser(source).study(data)


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
