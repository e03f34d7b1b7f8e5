"""Monotone output transforms: a response on the latent scale ``z = g(y)`` where its model is Gaussian.

``none`` (identity), ``log`` (positive responses spanning orders of magnitude) and ``logit`` (responses
between two physical bounds, e.g. a yield in 0..100 %). Limits map through ``g`` exactly because ``g`` is
monotone.

A measured value exactly at a physical bound (a yield of 0 or 100 % under ``logit``, an impurity of 0 under
``log``) is a real measurement, not an error, but ``g`` maps it to an infinite latent value. For fitting,
:meth:`Transform.measured` moves such a value inside the bound by :func:`bound_offset`: half the smallest
distance to that bound among the values not at it, so the value stays nearer the bound than every other
measurement and keeps its order, or, when every value sits at the bound, :data:`BOUND_SHARE` of the span
(common practice, no source). Values beyond a bound remain an input error. This is the one place where
bound values are handled, so a censored-observation likelihood can later replace it.
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit

from windowfinder.errors import InputError

TRANSFORM_KINDS = ("none", "log", "logit")
BOUND_SHARE = 1e-3  # offset of bound values when no value lies off that bound: 0.1 % of the span


def bound_offset(distances, span):
    """Offset inside a bound: half the smallest positive ``distances`` to it, else ``BOUND_SHARE * span``."""
    d = np.asarray(distances, dtype=float)
    d = d[np.isfinite(d) & (d > 0)]
    return 0.5 * float(d.min()) if d.size else BOUND_SHARE * float(span)


class Transform:
    """Monotone increasing output transform ``z = g(y)``.

    Parameters
    ----------
    kind : {"none", "log", "logit"}
        ``log``: ``z = log(y - a)`` with ``a = bounds[0]`` (0 when no bounds are given), needs ``y > a``.
        ``logit``: ``z = log((y - a) / (b - y))``, needs ``bounds = (a, b)`` and ``a < y < b``.
    bounds : (float, float) or None
        Physical bounds of the response (natural units).
    """

    def __init__(self, kind="none", bounds=None):
        if kind not in TRANSFORM_KINDS:
            raise InputError(f"transform '{kind}' is unknown; use one of {', '.join(TRANSFORM_KINDS)}")
        self.kind = kind
        self.bounds = None if bounds is None else tuple(
            float(v) if v is not None else (-np.inf, np.inf)[i] for i, v in enumerate(bounds))
        if kind == "logit" and (self.bounds is None or len(self.bounds) != 2
                                or not np.all(np.isfinite(self.bounds)) or not self.bounds[0] < self.bounds[1]):
            raise InputError(f"transform logit needs bounds = [low, high] with low < high, got {bounds}; give "
                             "the physical bounds of the response (e.g. [0, 100] for a percentage)")
        # domain (lower, upper) of the transform; "none" has no domain limits even with bounds given
        self.lower = -np.inf if kind == "none" else (
            self.bounds[0] if self.bounds and np.isfinite(self.bounds[0]) else 0.0)
        self.upper = self.bounds[1] if kind == "logit" else np.inf

    def __repr__(self):
        return f"Transform(kind={self.kind!r}, bounds={self.bounds!r})"

    def _g(self, y):
        if self.kind == "none":
            return y.copy()
        with np.errstate(divide="ignore"):  # a bound itself maps to -inf / +inf
            z = np.log(y - self.lower)
            return z if self.kind == "log" else z - np.log(self.upper - y)

    def forward(self, y):
        """Natural units to latent scale; values outside the open domain raise InputError."""
        y = np.asarray(y, dtype=float)
        bad = np.isfinite(y) & ~((y > self.lower) & (y < self.upper))
        if np.any(bad):
            dom = f"({self.lower:g}, {self.upper:g})" if self.kind == "logit" else f"> {self.lower:g}"
            raise InputError(f"transform {self.kind}: value {y[bad].flat[0]:g} is outside its domain {dom}; "
                             "check the value, widen the bounds or use transform = \"none\"")
        return self._g(y)

    def measured(self, y):
        """Latent values of measurements, with values exactly at a bound moved inside (module notes).

        Returns
        -------
        z : ndarray
            ``g(y')`` where ``y'`` equals ``y`` except at a bound.
        moved : ndarray of bool
            True where a value sat at a bound and was moved.
        """
        y = np.array(y, dtype=float)
        moved = np.zeros(y.shape, dtype=bool)
        if self.kind != "none":
            fin = np.isfinite(y)
            sides = [(self.lower, 1.0)] + ([(self.upper, -1.0)] if self.kind == "logit" else [])
            off = y[fin & (y > self.lower) & (y < self.upper)]
            span = (self.upper - self.lower) if self.kind == "logit" else (
                float(np.max(off - self.lower)) if off.size else 1.0)
            for bound, sign in sides:
                at = fin & (y == bound)
                if at.any():
                    y[at] = bound + sign * bound_offset(sign * (off - bound), span)
                    moved |= at
        return self.forward(y), moved

    def inverse(self, z):
        """Latent scale to natural units (``+-inf`` map to the bounds)."""
        z = np.asarray(z, dtype=float)
        if self.kind == "none":
            return z.copy()
        if self.kind == "log":
            return self.lower + np.exp(z)
        return self.lower + (self.upper - self.lower) * expit(z)

    def inverse_slope(self, z):
        """Derivative ``dy/dz`` of the inverse transform (for delta-method conversions)."""
        z = np.asarray(z, dtype=float)
        if self.kind == "none":
            return np.ones_like(z)
        if self.kind == "log":
            return np.exp(z)
        s = expit(z)
        return (self.upper - self.lower) * s * (1.0 - s)

    def forward_limit(self, v):
        """Transform a limit; ``None`` passes through, limits at or beyond a bound map to ``+-inf``."""
        if v is None:
            return None
        z = self._g(np.clip(np.asarray(v, dtype=float), self.lower, self.upper))
        return float(z) if z.ndim == 0 else z


def _as_transform(transform, bounds):
    """A ``Transform`` (or an object with its interface, such as a fitted warp) from a kind and bounds."""
    return transform if hasattr(transform, "forward_limit") else Transform(transform, bounds)


