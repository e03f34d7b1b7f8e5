"""Output warping: a Gaussian process on a monotone warp of the response, fitted jointly with it.

A stationary GP with Gaussian noise reads a response that bends sharply (zero below an onset, then a rise
that saturates) as noise. The warped Gaussian process of Snelson, Rasmussen & Ghahramani (2004), "Warped
Gaussian processes", NIPS 16, models ``z = w(y)`` as a GP, with a monotone warp ``w`` whose parameters
are fitted by the marginal likelihood of the *observed* ``y``, Jacobian included (their eq. 5):

    log p(y | X, theta, psi) = log N(w(y) | 0, K_theta) + sum_i log w'(y_i).

The warp here is the sinh-arcsinh transformation of Jones & Pewsey (2009), "Sinh-arcsinh distributions",
Biometrika 96(4), 761-780 (their eq. 1 with the roles of the variables as in the warp),

    w(u) = sinh(delta asinh(u) - epsilon),   u = (g(y) - c) / s,

on the response after its study-file transform ``g`` (none, log, logit), centred and scaled by the
runs' mean ``c`` and sd ``s``: ``epsilon`` skews, ``delta`` thins (``< 1``) or thickens (``> 1``) the
tails; ``epsilon = 0, delta = 1`` is the identity, so the plain GP is one member of the family. The warp
is monotone increasing for ``delta > 0`` and has the closed-form inverse
``u = sinh((asinh(z) + epsilon) / delta)``, so a limit ``v`` on ``y`` is the latent threshold ``w(v)``
and ``P(limit met)`` stays ``Phi(margin / sd)`` on the latent scale; quantiles map back exactly.

Fitting (:class:`WarpedGPModel`): the warp parameters are searched on a grid (:data:`EPSILONS` x
:data:`DELTAS`), each with the GP's hyperparameters at their posterior mode for that warp (one
optimisation from the default start), scored by the log posterior of ``y`` above plus the warp's prior;
the best is refitted with every restart. A profile search rather than the joint gradient of Snelson et
al.: with two warp parameters and tens of runs the grid is cheap and cannot stall.
"""

from __future__ import annotations

import itertools

import numpy as np

from windowfinder.models.gp import GPModel
from windowfinder.models.transform import _as_transform

# Grid of the warp search and the warp's prior (common practice, no source): normal priors on epsilon
# and log(delta) centred on the identity, sd 0.5 each, so tens of runs move the warp only when the
# likelihood asks clearly; the grid spans about two prior sds either way.
EPSILONS = (-1.0, -0.5, 0.0, 0.5, 1.0)
DELTAS = (0.35, 0.5, 0.71, 1.0, 1.41, 2.0, 2.83)
WARP_PRIOR_SD = 0.5


def sinh_arcsinh(u, epsilon, delta):
    """``w(u) = sinh(delta asinh(u) - epsilon)`` (Jones & Pewsey 2009, eq. 1)."""
    return np.sinh(delta * np.arcsinh(u) - epsilon)


def sinh_arcsinh_inverse(z, epsilon, delta):
    """``u = sinh((asinh(z) + epsilon) / delta)``, the inverse of :func:`sinh_arcsinh`."""
    return np.sinh((np.arcsinh(z) + epsilon) / delta)


def sinh_arcsinh_slope(u, epsilon, delta):
    """``w'(u) = delta cosh(delta asinh(u) - epsilon) / sqrt(1 + u^2)`` (> 0 for ``delta > 0``)."""
    return delta * np.cosh(delta * np.arcsinh(u) - epsilon) / np.sqrt(1.0 + np.square(u))


