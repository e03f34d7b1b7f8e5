"""Maps over two factors: first the probability that a new run meets every limit (uncertain and
untrusted regions hatched), then one *margin map* per limit — the predicted margin to the limit in
units of its predictive standard deviation, ``z = (value - min) / sd`` or ``(max - value) / sd`` on the
model's latent scale, so ``z = 2`` means about 98 % for that limit alone (normal predictive). A study
without limits gets maps of its goals' predicted medians instead.

With more than two factors each map is a 2-D slice through one point (by default the window centre);
the other factors are held there. Axes are in natural units; the window box, its guard band and the
set point are drawn at the coordinates the window spec exports (``window.json``), the settings a
``[[constraint]]`` forbids are shaded (at the slice values of the other factors); when a window of
record exists (``out/record.json``, the last verified window) it is drawn beside the refit window in
its own colour and line; runs are projected onto the slice (those overlays in ``report/overlays.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from matplotlib import patheffects
from matplotlib.colors import LogNorm
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from windowfinder.errors import InputError
from windowfinder.report.figures import BLACK, VERMILLION, label, log_scale, new_figure
from windowfinder.report.overlays import GRID, draw_overlays


@dataclass
class SliceGrid:
    """Predictions on an ``m x m`` grid over two factors, reused by every map of that pair.

    Attributes
    ----------
    pair : (int, int)
        Factor indices on the x and y axes.
    centre : ndarray (d,)
        Coded point the slice passes through (other factors held there).
    xs, ys : ndarray (m,)
        Axis values, natural units.
    U : ndarray (m * m, d)
        Coded grid points, x varying fastest.
    means : dict[str, ndarray (m, m)]
        Predicted median of every response, natural units (rows = y, columns = x).
    fmap : FeasibilityMap or None
        Probabilities, classes and trust flags (None when the study has no limits).
    margins : dict[str, ndarray (m, m)]
        Per limited response, the margin to its nearer limit in predictive sd (latent scale).
    """

    pair: tuple
    centre: np.ndarray
    xs: np.ndarray
    ys: np.ndarray
    U: np.ndarray
    means: dict
    fmap: object = None
    margins: dict = None

    def field(self, values) -> np.ndarray:
        """Reshape per-point values (m * m,) to the grid (m, m)."""
        return np.asarray(values).reshape(len(self.ys), len(self.xs))


def slice_centre(spec, window=None) -> np.ndarray:
    """Coded centre of the window box; else the most probable point found; else the study centre."""
    if window is not None and window.found:
        lo, hi = window.coded_box(spec)
        return (lo + hi) / 2.0
    if window is not None and window.best_point:
        return spec.coded_point(window.best_point)
    return np.full(spec.d, 0.5)


def slice_grid(spec, fit, pair, centre=None, m: int = GRID, confidence=None, mean_only: bool = False,
               feasibility=None) -> SliceGrid:
    """Predictions for one pair of factors on an ``m x m`` grid through ``centre`` (coded)."""
    i, j = _check_pair(spec, pair)
    centre = np.full(spec.d, 0.5) if centre is None else np.asarray(centre, float).copy()
    g = np.linspace(0.0, 1.0, m)
    gx, gy = np.meshgrid(g, g)
    U = np.repeat(centre[None], m * m, axis=0)
    U[:, i], U[:, j] = gx.ravel(), gy.ravel()
    means, margins = {}, {}
    for r in spec.responses:
        model = fit.surrogates.models[r.name]
        mu, sd = model.predict(U, return_std=True, noise=not mean_only)
        means[r.name] = model.transform_.inverse(mu).reshape(m, m)
        if r.has_limits:
            margins[r.name] = margin_in_sd(mu, sd, model.transform_.forward_limit(r.min),
                                           model.transform_.forward_limit(r.max)).reshape(m, m)
    fmap = None
    if spec.limited:
        if feasibility is None:
            from windowfinder.answers.results import feasibility_of
            feasibility = feasibility_of(spec, fit, mean_only)
        conf = spec.confidence if confidence is None else float(confidence)
        fmap = feasibility.evaluate(U, max(conf, 0.5 + 1e-9))
    f_i, f_j = spec.factors[i], spec.factors[j]
    return SliceGrid((i, j), centre, f_i.to_natural(g), f_j.to_natural(g), U, means, fmap, margins)


def margin_in_sd(mu, sd, lo=None, hi=None) -> np.ndarray:
    """Margin to the nearer limit in predictive sd: ``min((mu - lo) / sd, (hi - mu) / sd)``.

    The sign convention of every limit (margin >= 0 met); with a normal predictive
    ``P(limit met) = Phi(z)`` for a one-sided limit, so ``z = 2`` is about 0.977.
    """
    mu, sd = np.asarray(mu, float), np.maximum(np.asarray(sd, float), 1e-300)
    z = np.full(mu.shape, np.inf)
    if lo is not None:
        z = np.minimum(z, (mu - lo) / sd)
    if hi is not None:
        z = np.minimum(z, (hi - mu) / sd)
    return z


MARGIN_CLIP = 4.0  # margins beyond +-4 sd (P below 3e-5 or above 0.99997) share the end colours


def margin_map_figure(spec, fit, window=None, pair=(0, 1), response=None, runs=None, suggestions=None,
                      grid=None, ax=None, legend=True, record=None):
    """Margin of one limited response to its limit, in units of its predictive sd, over two factors.

    Diverging colours (purple: limit likely broken, orange: met), a solid line where the margin is
    zero (the predicted median on the limit) and a dashed line at 2 sd; window, set point and runs
    drawn on it. The zero line is a contour set with ``gid="margin 0"``.
    """
    grid = _grid_for(spec, fit, window, _check_pair(spec, pair), grid)
    r = spec.response(response) if response is not None else spec.limited[0]
    if not r.has_limits:
        raise InputError(f"response '{r.name}' has no limit, so it has no margin to map; give it a min or max")
    fig, ax = _axes(ax)
    Z = np.clip(grid.margins[r.name], -MARGIN_CLIP, MARGIN_CLIP)
    levels = np.linspace(-MARGIN_CLIP, MARGIN_CLIP, 17)
    cf = ax.contourf(grid.xs, grid.ys, Z, levels=levels, cmap="PuOr_r")
    fig.colorbar(cf, ax=ax, label="margin / predictive sd", ticks=np.arange(-4, 5, 2))
    handles = []
    for z, style, gid, text in ((0.0, "-", "margin 0", "median on the limit (0 sd)"),
                                (2.0, "--", "margin 2", "2 sd margin (about 98 %)")):
        if Z.min() < z < Z.max():
            cs = ax.contour(grid.xs, grid.ys, Z, levels=[z], colors=BLACK, linewidths=1.0,
                            linestyles=style, zorder=4)
            cs.set_gid(gid)
        handles.append(Line2D([], [], color=BLACK, lw=1.0, ls=style, label=text))
    handles += draw_overlays(ax, spec, window, grid.pair, runs, suggestions, grid.centre, record)
    ax.set_title(f"{r.name}{' (safety)' if r.is_safety else ''}: margin to {r.limit_text()}", fontsize=10)
    return _finish(fig, ax, handles, legend)


def _check_pair(spec, pair):
    i, j = (int(p) for p in pair)
    if i == j or not (0 <= i < spec.d and 0 <= j < spec.d):
        raise InputError(f"map pair {pair}: give two different factor indices between 0 and {spec.d - 1}")
    return i, j


def _grid_for(spec, fit, window, pair, grid):
    if grid is not None:
        return grid
    conf = window.confidence if window is not None else None
    mean_only = bool(getattr(window, "mean_only", False))
    return slice_grid(spec, fit, pair, slice_centre(spec, window), confidence=conf, mean_only=mean_only)


def _axes(ax, width=5.0, height=4.2):
    if ax is not None:
        return ax.figure, ax
    fig, axes = new_figure(width, height)
    return fig, axes[0, 0]


def map_figure(spec, fit, window=None, pair=(0, 1), response=None, runs=None, suggestions=None,
               grid=None, ax=None, legend=True, record=None):
    """Predicted median of one response over two factors, with a line at each of its limits.

    Parameters
    ----------
    spec : StudySpec
    fit : FitResult
    window : ProcessWindow, optional
        Drawn as a box (and guard band, set point); its centre is the slice point.
    pair : (int, int)
        Factor indices for the x and y axes.
    response : str, optional
        Default: the first limited response (safety first), else the first response.
    runs, suggestions : DataFrame, optional
        Runs (factor columns in natural units, ``status``) and proposed runs, drawn as markers.
    grid : SliceGrid, optional
        Precomputed predictions (reused across maps of the same pair).
    ax : Axes, optional
        Draw into this axes instead of a new figure.
    legend : bool
        Draw a legend on the axes (the handles are kept in ``ax.legend_handles_`` either way).
    record : dict, optional
        Entry of the window of record (``out/record.json``): its window is drawn beside ``window``.

    Returns
    -------
    Figure
        The limit lines form a contour set with ``gid="limit"`` whose ``levels`` are the limit values.
    """
    grid = _grid_for(spec, fit, window, _check_pair(spec, pair), grid)
    r = spec.response(response) if response is not None else (spec.limited or list(spec.responses))[0]
    fig, ax = _axes(ax)
    Z = grid.means[r.name]
    lo, hi = float(np.nanmin(Z)), float(np.nanmax(Z))
    if log_scale(r, lo, hi):   # modelled on a log scale and spanning decades: show it on one
        levels = np.geomspace(lo, hi, 13)
        cf = ax.contourf(grid.xs, grid.ys, Z, levels=levels, norm=LogNorm(lo, hi), cmap="cividis")
        fig.colorbar(cf, ax=ax, label=label(f"predicted {r.name}", r.unit), ticks=levels[::3],
                     format="{x:.3g}")
    else:
        cf = ax.contourf(grid.xs, grid.ys, Z, levels=12, cmap="cividis")
        fig.colorbar(cf, ax=ax, label=label(f"predicted {r.name}", r.unit))
    handles = []
    limits = sorted(v for v in (r.min, r.max) if v is not None)
    if limits:
        cs = ax.contour(grid.xs, grid.ys, Z, levels=limits, colors=VERMILLION, linewidths=2.2, zorder=4)
        cs.set_gid("limit")
        if np.nanmin(Z) <= max(limits) and np.nanmax(Z) >= min(limits):
            ax.clabel(cs, fmt=lambda v: f"limit {v:g}", fontsize=7)
        handles.append(Line2D([], [], color=VERMILLION, lw=2, label=f"{r.name} limit {r.limit_text()}"))
    handles += draw_overlays(ax, spec, window, grid.pair, runs, suggestions, grid.centre, record)
    ax.set_title(f"{r.name}{' (safety)' if r.is_safety else ''}", fontsize=10)
    return _finish(fig, ax, handles, legend)


def probability_map_figure(spec, fit, window=None, pair=(0, 1), runs=None, suggestions=None, grid=None,
                           ax=None, confidence=None, legend=True, record=None):
    """Probability that a run meets every limit, over two factors.

    Filled contours of the joint probability (viridis), a line at the confidence, the *uncertain*
    class (``1 - confidence < P < confidence``) hatched ``//`` and the *untrusted* points (far from
    every run, or a model too unsure against its limit) hatched ``xx``; plus the window, set point and
    runs. The hatched regions are contour sets with ``gid="uncertain"`` and ``gid="untrusted"``.
    """
    grid = _grid_for(spec, fit, window, _check_pair(spec, pair), grid)
    if grid.fmap is None:
        raise InputError("study.toml: no response has a limit, so there is no probability to map; "
                         "give a response a min or max")
    fm = grid.fmap
    conf = fm.confidence if confidence is None else float(confidence)
    fig, ax = _axes(ax)
    P = grid.field(fm.p_joint)
    cf = ax.contourf(grid.xs, grid.ys, P, levels=np.linspace(0.0, 1.0, 11), cmap="viridis")
    fig.colorbar(cf, ax=ax, label="P(all limits met)")
    handles = []
    cs = ax.contour(grid.xs, grid.ys, P, levels=[conf], colors="white", linewidths=2.0, zorder=4)
    cs.set_gid("confidence")
    handles.append(Line2D([], [], color="white", lw=2, label=f"P = {conf:g}",
                          path_effects=[patheffects.withStroke(linewidth=3.5, foreground=BLACK)]))
    for key, mask, hatch, text in (("uncertain", fm.klass == "uncertain", "////", "uncertain class"),
                                   ("untrusted", fm.untrusted, "xx", "untrusted (far or unsure)")):
        Z = grid.field(mask.astype(float))
        if Z.any():
            hs = ax.contourf(grid.xs, grid.ys, Z, levels=[0.5, 1.5], colors="none", hatches=[hatch],
                             zorder=3)
            hs.set_gid(key)
            hs.set_edgecolor((1, 1, 1, 0.8) if key == "uncertain" else (0, 0, 0, 0.6))
            hs.set_linewidth(0)
        handles.append(Patch(facecolor="0.6", edgecolor=BLACK, hatch=hatch, label=text))
    handles += draw_overlays(ax, spec, window, grid.pair, runs, suggestions, grid.centre, record)
    ax.set_title("P(all limits met)" + (" — process mean" if getattr(window, "mean_only", False)
                                        else " — new run"), fontsize=10)
    return _finish(fig, ax, handles, legend)


def _finish(fig, ax, handles, legend):
    ax.legend_handles_ = handles
    if legend:
        ax.legend(handles=handles, fontsize=6, loc="upper right", framealpha=0.85)
    return fig


def slice_figure(spec, fit, window=None, pair=(0, 1), runs=None, suggestions=None, grid=None, record=None):
    """The maps of a pair: first the probability that a new run meets every limit, then one margin map
    per limited response (or, with no limits, the predicted median of every goal); ``record`` (an
    entry of ``out/record.json``) draws the window of record on each."""
    grid = _grid_for(spec, fit, window, _check_pair(spec, pair), grid)
    shown = spec.limited or spec.goals or list(spec.responses)
    lead = grid.fmap is not None
    panels = len(shown) + lead
    ncols = min(panels, 2)
    nrows = -(-panels // ncols)
    width, height = 5.8 * ncols, 4.2 * nrows + 0.7
    fig, axes = new_figure(width, height, ncols=ncols, nrows=nrows, layout=None)
    fig.subplots_adjust(left=0.75 / width, right=1 - 0.1 / width, bottom=1.15 / height,
                        top=1 - 0.3 / height, wspace=0.42, hspace=0.32)
    flat = list(axes.ravel())
    if lead:
        probability_map_figure(spec, fit, window, grid.pair, runs, suggestions, grid, ax=flat[0],
                               legend=False, record=record)
    draw = margin_map_figure if spec.limited else map_figure
    for ax, r in zip(flat[lead:], shown):
        draw(spec, fit, window, grid.pair, r.name, runs, suggestions, grid, ax=ax, legend=False,
             record=record)
    for ax in flat[panels:]:
        ax.set_axis_off()
    seen = {}
    for ax in flat[:panels]:
        for h in ax.legend_handles_:
            seen.setdefault(h.get_label(), h)
    fig.legend(handles=list(seen.values()), loc="lower center", ncols=min(len(seen), 4), fontsize=8,
               frameon=False)
    return fig


def map_pairs(spec, influence=None, most: int = 5) -> list[tuple]:
    """Factor pairs to map: all pairs, or with more than ``most`` factors the pairs among the ``most``
    factors of largest total influence (summed over responses)."""
    order = list(range(spec.d))
    if spec.d > most:
        if influence is not None:
            score = np.atleast_2d(influence.total).sum(axis=0)
            order = sorted(np.argsort(-score)[:most].tolist())
        else:
            order = order[:most]
    return [(a, b) for k, a in enumerate(order) for b in order[k + 1:]]
