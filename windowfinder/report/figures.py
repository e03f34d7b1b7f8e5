"""Report figures that are not maps: leave-one-out checks, the trade-off, factor influence.

Every function returns a :class:`matplotlib.figure.Figure` drawn on the Agg canvas (no display, no
pyplot state), so it can be shown in a notebook or encoded into the report with :func:`figure_png`.
Colours: the perceptually uniform, colour-vision-deficiency friendly ``cividis`` and ``viridis`` maps
(Nuñez, Anderton & Renslow 2018, PLoS ONE 13(7); van der Walt & Smith 2015) and, for markers, the
Okabe & Ito (2008) "Color Universal Design" palette; shapes differ too, so nothing relies on colour alone.
"""

from __future__ import annotations

import base64
import io

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

# Okabe & Ito (2008) palette
BLACK, ORANGE, SKY, GREEN, BLUE, VERMILLION, PURPLE = ("#000000", "#E69F00", "#56B4E9", "#009E73",
                                                       "#0072B2", "#D55E00", "#CC79A7")


def new_figure(width: float, height: float, ncols: int = 1, nrows: int = 1, layout="constrained", **kw):
    """A Figure on the Agg canvas and its axes array (always 2-D: ``axes[row, col]``).

    ``layout=None`` skips the constrained layout (which costs a second full draw) for large panels
    whose margins are set by hand.
    """
    fig = Figure(figsize=(width, height), layout=layout)
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    return fig, axes


def label(name: str, unit: str = "") -> str:
    """Axis label with the unit in brackets, e.g. ``temperature (degC)``."""
    return f"{name} ({unit})" if unit else str(name)


def log_scale(response, low, high) -> bool:
    """Draw on a log axis: the response is modelled on a log scale and spans more than a decade."""
    return getattr(response, "transform", "none") == "log" and 0 < low and high > 10 * low


def log_axis(ax, which: str, low: float, high: float) -> None:
    """Put the ``which`` ("x" or "y") axis of ``ax`` on a log scale with plain-number tick labels.

    Ticks at 1, 2 and 5 times the powers of ten (only the powers when ``low .. high`` spans more than
    two decades), labelled like ``60`` or ``0.2``; minor ticks unlabelled.
    Matplotlib's own log labels are TeX-like math (``$\\mathdefault{6\\times10^{1}}$``), which the report
    draws as plain text (``text.parse_math`` off, so that a ``$`` in a name stays a ``$``); they then
    showed raw and, labelling the minor ticks too, overlapped.
    """
    from matplotlib import ticker

    (ax.set_xscale if which == "x" else ax.set_yscale)("log")
    axis = ax.xaxis if which == "x" else ax.yaxis
    subs = (1.0, 2.0, 5.0) if high <= 100.0 * low else (1.0,)
    axis.set_major_locator(ticker.LogLocator(base=10.0, subs=subs))
    axis.set_major_formatter(ticker.FuncFormatter(lambda v, _pos: f"{v:g}"))
    axis.set_minor_locator(ticker.LogLocator(base=10.0, subs=np.arange(2, 10) * 1.0))
    axis.set_minor_formatter(ticker.NullFormatter())


