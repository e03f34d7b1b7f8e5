"""Importable helpers for tests/test_campaign.py: cheap analytic "processes" for --function.

They live in a module (not in the test file) so a spawned process pool or a Dask worker can import them
by name, exactly as a user's ``--function module:callable`` is imported.
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

from windowfinder.cases import RunFailed

from campaign_functions import branin, distance


def evaluate(settings: dict) -> dict:
    """Noise-free run: both responses at the settings."""
    return {"branin": branin(settings["x1"], settings["x2"]),
            "distance": distance(settings["x1"], settings["x2"])}


def evaluate_seeded(settings: dict, seed=None) -> dict:
    """Like :func:`evaluate`, but fails (RunFailed) in the corner x1 > 8 and x2 > 12, and refuses a
    seed that is not an int (so a test sees whether the campaign passed one)."""
    if not isinstance(seed, int):
        raise TypeError(f"seed {seed!r} is not an int")
    if settings["x1"] > 8 and settings["x2"] > 12:
        raise RunFailed("tar formed")
    return evaluate(settings)


_CALLS = {"n": 0}


def crash_at(settings: dict) -> dict:
    """Evaluate, but end the whole process abruptly (no cleanup) on call number $CRASH_AT (1-based).

    Run with one worker the function executes inside the campaign process, so this is a hard crash of
    the campaign itself, like a power cut or ``kill -9``.
    """
    _CALLS["n"] += 1
    if _CALLS["n"] == int(os.environ.get("CRASH_AT", "0")):
        os._exit(3)
    return evaluate(settings)


def evaluate_on_dask(settings: dict) -> dict:
    """Evaluate, but only inside a Dask worker (``get_worker`` raises elsewhere, failing the run)."""
    from dask.distributed import get_worker

    get_worker()
    return evaluate(settings)


def yield_exotherm(settings: dict) -> dict:
    """Responses of the conftest study (temperature, time -> yield, exotherm), linear and cheap."""
    return {"yield": 60 + 0.3 * settings["temperature"], "exotherm": 0.5 * settings["temperature"]}


def random_proposer(study, count: int, aim: str):
    """Cheap stand-in for ``study.suggest``: seeded uniform points that reach 10 % past the bounds
    (the campaign must clip them), seeded by the number of rows so far."""
    rng = np.random.default_rng(len(study.runs.frame))
    U = rng.uniform(-0.1, 1.1, size=(count, study.spec.d))
    return pd.DataFrame(study.spec.to_natural(U), columns=study.spec.factor_names)


def saturating_yield(settings: dict) -> dict:
    """A yield in % that saturates at its physical bounds: 0 below x1 = 0.25, 100 above x1 = 0.75."""
    return {"yield": min(100.0, max(0.0, 200.0 * settings["x1"] - 50.0))}
