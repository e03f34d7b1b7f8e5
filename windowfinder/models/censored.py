"""Responses known only to lie beyond a value (censored observations), for any response model.

A failed run that names the limit it broke (runs.csv ``failed_limit``) says "this response was past its
limit here", not what it was. Such a run is a one-sided censored observation. The model stays Gaussian:
each censored value is replaced by its conditional expectation under the current model, truncated beyond
the limit, and the model is refitted, a few times over (the iterative method of Schmee & Hahn 1979, "A
simple method for regression analysis with censored data", *Technometrics* 21, 417-432, there for least
squares; here for any model of :mod:`windowfinder.models`). The expectation of a normal
``N(mu, s^2)`` truncated to ``> c`` is ``mu + s * phi(a) / (1 - Phi(a))`` with ``a = (c - mu) / s``, and to
``< c`` it is ``mu - s * phi(a) / Phi(a)`` (Johnson, Kotz & Balakrishnan 1994, *Continuous Univariate
Distributions* vol. 1, §10.1; from memory). The latent scale of the model's transform is where the
model is Gaussian, so the truncation is done there.

The imputed values are then treated like measurements, so the model is somewhat too sure about them
(the spread of the truncated distribution is not carried); this is the price of keeping the GP exact.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from windowfinder.errors import InputError

SIDES = ("above", "below")
ITERATIONS = 3   # refits after the first; Schmee & Hahn report convergence in a few (common practice)


def _sides(side, k=None):
    """``side`` as an object array (broadcast to ``k``), every entry checked against :data:`SIDES`."""
    s = np.asarray(side, dtype=object)
    s = s if k is None else np.broadcast_to(s, (k,))
    for v in set(s.ravel().tolist()):
        if v not in SIDES:
            raise InputError(f"censoring side '{v}' is unknown; use above or below")
    return s


def truncated_mean(mu, sd, bound, side):
    """Mean of ``N(mu, sd^2)`` truncated to ``> bound`` (``side="above"``) or ``< bound``.

    ``bound`` and ``side`` may be arrays (one per value), broadcast against ``mu``.
    """
    mu, sd = np.asarray(mu, float), np.maximum(np.asarray(sd, float), 1e-12)
    side = _sides(side)
    a = (np.asarray(bound, float) - mu) / sd
    with np.errstate(over="ignore", invalid="ignore"):   # the side not taken may overflow
        above = mu + sd * np.exp(stats.norm.logpdf(a) - stats.norm.logsf(a))
        below = mu - sd * np.exp(stats.norm.logpdf(a) - stats.norm.logcdf(a))
    out = np.where(side == "above", above, below)
    return out if out.ndim else float(out)


def fit_censored(model, X, y, X_cens, bound, side, iterations=ITERATIONS):
    """Fit ``model`` to measured ``(X, y)`` and censored runs ``X_cens`` known to lie beyond ``bound``.

    Parameters
    ----------
    model : unfitted GPModel or QuadraticModel
    X, y : ndarray (n, d), (n,)
        Measured runs, natural units.
    X_cens : ndarray (k, d)
        Runs whose response is only known to be ``side`` of ``bound``.
    bound : float or ndarray (k,)
        Natural units (the limit that was broken, or each value's detection limit).
    side : {"above", "below"} or array (k,) of them

    Returns
    -------
    model
        Fitted on the ``n + k`` runs, the censored ones at their imputed values; ``censored_`` holds
        ``(X_cens, imputed natural values)`` and ``note_`` says how many runs were censored.
    """
    X, y, X_cens = np.asarray(X, float), np.asarray(y, float).ravel(), np.asarray(X_cens, float)
    k = X_cens.shape[0]
    one = np.ndim(bound) == 0 and isinstance(side, str)   # one broken limit (failed runs)
    sides = _sides(side, k)
    bounds = np.broadcast_to(np.asarray(bound, float), (k,)).copy()
    if k == 0:
        return model.fit(X, y)
    if len(y) >= 3:
        model.fit(X, y)
        tr = model.transform_
    else:   # too few measurements to model: start from the limit itself, just beyond it
        tr = None
    values = bounds.copy()
    for _ in range(iterations + (tr is None)):
        if tr is not None:
            with np.errstate(divide="ignore", invalid="ignore"):
                z_bound = tr.forward(bounds)
            if not np.isfinite(z_bound).all():
                at = bounds[~np.isfinite(z_bound)][0]
                raise InputError(f"a failed run names a limit at {at:g}, where the response's transform "
                                 "is undefined; use transform = 'none' or move the limit inside the bounds")
            mu, sd = model.predict(X_cens, return_std=True, noise=True)
            values = tr.inverse(truncated_mean(mu, sd, z_bound, sides))
        model.fit(np.vstack([X, X_cens]), np.concatenate([y, values]))
        tr = model.transform_
    model.censored_ = (X_cens, values)
    what = (f"{k} failed run(s) past the limit {float(bound):g}" if one else
            f"{k} value(s) known only to lie beyond a bound ({int((sides == 'below').sum())} below, "
            f"{int((sides == 'above').sum())} above)")
    note = (f"{what} enter as censored values (imputed "
            f"{', '.join(f'{v:.4g}' for v in values[:5])}{' ...' if k > 5 else ''})")
    model.note_ = f"{model.note_}; {note}" if getattr(model, "note_", "") else note
    return model