def figure_png(fig: Figure, dpi: int = 90) -> str:
    """Base64 text of the figure as PNG (for a ``data:`` URI); the figure is cleared afterwards."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    fig.clear()
    return base64.b64encode(buf.getvalue()).decode("ascii")


# --------------------------------------------------------------------------------------------- LOO
def loo_figure(model, y=None, response=None, unit: str = "") -> Figure:
    """Measured value against its leave-one-out prediction, with 95 % intervals.

    Parameters
    ----------
    model : fitted GPModel / QuadraticModel, or ModelDiagnostics
        A model (its closed-form leave-one-out predictions are computed with
        :func:`windowfinder.models.diagnostics.diagnose`) or diagnostics already computed (``study.fit()``).
    y : array (n,), optional
        Measured values the model was fitted on (natural units); recovered from the model when None.
    response : str or Response, optional
        Name (and unit, when a :class:`~windowfinder.inputs.spec.Response` is given) for the labels.
    unit : str
        Unit for the labels when ``response`` is a plain name.

    Notes
    -----
    Leave-one-out predictions at fixed hyperparameters (Rasmussen & Williams 2006, §5.4.2). A point
    whose bar misses the diagonal is a run its model could not predict within 95 %.
    """
    from windowfinder.models.diagnostics import ModelDiagnostics, diagnose

    name = getattr(response, "name", response)
    unit = getattr(response, "unit", unit) or unit
    if isinstance(model, ModelDiagnostics):
        diag = model
    else:
        d = model.X_train_.shape[1]
        diag = diagnose(model, y, name or "response", [f"x{j + 1}" for j in range(d)], np.ones(d))
    name = name or diag.response
    meas, med = np.asarray(diag.measured, float), np.asarray(diag.loo_median, float)
    lo, hi = np.asarray(diag.loo_low, float), np.asarray(diag.loo_high, float)
    fig, axes = new_figure(4.4, 4.0)
    ax = axes[0, 0]
    ok = np.isfinite(med)
    inside = ok & (lo <= meas) & (meas <= hi)
    for sel, colour, marker, text in ((inside, BLUE, "o", "inside its 95 % interval"),
                                      (ok & ~inside, VERMILLION, "s", "outside its 95 % interval")):
        if sel.any():
            ax.errorbar(meas[sel], med[sel], yerr=[med[sel] - lo[sel], hi[sel] - med[sel]], fmt=marker,
                        color=colour, ms=5, capsize=2, lw=1, label=f"{text} ({int(sel.sum())})")
    vals = np.concatenate([meas[ok], lo[ok], hi[ok]]) if ok.any() else np.array([0.0, 1.0])
    a, b = float(np.min(vals)), float(np.max(vals))
    log = log_scale(response, a, b)
    pad = 0.05 * (b - a or 1.0)
    ends = [a / 1.2, b * 1.2] if log else [a - pad, b + pad]
    ax.plot(ends, ends, color="0.4", lw=1, ls="--", label="prediction = measured")
    if log:
        log_axis(ax, "x", *ends)
        log_axis(ax, "y", *ends)
    ax.set_xlim(*ends)
    ax.set_ylim(*ends)
    ax.set_xlabel(label(f"measured {name}", unit))
    ax.set_ylabel(label("predicted without that run", unit))
    q2 = "n/a" if diag.loo_q2 is None or not np.isfinite(diag.loo_q2) else f"{diag.loo_q2:.2f}"
    ax.set_title(f"{name}: leave-one-out Q² = {q2}", fontsize=10)
    ax.legend(fontsize=7, loc="upper left")
    return fig


# --------------------------------------------------------------------------------------- trade-off
def tradeoff_figure(spec, tradeoff) -> Figure:
    """The trade-off front with 95 % prediction intervals and the balanced pick.

    One goal: the pick with its interval. Two goals: goal against goal, bars in both directions,
    points coloured by P(all limits met). Three or more: parallel coordinates (Inselberg 1985), each
    goal scaled to its range on the front and turned so that better is up; the pick's 95 % intervals
    are drawn as bars on each axis.
    """
    frame = tradeoff.frame
    goals = [r for r in spec.goals if f"{r.name}_pred" in frame]
    fig, axes = new_figure(6.4 if len(goals) >= 3 else 5.2, 4.2)
    ax = axes[0, 0]
    if frame.empty or not goals:
        ax.text(0.5, 0.5, "no trade-off front found", ha="center", va="center", transform=ax.transAxes)
        ax.set_axis_off()
        return fig
    pick = frame["balanced_pick"].to_numpy(bool)
    p = frame["p_all_limits"].to_numpy(float) if "p_all_limits" in frame else np.ones(len(frame))
    if len(goals) == 1:
        _one_goal(ax, frame, goals[0], pick)
    elif len(goals) == 2:
        _two_goals(fig, ax, frame, goals, pick, p)
    else:
        _parallel(fig, ax, frame, goals, pick, p)
    return fig


def _interval(frame, r):
    med = frame[f"{r.name}_pred"].to_numpy(float)
    return med, med - frame[f"{r.name}_lo95"].to_numpy(float), frame[f"{r.name}_hi95"].to_numpy(float) - med


def _one_goal(ax, frame, r, pick):
    med, lo, hi = _interval(frame, r)
    rows = np.arange(len(med))
    ax.errorbar(med, rows, xerr=[lo, hi], fmt="o", color=BLUE, capsize=3, label="setting with 95 % interval")
    if pick.any():
        ax.plot(med[pick], rows[pick], "*", ms=16, color=ORANGE, mec=BLACK, label="balanced pick",
                gid="balanced pick")
    ax.set_yticks([])
    ax.set_xlabel(label(r.name, r.unit) + f" ({r.goal})")
    ax.legend(fontsize=8)


def _two_goals(fig, ax, frame, goals, pick, p):
    (r1, r2) = goals
    x, xl, xh = _interval(frame, r1)
    y, yl, yh = _interval(frame, r2)
    ax.errorbar(x, y, xerr=[xl, xh], yerr=[yl, yh], fmt="none", ecolor="0.7", lw=0.8, zorder=1)
    sc = ax.scatter(x, y, c=p, cmap="viridis", vmin=min(0.5, float(np.min(p))), vmax=1.0, s=22,
                    edgecolors=BLACK, linewidths=0.4, zorder=2)
    fig.colorbar(sc, ax=ax, label="P(all limits met)")
    if pick.any():
        ax.plot(x[pick], y[pick], "*", ms=18, color=ORANGE, mec=BLACK, zorder=3, label="balanced pick",
                gid="balanced pick")
        ax.legend(fontsize=8)
    for r, which in ((r1, "x"), (r2, "y")):
        lo, hi = frame[f"{r.name}_lo95"].min(), frame[f"{r.name}_hi95"].max()
        if log_scale(r, lo, hi):
            log_axis(ax, which, lo, hi)
    ax.set_xlabel(label(r1.name, r1.unit) + f" ({r1.goal})")
    ax.set_ylabel(label(r2.name, r2.unit) + f" ({r2.goal})")
    ax.set_title("trade-off front, bars: 95 % prediction intervals", fontsize=10)


def _better_up(r, v):
    if r.goal == "minimize":
        return -v
    if r.goal == "target":
        return -np.abs(v - r.target)
    return v


def _parallel(fig, ax, frame, goals, pick, p):
    k = len(goals)
    cols, ranges = [], []
    for r in goals:
        med, lo, hi = _interval(frame, r)
        v = _better_up(r, med)
        a, b = float(np.min(v)), float(np.max(v))
        cols.append((v - a) / (b - a) if b > a else np.full_like(v, 0.5))
        ranges.append((a, b, med))
    Z = np.column_stack(cols)
    xs = np.arange(k)
    cmap = matplotlib.colormaps["viridis"]
    lo_p = min(0.5, float(np.min(p)))
    for i in np.argsort(p):
        ax.plot(xs, Z[i], color=cmap((p[i] - lo_p) / (1 - lo_p + 1e-12)), lw=0.8, alpha=0.7)
    if pick.any():
        i = int(np.flatnonzero(pick)[0])
        ax.plot(xs, Z[i], color=ORANGE, lw=3, marker="*", ms=12, mec=BLACK, label="balanced pick",
                gid="balanced pick")
        for j, r in enumerate(goals):
            a, b, med = ranges[j]
            ends = _better_up(r, np.array([frame[f"{r.name}_lo95"].iloc[i], frame[f"{r.name}_hi95"].iloc[i]]))
            e = (ends - a) / (b - a) if b > a else np.full(2, 0.5)
            ax.plot([j, j], e, color=BLACK, lw=2)
        ax.legend(fontsize=8, loc="lower right")
    for j, r in enumerate(goals):
        ax.axvline(j, color="0.3", lw=0.8)
        med = ranges[j][2]
        top, bottom = (np.max(med), np.min(med)) if r.goal == "maximize" else (np.min(med), np.max(med))
        ax.text(j, 1.03, f"{top:.4g}", ha="center", fontsize=7)
        ax.text(j, -0.06, f"{bottom:.4g}", ha="center", va="top", fontsize=7)
    ax.set_xticks(xs, [f"{label(r.name, r.unit)}\n{r.goal}" for r in goals], fontsize=8)
    ax.set_yticks([])
    ax.set_ylim(-0.15, 1.1)
    ax.set_ylabel("better ↑ (scaled to the front's range)")
    sm = matplotlib.cm.ScalarMappable(cmap=cmap)
    sm.set_clim(lo_p, 1.0)
    fig.colorbar(sm, ax=ax, label="P(all limits met)")


# --------------------------------------------------------------------------------------- influence
def influence_figure(indices, names=None) -> Figure:
    """First-order and total Sobol' indices per factor, one panel per response.

    Parameters
    ----------
    indices : SobolIndices
        From :func:`windowfinder.answers.influence.sobol_indices` or ``model_indices``.
    names : list of str, optional
        Factor labels (default ``indices.names``).
    """
    names = list(names) if names is not None else list(indices.names)
    first, total = np.atleast_2d(indices.first), np.atleast_2d(indices.total)
    fc, tc = np.atleast_2d(indices.first_conf), np.atleast_2d(indices.total_conf)
    outputs = list(indices.outputs) or [""]
    k, d = first.shape
    fig, axes = new_figure(min(3.2 * k + 1.2, 12.0), 0.45 * d + 1.6, ncols=k, sharey=True)
    rows = np.arange(d)[::-1]
    for o in range(k):
        ax = axes[0, o]
        ax.barh(rows + 0.18, total[o], height=0.36, color="#FDE725", edgecolor=BLACK, lw=0.5,
                xerr=np.nan_to_num(tc[o]), error_kw={"lw": 0.8}, label="total (with interactions)")
        ax.barh(rows - 0.18, first[o], height=0.36, color="#31688E", edgecolor=BLACK, lw=0.5,
                xerr=np.nan_to_num(fc[o]), error_kw={"lw": 0.8}, label="first order (alone)")
        ax.set_xlim(0, 1.05)
        ax.axvline(0, color=BLACK, lw=0.6)
        ax.set_title(outputs[o], fontsize=10)
        ax.set_xlabel("share of predicted variance")
        if o == 0:
            ax.set_yticks(rows, names)
            ax.legend(fontsize=7, loc="lower right")
    return fig
