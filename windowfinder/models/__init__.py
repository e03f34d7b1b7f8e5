"""Models of the responses: Gaussian process, quadratic response surface, failure model, diagnostics.

Modules: ``transform`` (output scales), ``base`` (the shared model interface), ``gp`` (the Gaussian
process and its priors), ``likelihood`` (its fast objective), ``sparse`` (many runs), ``quadratic``
(least-squares response surface), ``failure`` (P(process works)), ``surrogates`` (the set of one
study's models), ``diagnostics`` (leave-one-out checks).
"""

from windowfinder.models.failure import FailureModel  # noqa: F401
from windowfinder.models.gp import GPModel  # noqa: F401
from windowfinder.models.quadratic import QuadraticModel  # noqa: F401
from windowfinder.models.surrogates import Surrogates  # noqa: F401
from windowfinder.models.transform import Transform  # noqa: F401

__all__ = ["FailureModel", "GPModel", "QuadraticModel", "Surrogates", "Transform"]