class WarpedTransform:
    """The study-file transform ``g`` followed by a sinh-arcsinh warp of its standardised value.

    Same interface as :class:`windowfinder.models.transform.Transform` (``forward``, ``measured``,
    ``inverse``, ``inverse_slope``, ``forward_limit``, ``kind`` = ``"warped"``, ``bounds``, ``lower``,
    ``upper``).

    Parameters
    ----------
    base : Transform
    center, scale : float
        ``c`` and ``s`` of ``u = (g(y) - c) / s``.
    epsilon, delta : float
        Warp parameters (identity: 0 and 1).
    """

    def __init__(self, base, center, scale, epsilon=0.0, delta=1.0):
        self.base = base
        self.center, self.scale = float(center), float(scale)
        self.epsilon, self.delta = float(epsilon), float(delta)
        # the model's scale as diagnostics name it: "warped" (the study transform is in ``base.kind``)
        self.kind, self.bounds = "warped", base.bounds
        self.lower, self.upper = base.lower, base.upper

    def __repr__(self):
        return (f"WarpedTransform({self.base!r}, center={self.center:.4g}, scale={self.scale:.4g}, "
                f"epsilon={self.epsilon:.3g}, delta={self.delta:.3g})")

    def _warp(self, z0):
        return sinh_arcsinh((np.asarray(z0, float) - self.center) / self.scale, self.epsilon, self.delta)

    def _unwarp(self, z):
        return self.center + self.scale * sinh_arcsinh_inverse(np.asarray(z, float), self.epsilon, self.delta)

    def forward(self, y):
        """Natural units to the warped latent scale."""
        return self._warp(self.base.forward(y))

    def measured(self, y):
        """As :meth:`Transform.measured` (values at a bound moved inside), then warped."""
        z0, moved = self.base.measured(y)
        return self._warp(z0), moved

    def inverse(self, z):
        """Warped latent scale to natural units."""
        return self.base.inverse(self._unwarp(z))

    def inverse_slope(self, z):
        """``dy/dz``: the base transform's slope times ``s / w'(u)``."""
        z0 = self._unwarp(z)
        u = (z0 - self.center) / self.scale
        return self.base.inverse_slope(z0) * self.scale / sinh_arcsinh_slope(u, self.epsilon, self.delta)

    def forward_limit(self, v):
        """A limit on the latent scale (``None`` passes through, ``+-inf`` stay infinite)."""
        z0 = self.base.forward_limit(v)
        if z0 is None:
            return None
        z = self._warp(z0)
        return float(z) if np.ndim(z) == 0 else z

    def text(self) -> str:
        return f"sinh-arcsinh warp epsilon {self.epsilon:.2g}, delta {self.delta:.2g}"


def warp_log_prior(epsilon, delta, sd=WARP_PRIOR_SD):
    """Normal log prior on ``epsilon`` and ``log(delta)`` around the identity, up to a constant."""
    return -0.5 * (epsilon ** 2 + np.log(delta) ** 2) / sd ** 2


class WarpedGPModel(GPModel):
    """Gaussian-process model of a monotone warp of the response (warped GP; module notes).

    Parameters are those of :class:`windowfinder.models.gp.GPModel`; the warp is fitted. ``transform``
    is the study file's transform, applied before the warp.

    Attributes
    ----------
    transform_ : WarpedTransform
    warp_ : (float, float)
        Fitted ``(epsilon, delta)``.
    warp_scores_ : dict[(float, float), float]
        Log posterior of the observed responses (Jacobian and warp prior included, up to a constant
        common to all warps) at each grid point.
    Others as :class:`GPModel`, on the warped latent scale.
    """

    def _fit_transform(self, X, y):
        base = _as_transform(self.transform, self.bounds)
        z0, _ = base.measured(y)
        center, scale = float(np.mean(z0)), float(np.std(z0))
        if not scale > 1e-12 * max(float(np.max(np.abs(z0))), 1e-300):
            self.warp_, self.warp_scores_ = (0.0, 1.0), {}
            return WarpedTransform(base, center, 1.0)
        u = (z0 - center) / scale
        scores = {}
        for eps, delta in itertools.product(EPSILONS, DELTAS):
            t = WarpedTransform(base, center, scale, eps, delta)
            m = GPModel(transform=t, n_restarts=0, random_state=self.random_state, nu=self.nu,
                        trend=self.trend, max_exact=self.max_exact, n_subset=self.n_subset,
                        hyperparameters="map").fit(X, y)
            scores[(eps, delta)] = warped_log_posterior(m, u, eps, delta)
        self.warp_scores_ = scores
        self.warp_ = max(scores, key=scores.get)
        return WarpedTransform(base, center, scale, *self.warp_)

    def fit(self, X, y):
        """Fit warp and GP to coded settings ``X`` (n, d) and natural-unit responses ``y`` (n,)."""
        super().fit(X, y)
        self.note_ = "; ".join(t for t in (self.note_, self.transform_.text()) if t)
        return self


def warped_log_posterior(model, u, epsilon, delta):
    """``log p(u)`` of a GP fitted on ``z = w(u)``: its log posterior on the standardised ``z``, minus
    ``n log(y_scale_)`` (the standardisation's Jacobian), plus ``sum log w'(u_i)`` and the warp prior."""
    lml = float(model.gp_.log_marginal_likelihood_value_)
    return (lml - u.size * np.log(model.y_scale_) + float(np.sum(np.log(sinh_arcsinh_slope(u, epsilon, delta))))
            + warp_log_prior(epsilon, delta))
