"""The study file (study.toml): factors, responses, limits and goals.

Parsed with :mod:`tomllib` into frozen dataclasses; :mod:`windowfinder.inputs.studyfile` validates every
table and key strictly (one-line :class:`~windowfinder.errors.InputError` naming the file and the key).
Settings are converted between natural units and coded units (``[0, 1]`` per factor), in which every model
and search works.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from windowfinder.errors import InputError, nearest
from windowfinder.inputs.constraints import Constraint, LinearConstraints, bounded_margin
from windowfinder.inputs.storage import read_bytes, readable_file

GOALS = ("maximize", "minimize", "target", "none")
KINDS = ("quality", "safety")
TRANSFORMS = ("none", "log", "logit")
MODELS = ("auto", "gp", "warped", "quadratic", "linear")  # response models (windowfinder.models.choice)

# Largest magnitude accepted for a number in the study file: far beyond any physical quantity in sensible
# units, and small enough that squares and differences of such numbers stay finite in float64
# (common practice, no source).
MAX_MAGNITUDE = 1e100
MAX_SEED = 2**32 - 1  # numpy RandomState and scikit-learn accept seeds 0 .. 2**32 - 1


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
        from windowfinder.inputs.studyfile import _Parser  # the parser builds StudySpec objects

        return _Parser(source).study(data)
