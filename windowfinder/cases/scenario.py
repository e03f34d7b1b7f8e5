"""Shared machinery of the demo simulators: measurement noise, one noisy run, the true feasible set.

A case's ``simulator.py`` writes only its physics, as a function ``simulate(X, rng)`` that maps natural
settings ``X`` (n, d) to noise-free responses plus a boolean ``"works"``; ``rng`` is ``None`` for the
nominal process or a :class:`numpy.random.Generator` when a run's own process variation (not measurement
noise) should be drawn, e.g. a scattering expulsion threshold. :class:`Scenario` adds the rest: the
study file's limits, measurement noise, failed runs and the benchmark feasible set.
"""

from __future__ import annotations

import pathlib
import tomllib
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from windowfinder.cases import RunFailed
from windowfinder.errors import InputError

Simulate = Callable[[np.ndarray, "np.random.Generator | None"], dict[str, np.ndarray]]


@dataclass(frozen=True)
class Noise:
    """Run-to-run measurement noise of one response.

    Parameters
    ----------
    kind : {"additive", "relative"}
        ``additive``: measured = true + sd * e. ``relative``: measured = true * exp(sd * e), so ``sd`` is
        the standard deviation of ``ln(measured / true)`` (about the relative sd for small sd).
        ``e`` is standard normal.
    sd : float
        Standard deviation, natural units (additive) or on the log scale (relative).
    low, high : float or None
        Physical range; a measured value is clipped to it (a yield is never read above 100 %).
    """

    kind: str
    sd: float
    low: float | None = None
    high: float | None = None

    def __post_init__(self):
        if self.kind not in ("additive", "relative"):
            raise ValueError(f"noise kind must be 'additive' or 'relative', not {self.kind!r}")
        if not self.sd >= 0:
            raise ValueError("noise sd must be >= 0")

    def draw(self, value: float, rng: np.random.Generator) -> float:
        """One noisy reading of ``value``."""
        e = rng.standard_normal()
        measured = value + self.sd * e if self.kind == "additive" else value * np.exp(self.sd * e)
        return float(np.clip(measured, self.low, self.high)) if (self.low, self.high) != (None, None) \
            else float(measured)


class Scenario:
    """A demo process: physics from the case, limits from its study.toml, noise and failures here.

    Parameters
    ----------
    folder : path-like
        The case folder (holds ``study.toml``).
    factors, responses : sequence of str
        Names in study order; checked against ``study.toml``.
    simulate : callable
        ``simulate(X, rng) -> dict`` as described in the module docstring.
    noise : mapping of str to Noise
        Measurement noise per response.
    failure_reason : str
        Note given with :class:`~windowfinder.cases.RunFailed` when a run fails.
    """

    def __init__(self, folder, factors: Sequence[str], responses: Sequence[str], simulate: Simulate,
                 noise: Mapping[str, Noise], failure_reason: str = "the process gave no usable product"):
        self.folder = pathlib.Path(folder)
        self.factors = list(factors)
        self.responses = list(responses)
        self.simulate = simulate
        self.noise = dict(noise)
        self.failure_reason = failure_reason
        with open(self.folder / "study.toml", "rb") as fh:
            study = tomllib.load(fh)
        declared_f = [f["name"] for f in study["factor"]]
        declared_r = [r["name"] for r in study["response"]]
        if declared_f != self.factors or declared_r != self.responses:
            raise ValueError(f"{self.folder / 'study.toml'}: names {declared_f} / {declared_r} differ from "
                             f"the simulator's {self.factors} / {self.responses}")
        if set(self.noise) != set(self.responses):
            raise ValueError("give a Noise for every response")
        #: ``{response: (min or None, max or None)}`` from study.toml
        self.limits = {r["name"]: (r.get("min"), r.get("max")) for r in study["response"]}
        #: ``{factor: (level names)}`` of the categorical factors; ``X`` holds their level index
        self.levels = {f["name"]: tuple(f["levels"]) for f in study["factor"] if "levels" in f}
        #: factor ranges from study.toml, shape (d, 2), natural units (0 .. L-1 for a categorical one)
        self.bounds = np.array([[0.0, len(f["levels"]) - 1.0] if "levels" in f else [f["low"], f["high"]]
                                for f in study["factor"]], dtype=float)

    def _as_matrix(self, X) -> np.ndarray:
        X = np.atleast_2d(np.asarray(X, dtype=object))
        for j, name in enumerate(self.factors[:X.shape[1]]):
            if name in self.levels:   # level names -> level index
                X[:, j] = [self._level(name, v) for v in X[:, j]]
        X = X.astype(float)
        if X.shape[1] != len(self.factors):
            raise ValueError(f"X needs {len(self.factors)} columns ({', '.join(self.factors)}), "
                             f"got {X.shape[1]}")
        return X

    def truth(self, X) -> dict[str, np.ndarray]:
        """Noise-free responses (NaN where the process fails) and ``"works"``, for settings (n, d)."""
        out = self.simulate(self._as_matrix(X), None)
        works = np.asarray(out["works"], dtype=bool)
        values = {r: np.where(works, out[r], np.nan) for r in self.responses}
        return {**values, "works": works}

    def evaluate(self, settings: Mapping[str, float], seed: int | None = None) -> dict[str, float]:
        """One run with noise at ``settings`` (factor name -> natural value, a categorical factor's level
        name; other keys are ignored).

        ``seed=None`` draws fresh noise each call, like a real run; an int makes the run reproducible.

        Raises
        ------
        RunFailed
            If the process gives no usable product at these settings in this run.
        InputError
            If a factor is missing or not a finite number.
        """
        x = []
        for name in self.factors:
            if name not in settings:
                raise InputError(f"settings: factor '{name}' is missing; give a value for each of "
                                 f"{', '.join(self.factors)}")
            if name in self.levels:   # a categorical factor: its level name (or index)
                value = self._level(name, settings[name])
                x.append(value)
                continue
            try:
                value = float(settings[name])
            except (TypeError, ValueError):
                value = float("nan")
            if not np.isfinite(value):
                raise InputError(f"settings: factor '{name}' = {settings[name]!r} is not a finite number")
            x.append(value)
        rng = np.random.default_rng(seed)
        out = self.simulate(np.array([x]), rng)
        if not bool(np.asarray(out["works"]).ravel()[0]):
            raise RunFailed(self.failure_reason)
        return {r: self.noise[r].draw(float(np.asarray(out[r]).ravel()[0]), rng) for r in self.responses}

    def _level(self, name, value) -> float:
        levels = self.levels[name]
        if isinstance(value, str) and value in levels:
            return float(levels.index(value))
        try:
            if not isinstance(value, str) and float(value) in range(len(levels)):
                return float(value)
        except (TypeError, ValueError):
            pass
        raise InputError(f"settings: factor '{name}' = {value!r} is neither one of its levels "
                         f"({', '.join(levels)}) nor a finite level index")

    def feasible(self, X) -> np.ndarray:
        """True (noise-free) "the process works and every limit is met", per row of ``X``."""
        t = self.truth(X)
        ok = t["works"].copy()
        for name, (lo, hi) in self.limits.items():
            with np.errstate(invalid="ignore"):
                if lo is not None:
                    ok &= t[name] >= lo
                if hi is not None:
                    ok &= t[name] <= hi
        return ok
