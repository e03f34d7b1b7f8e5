"""What every map over two factors carries on top of its colours, in natural units: the settings a
``[[constraint]]`` forbids (shaded at the slice values of the other factors, with its boundary), the
window box and its guard band at the coordinates the window spec exports, the window of record
(``out/record.json``) in its own colour and line, the set point or slice point, and the runs (done,
failed, suggested) projected onto the slice. Shared by every map in ``report/maps.py``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib import patheffects
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle

from windowfinder.report.figures import BLACK, BLUE, ORANGE, VERMILLION, label

GRID = 60
_HALO = [patheffects.withStroke(linewidth=3.5, foreground="white")]


def _setting(frame, spec, i, j):
    if frame is None or len(frame) == 0:
        return np.empty(0), np.empty(0)
    names = spec.factor_names
    return frame[names[i]].to_numpy(float), frame[names[j]].to_numpy(float)


def draw_overlays(ax, spec, window=None, pair=(0, 1), runs=None, suggestions=None, centre=None,
                  record=None):
    """Constraints, window box, guard band, window of record, set point, slice point and runs on a map
    in natural units.

    The window rectangle has ``gid="window"`` and the guard band ``gid="guard band"``; ``record`` (an
    entry of ``out/record.json``) adds the verified window as ``gid="window of record"`` and the
    window is then labelled the refit window; runs are ``"done runs"``, ``"failed runs"``,
    ``"suggested runs"``.
    """
    i, j = pair
    handles = _draw_constraints(ax, spec, pair, np.full(spec.d, 0.5) if centre is None else centre)
    verified = _record_ranges(spec, record, pair)
    if window is not None and window.found:
        fi, fj = window.factors[i], window.factors[j]
        box = Rectangle((fi["low"], fj["low"]), fi["high"] - fi["low"], fj["high"] - fj["low"], fill=False,
                        edgecolor=BLACK, lw=2.0, gid="window", zorder=5, path_effects=_HALO)
        ax.add_patch(box)
        handles.append(Line2D([], [], color=BLACK, lw=2,
                              label="refit window (all runs)" if verified else "window"))
        if any(f.get("tolerance") for f in (fi, fj)):
            ax.add_patch(Rectangle((fi["guard_low"], fj["guard_low"]), fi["guard_high"] - fi["guard_low"],
                                   fj["guard_high"] - fj["guard_low"], fill=False, edgecolor=BLACK,
                                   lw=1.0, ls="--", gid="guard band", zorder=5))
            handles.append(Line2D([], [], color=BLACK, lw=1, ls="--", label="window ± tolerance"))
    if verified:
        (xa, xb), (ya, yb) = verified
        ax.add_patch(Rectangle((xa, ya), xb - xa, yb - ya, fill=False, edgecolor=BLUE, lw=2.4, ls="-.",
                               gid="window of record", zorder=5, path_effects=_HALO))
        when = str(record.get("verified_utc", ""))[:10]
        handles.append(Line2D([], [], color=BLUE, lw=2.4, ls="-.",
                              label="window of record" + (f" (verified {when})" if when else "")))
    if window is not None and window.set_point:
        sp = window.set_point
        ax.plot(sp[spec.factor_names[i]], sp[spec.factor_names[j]], marker="P", ms=12, color=ORANGE,
                mec=BLACK, ls="none", zorder=7, gid="set point")
        handles.append(Line2D([], [], marker="P", color=ORANGE, mec=BLACK, ls="none", label="set point"))
    elif centre is not None and len(spec.numeric) > 2:   # a point only when a numeric factor is off the axes
        c = spec.to_natural(centre)[0]
        ax.plot(c[i], c[j], marker="+", ms=10, color=BLACK, ls="none", zorder=6, path_effects=_HALO)
        handles.append(Line2D([], [], marker="+", color=BLACK, ls="none", label="slice point"))
    if runs is not None and len(runs):
        status = runs["status"].astype(str) if "status" in runs else pd.Series("done", index=runs.index)
        for key, marker, face, text in (("done", "o", "white", "done runs"),
                                        ("failed", "X", VERMILLION, "failed runs")):
            x, y = _setting(runs[status == key], spec, i, j)
            if len(x):
                ax.plot(x, y, marker=marker, ms=6, mfc=face, mec=BLACK, mew=0.8, ls="none", zorder=6,
                        gid=text)
                handles.append(Line2D([], [], marker=marker, mfc=face, mec=BLACK, ls="none", label=text))
    x, y = _setting(suggestions, spec, i, j)
    if len(x):
        ax.plot(x, y, marker="D", ms=7, mfc=ORANGE, mec=BLACK, mew=0.8, ls="none", zorder=6,
                gid="suggested runs")
        handles.append(Line2D([], [], marker="D", mfc=ORANGE, mec=BLACK, ls="none", label="suggested runs"))
    fx, fy = spec.factors[i], spec.factors[j]
    ax.set_xlim(fx.low, fx.high)
    ax.set_ylim(fy.low, fy.high)
    ax.set_xlabel(label(fx.name, fx.unit))
    ax.set_ylabel(label(fy.name, fy.unit))
    return handles


def _draw_constraints(ax, spec, pair, centre, m: int = 2 * GRID + 1) -> list:
    """The settings a ``[[constraint]]`` forbids on this slice, shaded grey and hatched (``gid =
    "forbidden"``), and its boundary ``slack = 0`` as a line (``gid = "constraint"``): only the
    constraints naming an axis factor, with the other factors at the slice values ``centre``."""
    lin = spec.linear
    i, j = pair
    rows = np.flatnonzero((lin.A[:, i] != 0) | (lin.A[:, j] != 0)) if lin else np.empty(0, int)
    if not rows.size:
        return []
    g = np.linspace(0.0, 1.0, m)
    gx, gy = np.meshgrid(g, g)
    U = np.repeat(np.asarray(centre, float)[None], m * m, axis=0)
    U[:, i], U[:, j] = gx.ravel(), gy.ravel()
    S = lin.margin(U)[:, rows].min(axis=1).reshape(m, m)   # slack of the tightest row, coded
    if not (S < 0).any():
        return []
    xs, ys = spec.factors[i].to_natural(g), spec.factors[j].to_natural(g)
    shade = ax.contourf(xs, ys, (S < 0).astype(float), levels=[0.5, 1.5], colors=[(0.45, 0.45, 0.45, 0.5)],
                        hatches=["\\\\"], zorder=4)
    shade.set_gid("forbidden")
    if S.min() < 0 < S.max():
        line = ax.contour(xs, ys, S, levels=[0.0], colors=BLACK, linewidths=1.6, zorder=4)
        line.set_gid("constraint")
    names = ", ".join(dict.fromkeys(lin.row_names[k] for k in rows))
    return [Patch(facecolor=(0.45, 0.45, 0.45, 0.5), edgecolor=BLACK, hatch="\\\\",
                  label=f"not allowed ([[constraint]] {names})")]


def _record_ranges(spec, record, pair):
    """The window of record's ``(low, high)`` on the two factors of ``pair``, or None (no record, or a
    record that does not name both factors)."""
    window = (record or {}).get("window") or {}
    ranges = {f["name"]: (f["low"], f["high"]) for f in window.get("factors", [])
              if f.get("low") is not None and f.get("high") is not None}
    names = [spec.factor_names[k] for k in pair]
    return [ranges[n] for n in names] if all(n in ranges for n in names) else None
