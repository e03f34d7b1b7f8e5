"""Full first- or second-order response surface fitted by least squares: the classical baseline model.

Same interface as the Gaussian process (``predict -> latent mean, sd``); the standard error of the fitted
mean is ``s^2 x0'(X'X)^-1 x0`` (Montgomery, *Design and Analysis of Experiments*, 2013, §10.5). The
fitting itself lives in :class:`windowfinder.models.polynomial.PolynomialModel`.
"""

from __future__ import annotations

from windowfinder.models.polynomial import PolynomialModel, full_terms, term_matrix, term_name


def feature_names(d, degree=2, names=None):
    """Names of the response-surface terms in :func:`quadratic_features` order.

    Order: intercept ``1``; linear ``x1..xd``; for ``degree=2`` the interactions ``xi*xj`` (i < j, row by
    row) then the squares ``xi^2``.
    """
    names = [f"x{i + 1}" for i in range(d)] if names is None else list(names)
    return [term_name(t, names) for t in full_terms(d, degree)]


def quadratic_features(X, degree=2):
    """Model matrix of a first- or full second-order polynomial (order as :func:`feature_names`)."""
    return term_matrix(X, full_terms(X.shape[1], degree))


class QuadraticModel(PolynomialModel):
    """Classical full response-surface model (all terms of ``degree``) fitted by least squares.

    Montgomery (2013), *Design and Analysis of Experiments*, 8th ed., §10.2-10.6 (regression, prediction
    variance, PRESS) and ch. 11 (second-order response surfaces); Myers, Montgomery & Anderson-Cook,
    *Response Surface Methodology*.

    Parameters
    ----------
    transform : {"none", "log", "logit"} or Transform
    bounds : (float, float) or None
    degree : {1, 2}
        1: first-order model; 2 (default): full second-order model.
    coding : {"pm1", "unit"}
        Units of ``coef_``: ``"pm1"`` uses the classical coding ``x = 2u - 1`` (factor low/high at
        -1/+1); ``"unit"`` uses the [0, 1] inputs directly. Predictions do not depend on it.

    Attributes
    ----------
    As :class:`~windowfinder.models.polynomial.PolynomialModel`.
    """

    def __init__(self, transform="none", bounds=None, degree=2, coding="pm1"):
        super().__init__(terms=None, transform=transform, bounds=bounds, degree=degree, coding=coding)
