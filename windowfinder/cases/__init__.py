"""Bundled demo cases: made-up process scenarios with a simulator each.

Every case is a folder ``cases/<name>/`` at the top of the repository, imported as the package
``windowfinder.cases.<name>``, holding

* ``study.toml``   the study file an engineer would write for it (factors, responses, limits, goals);
* ``README.md``    the scenario, its physics, and the cautions that go with its safety limits;
* ``simulator.py`` a physically motivated stand-in for the real process, with run-to-run noise;
* ``runs.csv``     an example run table: a seeded space-filling design run on the simulator;
* ``__main__.py``  the command-line entry ``python -m windowfinder.cases.<name> IN OUT`` following the
  run protocol of :mod:`windowfinder.campaign.commands` (see :mod:`windowfinder.cases.entry`).

Where the folders are found: a built wheel carries them inside the package (``pyproject.toml`` maps
``windowfinder.cases.<name>`` to ``cases/<name>``); in a checkout or an editable install they stay at
the top level and this package adds ``cases/`` to its search path, so the same import names work in both.

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
CASES: tuple[str, ...] = ("reactor", "spotweld", "tempering", "lasercut")


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


def _case_roots() -> list[pathlib.Path]:
    """Folders searched for case packages: inside this package (wheel) and the checkout's ``cases/``."""
    return [pathlib.Path(p) for p in __path__]


_CHECKOUT = pathlib.Path(__file__).resolve().parents[2] / "cases"
if (_CHECKOUT.parent / "pyproject.toml").is_file() and str(_CHECKOUT) not in __path__:
    __path__.append(str(_CHECKOUT))  # a checkout or editable install: the cases live at the top level


def list_cases() -> list[str]:
    """Names of the bundled demo cases."""
    return list(CASES)


def case_dir(name: str) -> pathlib.Path:
    """Folder of a bundled case (holds ``study.toml``, ``README.md``, ``simulator.py``, ``runs.csv``).

    Raises
    ------
    InputError
        If ``name`` is not a bundled case, or its folder is missing from this installation.
    """
    if name not in CASES:
        raise InputError(f"case '{name}': no such bundled case; choose one of {', '.join(CASES)}")
    for root in _case_roots():
        if (root / name / "study.toml").is_file():
            return (root / name).resolve()
    raise InputError(f"case '{name}': its folder is missing from this installation (searched "
                     f"{', '.join(map(str, _case_roots()))}); reinstall windowfinder")


def load_simulator(name: str) -> ModuleType:
    """Import and return the simulator module of a bundled case."""
    case_dir(name)  # validates the name
    return importlib.import_module(f"{__name__}.{name}.simulator")


__all__ = ["CASES", "RunFailed", "case_dir", "list_cases", "load_simulator"]
