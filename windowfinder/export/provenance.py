"""Provenance: what produced an output file, so another team can file, audit and reproduce it.

Every answer file carries the same block: tool version, UTC time (ISO 8601), SHA-256 of the study file
and of the run table as they were read, the seed, the confidence with what it applies to, and the model
of each response. ``window.json`` and ``record.json`` hold it under the key ``provenance``; a CSV answer
(``tradeoff.csv``, ``testplan.csv``, ``next.csv``, ``controlplan.csv``) gets a sidecar
``NAME.provenance.json`` holding the block plus the SHA-256 of the CSV it describes, so the pair can be
checked after it travels.
"""

from __future__ import annotations

import hashlib
from datetime import datetime, timezone
from pathlib import Path

STUDY_FILE = "study.toml"  # the file contract (DESIGN.md); Study reads the same name
MEANING_RUN = "each new run: model uncertainty and run-to-run noise"
MEANING_MEAN = "the process mean: model uncertainty only"


def sha256_of(path) -> str | None:
    """Hex SHA-256 of a file's bytes (None when it does not exist)."""
    path = Path(path)
    if not path.is_file():
        return None
    return hashlib.sha256(path.read_bytes()).hexdigest()


def utc_now() -> str:
    """The current UTC time, ISO 8601 to the second (``2026-12-04T04:01:22Z``)."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def provenance(study, confidence: float | None = None, mean_only: bool = False, fit=None,
               inputs: dict | None = None) -> dict:
    """The provenance block of an answer computed from ``study``.

    Parameters
    ----------
    study : Study
    confidence : float, optional
        Default: the study's confidence.
    mean_only : bool
        Whether the confidence applies to the process mean (True) or to each new run (False).
    fit : FitResult, optional
        Source of the model per response (as fitted; else as asked for in study.toml).
    inputs : dict, optional
        ``{"study.toml": sha, "runs.csv": sha}`` taken earlier, for a command that changes the run table
        after computing its answer (``suggest``, ``verify``): the hashes must describe what was read.
    """
    from windowfinder import __version__

    spec = study.spec
    if fit is not None and getattr(fit, "diagnostics", None):
        models = {d.response: d.model for d in fit.diagnostics}
    else:
        models = {r.name: r.model for r in spec.responses}
    return {"tool": "windowfinder", "version": __version__, "created_utc": utc_now(),
            "inputs": dict(inputs) if inputs is not None else input_hashes(study),
            "runs_completed": int(len(study.runs.completed())),
            "seed": int(spec.seed),
            "confidence": float(spec.confidence if confidence is None else confidence),
            "confidence_applies_to": MEANING_MEAN if mean_only else MEANING_RUN,
            "models": models}


def input_hashes(study) -> dict:
    """SHA-256 of the study file and of the run table, keyed by file name."""
    return {STUDY_FILE: sha256_of(study.dir / STUDY_FILE), study.runs_path.name: sha256_of(study.runs_path)}


def write_sidecar(csv_path, block: dict) -> Path:
    """``NAME.provenance.json`` beside ``csv_path``: the block plus the CSV's own SHA-256."""
    from windowfinder.export.files import write_json

    csv_path = Path(csv_path)
    side = csv_path.with_name(csv_path.stem + ".provenance.json")
    write_json(side, {**block, "file": csv_path.name, "file_sha256": sha256_of(csv_path)})
    return side
