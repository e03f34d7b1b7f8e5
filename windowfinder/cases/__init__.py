"""Bundled demo cases: made-up process scenarios with a simulator each.

Every case is a folder ``windowfinder/cases/<name>/`` holding

* ``study.toml``   the study file an engineer would write for it (factors, responses, limits, goals);
* ``README.md``    the scenario, its physics, and the cautions that go with its safety limits;
* ``simulator.py`` a physically motivated stand-in for the real process, with run-to-run noise.

A simulator module offers

``FACTORS``, ``RESPONSES``
    names in study order.
``truth(X) -> dict[str, ndarray]``
    noise-free response values for natural-unit settings ``X`` of shape ``(n, d)``, plus a boolean
    ``"works"`` entry; settings where the process fails give NaN responses.
``evaluate(settings, seed=None) -> dict[str, float]``
    one run with noise; a failed run raises :class:`RunFailed`.
``feasible(X) -> ndarray of bool``
    the true (noise-free) "process works and every limit of study.toml is met", for benchmarks.

The scenarios are invented for demonstration and testing. They are not data from any real plant.
"""

from __future__ import annotations

import importlib
import pathlib
from types import ModuleType

from windowfinder.errors import InputError

#: The bundled cases, in the order they are shown to users.
CASES: tuple[str, ...] = ("reactor", "spotweld", "tempering")


class RunFailed(Exception):
    """A simulated run gave no usable product (for example weld expulsion).

    The campaign engine records such a run with ``status = failed``; it feeds the failure model.

    Parameters
    ----------
    reason : str
        One line saying what went wrong, for the run's ``note`` column.
    """

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


def list_cases() -> list[str]:
    """Names of the bundled demo cases."""
    return list(CASES)


def case_dir(name: str) -> pathlib.Path:
    """Folder of a bundled case (holds ``study.toml``, ``README.md``, ``simulator.py``).

    Raises
    ------
    InputError
        If ``name`` is not a bundled case.
    """
    if name not in CASES:
        raise InputError(f"case '{name}': no such bundled case; choose one of {', '.join(CASES)}")
    return pathlib.Path(__file__).resolve().parent / name


def load_simulator(name: str) -> ModuleType:
    """Import and return the simulator module of a bundled case."""
    case_dir(name)  # validates the name
    return importlib.import_module(f"{__name__}.{name}.simulator")


__all__ = ["CASES", "RunFailed", "case_dir", "list_cases", "load_simulator"]
