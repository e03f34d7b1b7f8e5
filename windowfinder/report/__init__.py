"""The study report: one self-contained HTML page an engineer can review, file and forward.

``write_report(study)`` computes what it is not given (models, window, trade-off, factor influence) and
writes ``STUDY_DIR/out/report.html`` atomically. The page has its figures embedded as PNG, its style
inline and no network reference, so it reads the same offline and prints cleanly. The figure functions
are public and return matplotlib Figures for use in a notebook.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pandas as pd

from windowfinder.errors import InputError
from windowfinder.inputs.storage import write_atomic
from windowfinder.report import sections
from windowfinder.report.figures import figure_png, influence_figure, loo_figure, tradeoff_figure
from windowfinder.report.maps import (SliceGrid, map_figure, map_pairs, margin_in_sd, margin_map_figure,
                                     probability_map_figure, slice_centre, slice_figure, slice_grid)
from windowfinder.report.method import method_notes
from windowfinder.report.overlays import draw_overlays
from windowfinder.report.page import page

SECTION_IDS = ("summary", "data", "models", "maps", "tradeoff", "influence", "next-runs", "method")


def _digest(path) -> str:
    path = Path(path) if path is not None else None
    if path is None or not path.is_file():
        return "missing"
    return hashlib.sha256(path.read_bytes()).hexdigest()[:12]


def build_html(study, fit, window=None, tradeoff=None, suggestions=None, influence=None,
               record=None, provenance=None) -> str:
    """The report page as text (nothing computed here except figures and tables)."""
    from windowfinder.answers.results import cautions

    spec = study.spec
    caution_list = list(window.cautions) if window is not None else cautions(spec, fit)
    c = sections.Content(study, fit, window, tradeoff, suggestions, influence, caution_list, record,
                         provenance)
    parts = [("summary", "Summary", sections.summary(c)),
             ("data", "Data", sections.data(c)),
             ("models", "Models", sections.models(c)),
             ("maps", "Maps", sections.maps(c)),
             ("tradeoff", "Trade-off", sections.tradeoff(c)),
             ("influence", "Factor influence", sections.influence(c))]
    if suggestions is not None and len(suggestions):
        parts.append(("next-runs", "Next runs", sections.next_runs(c)))
    parts.append(("method", "Method notes", method_notes(spec, window)))
    sub = [f"Study: {spec.name}"]
    if spec.description:
        sub.append(spec.description)
    sub.append(f"{spec.d} factors ({', '.join(spec.factor_names)}), {len(spec.responses)} responses "
               f"({', '.join(spec.response_names)}), {len(study.runs)} runs. Inputs: study.toml "
               f"sha256 {_digest(study.dir / 'study.toml')}…, {study.runs_path.name} sha256 "
               f"{_digest(study.runs_path)}…, seed {spec.seed}.")
    return page("Process window report", sub, parts)


def write_report(study, fit=None, window=None, tradeoff=None, suggestions=None, path=None,
                 influence=None, influence_n: int = 512) -> Path:
    """Write the study report as one self-contained HTML file.

    Parameters
    ----------
    study : Study
    fit : FitResult, optional
        Default ``study.fit()``.
    window : ProcessWindow, optional
        Default :func:`windowfinder.answers.results.build_window` at the study's confidence (None when no
        response has a limit).
    tradeoff : TradeoffTable, optional
        Default :func:`windowfinder.answers.tradeofftable.build_tradeoff` (None when no response has a goal).
    suggestions : DataFrame, optional
        Proposed next runs (``run`` and factor columns in natural units, any further columns); shown in
        their own section and on the maps.
    path : path-like, optional
        Default ``STUDY_DIR/out/report.html``.
    influence : SobolIndices, optional
        Default :func:`windowfinder.answers.influence.model_indices` with ``influence_n`` base samples.

    The page leads with the window of record (``out/record.json``, the last verified window) and its
    verdict when there is one, with the refit beside it and the reason when they differ.

    Returns
    -------
    pathlib.Path
        The file written (atomically: temporary file, fsync, rename).
    """
    from windowfinder.answers.results import build_window
    from windowfinder.answers.tradeofftable import build_tradeoff
    from windowfinder.answers.influence import model_indices

    spec = study.spec
    fit = study.fit() if fit is None else fit
    if window is None and spec.limited:
        window = build_window(spec, fit)
    if tradeoff is None and spec.goals:
        tradeoff = build_tradeoff(spec, fit)
    if influence is None:
        influence = model_indices(spec, fit.surrogates, n=influence_n, seed=spec.seed)
    if suggestions is not None:
        suggestions = pd.DataFrame(suggestions)
        missing = [f for f in spec.factor_names if f not in suggestions.columns]
        if missing:
            raise InputError(f"suggestions: no column for factor(s) {', '.join(missing)}; give every "
                             "factor's setting in natural units")
    import matplotlib

    from windowfinder.export.provenance import provenance
    from windowfinder.export.record import of_record

    prov = provenance(study, window.confidence if window is not None else None,
                      bool(getattr(window, "mean_only", False)), fit)
    # names and units are drawn as plain text: a '$' in a name must not start TeX-like math
    with matplotlib.rc_context({"text.parse_math": False}):
        text = build_html(study, fit, window, tradeoff, suggestions, influence, of_record(study.out), prov)
    path = Path(path) if path is not None else study.out / "report.html"
    write_atomic(path, text)
    return path


__all__ = ["SECTION_IDS", "SliceGrid", "build_html", "draw_overlays", "figure_png", "influence_figure",
           "loo_figure", "map_figure", "map_pairs", "margin_in_sd", "margin_map_figure", "probability_map_figure", "slice_centre",
           "slice_figure", "slice_grid", "tradeoff_figure", "write_report"]
