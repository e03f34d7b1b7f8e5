"""How one run of a campaign is evaluated: its outcome, and the Python-function evaluator.

Both evaluators (:class:`FunctionEvaluator` here, ``CommandEvaluator`` in
:mod:`windowfinder.campaign.commands`) are picklable callables ``evaluator(run, settings, seed) -> RunOutcome`` so a local
process pool or a Dask cluster can run them. They never raise for a run that goes wrong: a crash, a
non-zero exit, a timeout, a missing program or unreadable output becomes a ``failed`` outcome whose
``note`` says why, and the campaign goes on.

The command protocol (``{in}``/``{out}`` files, the supervisor, timeouts) is
:mod:`windowfinder.campaign.commands`; where evaluators run (local pools, Dask) is
:mod:`windowfinder.campaign.engines`.
"""

from __future__ import annotations

import importlib
import inspect
import math
import os
import sys
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field

from windowfinder.errors import InputError

NOTE_CHARS = 240  # longest note kept in runs.csv


def one_line(text, limit: int = NOTE_CHARS) -> str:
    """``text`` on one line (whitespace runs collapsed), cut to ``limit`` characters."""
    s = " ".join(str(text).split())
    return s if len(s) <= limit else s[: limit - 3] + "..."


@dataclass(frozen=True)
class RunOutcome:
    """Result of evaluating one run.

    Attributes
    ----------
    run : str
        Run id.
    status : {"done", "failed"}
    responses : dict of str to float
        Measured responses; a response that is absent was not measured.
    note : str
        Why the run failed, or which responses were not measured.
    """

    run: str
    status: str
    responses: dict = field(default_factory=dict)
    note: str = ""

    @classmethod
    def failed(cls, run: str, reason: str) -> "RunOutcome":
        return cls(str(run), "failed", {}, one_line(reason))

    def to_dict(self) -> dict:
        return asdict(self)


def outcome_from_values(run: str, values: Mapping, responses: Sequence[str], origin: str) -> RunOutcome:
    """Check reported response values and turn them into a :class:`RunOutcome`.

    ``None``, a blank text cell or NaN means "not measured"; all responses unmeasured is a failed run.
    Any key that is not a response, a value that is not a number, or an infinite value fails the run.
    """
    names = list(responses)
    for key in values:
        if key not in names:
            return RunOutcome.failed(run, f"{origin} reported '{key}', which is not a response of the "
                                          f"study (responses: {', '.join(names)})")
    measured = {}
    for name in names:
        v = values.get(name)
        if v is None or (isinstance(v, str) and not v.strip()):
            continue
        try:
            f = float(v)
        except (TypeError, ValueError):
            return RunOutcome.failed(run, f"{origin}: '{name}' = {v!r} is not a number")
        if math.isnan(f):
            continue
        if not math.isfinite(f):
            return RunOutcome.failed(run, f"{origin}: '{name}' = {v!r} is not finite")
        measured[name] = f
    if not measured:
        return RunOutcome.failed(run, f"{origin} measured no response (every response blank)")
    missing = [n for n in names if n not in measured]
    return RunOutcome(str(run), "done", measured, "not measured: " + ", ".join(missing) if missing else "")


# -- Python function -------------------------------------------------------------------------------
def resolve_callable(target: str) -> Callable:
    """Import ``"module:callable"`` (``callable`` may be dotted, e.g. ``pkg.sim:Model.run``).

    The module is imported with :func:`importlib.import_module`; nothing is evaluated. When it is not
    found on the import path, the current folder is tried as well.

    Raises
    ------
    InputError
        If the text is not ``module:callable``, the module cannot be imported or the name is not a
        callable.
    """
    mod_name, sep, attr = str(target).partition(":")
    if not sep or not mod_name.strip() or not attr.strip():
        raise InputError(f"--function '{target}': expected module:callable, e.g. mysim:evaluate")
    try:
        module = _import(mod_name.strip())
    except InputError:
        raise
    except Exception as e:  # any import-time failure of user code
        raise InputError(f"--function '{target}': importing '{mod_name}' failed "
                         f"({type(e).__name__}: {one_line(e, 160)}); fix the module") from None
    obj = module
    for part in attr.strip().split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise InputError(f"--function '{target}': module '{mod_name}' has no '{attr}'; check the "
                             "name after the colon") from None
    if not callable(obj):
        raise InputError(f"--function '{target}': '{attr}' is not callable")
    return obj


def _import(name: str):
    try:
        return importlib.import_module(name)
    except ModuleNotFoundError as e:
        cwd = os.getcwd()
        if e.name != name.split(".")[0] or cwd in sys.path:
            raise
        sys.path.append(cwd)  # a script folder the user runs from, searched after installed packages
        try:
            return importlib.import_module(name)
        except ModuleNotFoundError:
            raise InputError(f"--function: module '{name}' not found; run from its folder or add the "
                             "folder to PYTHONPATH") from None


def _accepts_seed(fn: Callable) -> bool:
    try:
        params = inspect.signature(fn).parameters.values()
    except (TypeError, ValueError):
        return False
    return any(p.name == "seed" or p.kind is p.VAR_KEYWORD for p in params)


class FunctionEvaluator:
    """Evaluate runs by calling ``fn(settings) -> dict`` (``fn(settings, seed=...)`` if it takes a seed).

    Parameters
    ----------
    target : str or callable
        ``"module:callable"`` (imported here to fail early, and again by name in each worker) or the
        callable itself (pickled by reference, so it must live in an importable module for a process
        pool; Dask pickles it by value).
    responses : sequence of str
        Response names of the study; the callable returns a mapping from (some of) them to numbers.

    Notes
    -----
    :class:`~windowfinder.cases.RunFailed` (its ``reason``) or any other exception raised by the
    callable becomes a failed run with the reason in the note.
    """

    def __init__(self, target, responses: Sequence[str]):
        self.target = target
        self.responses = list(responses)
        self._fn = resolve_callable(target) if isinstance(target, str) else target
        if not callable(self._fn):
            raise InputError(f"function {target!r} is not callable")

    def __getstate__(self):
        state = dict(self.__dict__)
        if isinstance(self.target, str):
            state["_fn"] = None  # re-imported by name in the worker
        return state

    def __call__(self, run: str, settings: dict, seed: int | None = None) -> RunOutcome:
        name = self.target if isinstance(self.target, str) else getattr(self.target, "__name__", "function")
        try:
            if self._fn is None:
                self._fn = resolve_callable(self.target)
            fn = self._fn
            values = fn(dict(settings), seed=seed) if _accepts_seed(fn) else fn(dict(settings))
        except Exception as e:
            reason = getattr(e, "reason", None) or f"{type(e).__name__}: {e}"
            return RunOutcome.failed(run, f"{name}: {reason}")
        if not isinstance(values, Mapping):
            return RunOutcome.failed(run, f"{name} returned {type(values).__name__}, expected a dict of "
                                          "response values")
        return outcome_from_values(run, values, self.responses, name)


__all__ = ["FunctionEvaluator", "RunOutcome", "one_line", "outcome_from_values", "resolve_callable"]
