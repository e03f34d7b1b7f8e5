"""The Gaussian-process model of one response, with its hyperparameter bounds and priors.

Every model works on coded inputs ``X`` of shape ``(n, d)`` (``[0, 1]`` per factor; points outside,
such as the axial runs of a central composite design, are accepted) and on responses in natural units.
A monotone :class:`Transform` maps a response to the latent scale ``z = g(y)`` on which the model is
Gaussian; ``predict`` returns latent mean and standard deviation, ``predict_interval`` returns natural
units (inverse transform of latent quantiles, exact because ``g`` is monotone).
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import stats
from scipy.linalg import solve_triangular
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, DotProduct, Exponentiation, Matern, WhiteKernel

from windowfinder.errors import InputError
from windowfinder.models.base import _check_xy, _ResponseModel
from windowfinder.models.likelihood import SUPPORTED_NU, FastOptimizer, MarginalLikelihood, SignalKernel
from windowfinder.models.marginal import (N_SAMPLES, Component, fit_components, mixture_cross_covariance,
                                          mixture_loo, mixture_predict, mixture_whitened,
                                          sample_hyperparameters)
from windowfinder.models.sparse import FITC, kcenter
from windowfinder.models.transform import _as_transform

# Hyperparameter bounds for 10-50 runs in the unit cube with standardised outputs
# (common practice, no source):
# - signal variance 1e-2..1e2 of the sample variance: the trend explains between almost none and
#   far more than the observed spread;
# - length scale 0.05..20 coded units: 0.05 is finer than the spacing tens of runs can resolve in the
#   unit cube; at 20 the response is practically flat along that factor (factor inactive);
# - noise variance 1e-6..1 of the sample variance: from near-interpolation to "all of it is noise".
CONSTANT_BOUNDS = (1e-2, 1e2)
LENGTH_SCALE_BOUNDS = (0.05, 20.0)
NOISE_BOUNDS = (1e-6, 1.0)
TREND_BOUNDS = (1e-4, 1e2)  # prior variance of the quadratic trend, standardised units
# Weak prior on the noise variance (standardised units), so that tens of unreplicated runs are not
# read as noise-free by default: log-normal with median 1e-2 (noise sd 10 % of the responses' spread)
# and one standard deviation a factor 10 either way; hyperparameters are then the posterior mode
# (type-II MAP; Rasmussen & Williams 2006, §5.2). Without it, maximum likelihood put the noise at the
# lower bound in most 30-run fits of the bundled noisy cases (true noise 5-10 % of the spread) and
# windows were over-claimed for new runs (docs/benchmarks.md). Numbers: common practice, no source.
NOISE_PRIOR = (float(np.log(1e-2)), float(np.log(10.0)))   # mean and sd of log(noise variance)
# Gamma(3, 6) prior on every length scale (coded units; mode 1/3, mean 1/2): the default of BoTorch's
# SingleTaskGP before 2024 (Balandat et al. 2020, BoTorch, NeurIPS; values from memory). Without it,
# maximum likelihood on 10-20 runs in three factors often put two length scales at the upper bound
# (factor "inactive") and the models were confidently wrong between the runs: claimed windows on
# C2-DTLZ2 were 50-85 % truly feasible (docs/benchmarks.md).
# With hundreds of runs the data decide: above LENGTH_PRIOR_MAX_RUNS the prior is off, because its
# linear tail (6 per unit of length) then overrides the likelihood of truly inactive factors and costs
# accuracy (Friedman's function, 2000 runs: held-out RMSE 0.36 with it, 0.23 without; benchmarks).
LENGTH_PRIOR = (3.0, 6.0)
LENGTH_PRIOR_MAX_RUNS = 200
JITTER = 1e-10  # added to the kernel diagonal for numerical stability only (scikit-learn default)
# Many runs (windowfinder.models.sparse). Above SUBSET_RUNS the optimizer restarts run on that many
# space-filling runs; above MAX_EXACT_RUNS the model is the FITC approximation with them as inducing
# points. Measured on one core: an exact likelihood evaluation with its gradient takes about 0.1 s at
# 1000 runs and 0.35 s at 1500 (O(n^3)), a 500-run one about 0.02 s; held-out error of the FITC path
# against the exact GP: Hartmann-3 with 1200 runs 0.036 vs 0.036, Friedman's 10-factor function with
# 2000 runs 0.256 vs 0.233 (tests/test_scale.py, docs/benchmarks.md).
MAX_EXACT_RUNS = 1000
SUBSET_RUNS = 500
# Hyperparameter uncertainty (windowfinder.models.marginal): integrated over up to this many runs; above
# it the posterior of the hyperparameters is narrow and the mode alone is used (common practice, no source).
MARGINAL_MAX_RUNS = 200
# ... and from twice as many runs as hyperparameters: with fewer, their posterior is essentially the
# priors' and the mixture's spread speaks of the priors, not of the process (measured: three noise-free
# runs in one factor gave a predictive sd of a third of the spread at a run). Common practice, no source.
MARGINAL_MIN_RUNS_PER_HYPERPARAMETER = 2
# The default of GPModel(hyperparameters=None). The plug-in mode stays the default: on the calibration
# benchmark (docs/benchmarks.md) the mixture was as well calibrated on the simulators, pooled and on the
# held-out one, but less sharp, and the 95 % windows lost a third to two thirds of their volume
# (median recall reactor 0.56 -> 0.20, held-out hardening 0.52 -> 0.33); it is calibrated where the
# model is right (responses drawn from a GP prior: 80 % intervals cover 0.80 instead of 0.73).
HYPERPARAMETERS = "map"


class GPModel(_ResponseModel):
    """Gaussian-process model of one response (scikit-learn ``GaussianProcessRegressor``).

    Kernel ``C * Matern(nu, one length scale per factor) + White`` on standardised latent outputs,
    hyperparameters by maximum marginal likelihood with ``n_restarts`` random restarts
    (Rasmussen & Williams 2006, *Gaussian Processes for Machine Learning*, ch. 2 and 5).
    Replicated runs are kept: they inform the noise level. The likelihood and its gradient are
    evaluated by :class:`windowfinder.models.likelihood.FastOptimizer` (same values as scikit-learn's, several
    times faster).

    Many runs (see :mod:`windowfinder.models.sparse`): with more than ``n_subset`` runs the restarts run on
    ``n_subset`` runs chosen by farthest-point selection and one final optimisation on all runs starts
    from the best of them; with more than ``max_exact`` runs the hyperparameters come from that subset
    alone and predictions from all runs by the FITC approximation with the subset as inducing inputs
    (``note_`` and ``warning_`` say so).

    Parameters
    ----------
    transform : {"none", "log", "logit"} or Transform
    bounds : (float, float) or None
        Physical bounds for the transform.
    n_restarts : int
        Optimizer restarts from random starting points.
    random_state : int
    nu : float
        Matern smoothness (2.5: twice differentiable).
    trend : {"quadratic", "none"}
    max_exact : int
        Most runs for the exact GP; above it, the FITC approximation.
    n_subset : int
        Size of the space-filling subset (restarts; hyperparameters and inducing inputs above
        ``max_exact``).
    hyperparameters : {"map", "marginal"} or None
        ``"map"``: the posterior mode alone (plug-in). ``"marginal"`` (from twice as many runs as
        hyperparameters up to ``MARGINAL_MAX_RUNS`` runs; the mode alone otherwise): predictions
        integrate over the hyperparameters' posterior, a mixture of GP posteriors at posterior draws
        (Laplace proposal, sampling importance resampling), summarised by its mean and sd
        (:mod:`windowfinder.models.marginal`). None: the module's ``HYPERPARAMETERS`` (``"map"``).
        The attributes below describe the mode either way, except ``noise_std_``.
    n_samples : int
        Hyperparameter draws of the marginal predictive.

    Attributes
    ----------
    gp_ : GaussianProcessRegressor
        Fitted on all runs, or on the subset above ``max_exact``.
    transform_ : Transform
    y_mean_, y_scale_ : float
        Standardisation of the latent response (``y_scale_`` is 1 for a constant response).
    noise_std_, signal_std_ : float
        Run-to-run noise sd and process (signal) sd, latent units; with marginal hyperparameters
        ``noise_std_`` is the root of the posterior mean noise variance (the noise part of the
        predictive variance of a new run).
    components_ : list of Component
        The mixture (weights, kernels, Cholesky factors); one component, the mode, for ``"map"``.
    length_scales_ : ndarray (d,)
        Length scales in coded units.
    X_train_, z_train_ : ndarray
        Training inputs and latent responses (all runs).
    inducing_ : ndarray (m, d) or None
        Inducing inputs of the FITC approximation (None for the exact GP).
    sparse_ : FITC or None
    note_ : str
        How the model was fitted when the run count changed the method; empty otherwise.
    warning_ : str
        Empty, or a plain-words note (e.g. constant response, approximate model).
    """

    kind = "gp"

    def __init__(self, transform="none", bounds=None, n_restarts=5, random_state=0, nu=2.5,
                 trend="quadratic", max_exact=None, n_subset=None, hyperparameters=None,
                 n_samples=N_SAMPLES):
        self.hyperparameters = hyperparameters
        self.n_samples = n_samples
        self.transform = transform
        self.bounds = bounds
        self.n_restarts = n_restarts
        self.random_state = random_state
        self.nu = nu
        self.trend = trend
        self.max_exact = max_exact
        self.n_subset = n_subset

    def _kernel(self, d):
        """Signal ``C * Matern`` (+ a quadratic trend) plus white noise.

        With ``trend="quadratic"`` the signal adds ``c_t * (1 + x.x')^2``: a Bayesian full second-order
        polynomial whose coefficients have a Gaussian prior with variance ``c_t`` fitted by marginal
        likelihood — the explicit-basis-function construction of Rasmussen & Williams (2006, §2.7)
        written as a kernel. With tens of runs it lets the model carry the smooth curvature a response
        surface would, and the Matern part the rest; where the data do not support a trend, ``c_t``
        shrinks towards its lower bound.
        """
        signal = ConstantKernel(1.0, CONSTANT_BOUNDS) * Matern(
            length_scale=np.full(d, 0.5), length_scale_bounds=LENGTH_SCALE_BOUNDS, nu=self.nu)
        if self.trend == "quadratic":
            signal = signal + ConstantKernel(0.1, TREND_BOUNDS) * Exponentiation(
                DotProduct(sigma_0=1.0, sigma_0_bounds="fixed"), 2)
        elif self.trend != "none":
            raise InputError(f"GP trend '{self.trend}' is unknown; use quadratic or none")
        return signal + WhiteKernel(1e-2, NOISE_BOUNDS)

    def _objective(self, X, ys):
        """Log posterior of the log hyperparameters and its gradient (likelihood plus the priors above)."""
        return MarginalLikelihood(X, ys, self.nu, self.trend == "quadratic", JITTER, NOISE_PRIOR,
                                  LENGTH_PRIOR if X.shape[0] <= LENGTH_PRIOR_MAX_RUNS else None)

    def _optimise(self, X, ys, kernel, n_restarts):
        """scikit-learn GP on ``(X, ys)``, hyperparameters at the posterior mode (priors above)."""
        fast = self.nu in SUPPORTED_NU
        opt = FastOptimizer(likelihood=self._objective(X, ys)) if fast else "fmin_l_bfgs_b"
        gp = GaussianProcessRegressor(kernel=kernel, alpha=JITTER, normalize_y=False, optimizer=opt,
                                      n_restarts_optimizer=n_restarts, random_state=self.random_state)
        with warnings.catch_warnings():
            # hyperparameters at a bound are reported by windowfinder.models.diagnostics in plain words
            warnings.simplefilter("ignore", ConvergenceWarning)
            gp.fit(X, ys)
        if fast:
            opt.release()
        return gp

    def fit(self, X, y):
        """Fit to coded settings ``X`` (n, d) and natural-unit responses ``y`` (n,)."""
        X, y = _check_xy(X, y)
        n = X.shape[0]
        if n < 2:
            raise InputError(f"a Gaussian-process model needs at least 2 measured runs, got {n}")
        self.transform_ = self._fit_transform(X, y)
        z, self.at_bound_ = self.transform_.measured(y)  # values at a bound kept
        self.y_mean_ = float(np.mean(z))
        spread = float(np.ptp(z))  # std of z / ptp, times ptp: responses near 1e-300 do not underflow
        scale = float(np.std(z / spread)) * spread if spread > 0 else 0.0
        notes = []
        if not np.ptp(z) > 1e-12 * float(np.max(np.abs(z))):
            scale = 1.0
            notes.append("all measured values are equal; the model predicts a constant")
        self.y_scale_ = scale
        ys = (z - self.y_mean_) / self.y_scale_
        max_exact = MAX_EXACT_RUNS if self.max_exact is None else int(self.max_exact)
        m = SUBSET_RUNS if self.n_subset is None else int(self.n_subset)
        self.inducing_, self.note_ = None, ""
        self.block_var_ = 0.0   # set by windowfinder.models.blocks.fit_blocked
        if n <= m:
            gp = self._optimise(X, ys, self._kernel(X.shape[1]), self.n_restarts)
        else:
            sub = kcenter(X, m)
            gp = self._optimise(X[sub], ys[sub], self._kernel(X.shape[1]), self.n_restarts)
            if n <= max_exact:
                gp = self._optimise(X, ys, gp.kernel_, 0)
                self.note_ = (f"{n} runs: optimizer restarts on {m} space-filling runs, final fit on "
                              f"all {n}")
            else:
                self.inducing_ = X[sub]
                self.note_ = (f"{n} runs (more than {max_exact}): approximate model. Hyperparameters "
                              f"fitted on {m} space-filling runs; predictions from all runs by the FITC "
                              "sparse approximation with those runs as inducing points; leave-one-out "
                              "checks are those of the approximation")
                notes.append(self.note_)
        self.warning_ = "; ".join(notes)
        self._thetas = self._hyper_draws(X, ys, gp)
        self._store(gp, X, z)
        return self

    def _fit_transform(self, X, y):
        """The output transform of this fit: the study file's (a warped model fits its own)."""
        return _as_transform(self.transform, self.bounds)

    def _hyper_draws(self, X, ys, gp):
        """Log hyperparameters and weights of the mixture components (the mode alone for ``"map"``)."""
        theta = gp.kernel_.theta
        how = HYPERPARAMETERS if self.hyperparameters is None else self.hyperparameters
        if how not in ("marginal", "map"):
            raise InputError(f"GP hyperparameters '{how}' is unknown; use map or marginal")
        if (how == "map" or self.n_samples < 1 or X.shape[0] > MARGINAL_MAX_RUNS
                or X.shape[0] < MARGINAL_MIN_RUNS_PER_HYPERPARAMETER * theta.size
                or self.nu not in SUPPORTED_NU or not np.ptp(ys) > 0):
            self.hyper_ess_ = float("nan")
            return theta[None, :], np.ones(1)
        objective = self._objective(X, ys)
        d = X.shape[1]
        if objective.length_prior is not None:
            # the sampled variable is log l: its prior density carries the Jacobian l of exp
            # (the mode above is that of the length scales' own prior density)
            def objective(t, _f=objective):
                value, grad = _f(t)
                grad = grad.copy()
                grad[1:1 + d] += 1.0
                return value + float(np.sum(t[1:1 + d])), grad
        thetas, weights, self.hyper_ess_ = sample_hyperparameters(objective, theta, gp.kernel_.bounds,
                                                                  self.n_samples, seed=self.random_state)
        return thetas, weights

    def _fit_fixed(self, X, z):
        gp = self.gp_
        if self.inducing_ is None:
            gp = GaussianProcessRegressor(kernel=gp.kernel_, alpha=JITTER, normalize_y=False, optimizer=None)
            gp.fit(X, (z - self.y_mean_) / self.y_scale_)
        self._store(gp, X, z)

    def _store(self, gp, X, z):
        self.gp_ = gp
        self.X_train_, self.z_train_ = X, z
        k = gp.kernel_
        stationary = k.k1.k1 if self.trend == "quadratic" else k.k1
        c = float(stationary.k1.constant_value)
        self.signal_std_ = self.y_scale_ * float(np.sqrt(c))
        self.length_scales_ = np.broadcast_to(np.asarray(stationary.k2.length_scale, float),
                                              (X.shape[1],)).copy()
        if self.nu in SUPPORTED_NU:
            c_t = float(k.k1.k2.k1.constant_value) if self.trend == "quadratic" else 0.0
            self._signal = SignalKernel(c, self.length_scales_, self.nu, c_t)
        else:
            self._signal = k.k1
        self.sparse_ = None
        ys = (z - self.y_mean_) / self.y_scale_
        self.components_ = [Component(self._signal, k.k2.noise_level, 1.0, k.theta)]
        self.components_[0].L, self.components_[0].alpha = gp.L_, gp.alpha_
        thetas, weights = getattr(self, "_thetas", (k.theta[None, :], np.ones(1)))
        if self.inducing_ is None and len(thetas) > 1:
            self.components_ = (fit_components(thetas, weights, X, ys, self.nu, self.trend == "quadratic",
                                               JITTER) or self.components_)
        self.noise_std_ = self.y_scale_ * float(np.sqrt(sum(c.weight * c.noise_var for c in self.components_)))
        if self.inducing_ is not None:
            self.sparse_ = FITC(self._signal, self.inducing_, X, ys, float(k.k2.noise_level) + JITTER)

    def _basis_size(self):
        return self.X_train_.shape[0] if self.sparse_ is None else self.inducing_.shape[0]

    def _moments(self, X, return_std, noise):
        # GP posterior (Rasmussen & Williams 2006, eqs. 2.25-2.26) with the fitted signal kernel, so the
        # sd excludes the white-noise term unless asked for; FITC above max_exact (windowfinder.models.sparse)
        if self.sparse_ is not None:
            mean, var = self.sparse_.moments(X, return_std)
        else:   # the mode alone, or the mixture over hyperparameter draws (windowfinder.models.marginal)
            mean, var = mixture_predict(self.components_, self.X_train_, X, return_std)
        mean = self.y_mean_ + self.y_scale_ * mean
        if not return_std:
            return mean, None
        var = var * self.y_scale_ ** 2
        if noise:   # a future run: run-to-run noise (mixture: its posterior mean), plus a new block's offset
            var = var + self.noise_std_ ** 2 + self.block_var_
        return mean, np.sqrt(var)

    def cross_covariance(self, A, B, white_a=None):
        """Posterior covariance of the latent mean between ``A`` (m, d) and ``B`` (k, d), (m, k).

        ``k(A, B) - k(A, X) K^-1 k(X, B)`` with the fitted signal kernel (Rasmussen & Williams 2006,
        eq. 2.24), latent units, run-to-run noise excluded. None for the sparse approximation.
        ``white_a``: :meth:`whitened` of ``A``, when already computed. With marginal hyperparameters,
        the covariance of the mixture, ``sum_k w_k (C_k(A, B) + m_k(A) m_k(B)') - m(A) m(B)'``, whose
        diagonal is the variance :meth:`predict` gives.
        """
        if self.sparse_ is not None:
            return None
        Wa = self.whitened(A) if white_a is None else white_a
        Wb = self.whitened(B)
        if len(self.components_) == 1:
            return (self._signal(A, B) - Wa.T @ Wb) * self.y_scale_ ** 2
        return mixture_cross_covariance(self.components_, A, B, Wa, Wb) * self.y_scale_ ** 2

    def whitened(self, P):
        """``L^-1 k(X, P)`` (n, m), the factor of the posterior covariance; reusable for fixed ``P``.

        With marginal hyperparameters, one ``(L_k^-1 k_k(X, P), standardised mean at P)`` per component.
        """
        if len(self.components_) == 1:
            return solve_triangular(self.gp_.L_, self._signal(self.X_train_, P), lower=True,
                                    check_finite=False)
        return mixture_whitened(self.components_, self.X_train_, P)

    def interval_quantile(self, level, loo=False):
        """Standard normal quantile (the GP predictive distribution is Gaussian)."""
        return float(stats.norm.ppf(0.5 + level / 2.0))

    def loo(self):
        """Closed-form leave-one-out predictions at fixed hyperparameters.

        Rasmussen & Williams (2006), §5.4.2, eqs. 5.10-5.12: with ``K`` the full training covariance
        (signal + white noise + jitter), ``mu_i = y_i - [K^-1 y]_i / [K^-1]_ii`` and
        ``sigma_i^2 = 1 / [K^-1]_ii``. The standardisation constants are held fixed too. Above
        ``max_exact`` runs ``K`` is the FITC covariance (:meth:`windowfinder.models.sparse.FITC.loo`).

        With marginal hyperparameters: the same per mixture component, moment-matched with the
        components' weights held fixed (the hyperparameters' posterior is not refitted without the run).

        Returns
        -------
        mean, sd : ndarray (n,)
            Latent units; ``sd`` is the predictive sd of the held-out observation (includes noise).
        """
        if self.sparse_ is not None:
            mu, var = self.sparse_.loo()
            return self.y_mean_ + self.y_scale_ * mu, self.y_scale_ * np.sqrt(var)
        mu, var = mixture_loo(self.components_, (self.z_train_ - self.y_mean_) / self.y_scale_)
        return self.y_mean_ + self.y_scale_ * mu, self.y_scale_ * np.sqrt(var)
