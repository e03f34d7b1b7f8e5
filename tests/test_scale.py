"""Many runs: the fast likelihood, the automatic switch to the FITC approximation, its accuracy against
scikit-learn's exact Gaussian process, its leave-one-out formulas, and chunked prediction."""

import itertools

import windowfinder  # noqa: F401  (single-threaded BLAS when this module is imported first)
import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.spatial.distance import cdist
from scipy.stats import qmc
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from threadpoolctl import threadpool_limits

from windowfinder.models.likelihood import SUPPORTED_NU, MarginalLikelihood, SignalKernel
from windowfinder.models.sparse import FITC, kcenter
from windowfinder.models.gp import JITTER, LENGTH_PRIOR, MAX_EXACT_RUNS, NOISE_PRIOR, GPModel
from windowfinder.models.failure import FailureModel

# Hartmann 3-d test function (Hartmann 1973; Dixon & Szego 1978, "The global optimisation problem: an
# introduction", in Towards Global Optimisation 2), constants as tabulated in the Surjanovic & Bingham
# virtual library of simulation experiments (from memory). Only used to make smooth data.
_A = np.array([[3.0, 10, 30], [0.1, 10, 35], [3.0, 10, 30], [0.1, 10, 35]])
_P = 1e-4 * np.array([[3689, 1170, 2673], [4699, 4387, 7470], [1091, 8732, 5547], [381, 5743, 8828]])
_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])


@pytest.fixture(scope="module", autouse=True)
def _one_blas_thread():
    # windowfinder's default, also when another module loaded numpy first
    with threadpool_limits(1, user_api="blas"):
        yield


def hartmann3(X):
    return -np.sum(_ALPHA * np.exp(-np.sum(_A * (X[:, None, :] - _P) ** 2, axis=2)), axis=1)


def _data(n, d=3, noise=0.1, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.random((n, d))
    f = hartmann3(X[:, :3]) + (X[:, 3:] ** 2).sum(axis=1)
    return X, f + noise * rng.standard_normal(n)


@pytest.fixture(scope="module")
def big():
    """1200 noisy runs in 3 factors (above MAX_EXACT_RUNS), 2048 held-out points, and both models."""
    assert 1200 > MAX_EXACT_RUNS
    X, y = _data(1200)
    Xt = qmc.Sobol(3, seed=1).random(2048)
    ft = hartmann3(Xt)
    yt = ft + 0.1 * np.random.default_rng(2).standard_normal(len(Xt))
    model = GPModel(n_restarts=2, random_state=0).fit(X, y)
    # reference: scikit-learn's exact GP on all 1200 runs, its own optimizer, a plain Matern-5/2 ARD
    # kernel with noise
    kernel = ConstantKernel(1.0, (1e-2, 1e2)) * Matern(np.full(3, 0.5), (0.05, 20.0), nu=2.5) \
        + WhiteKernel(1e-2, (1e-6, 1.0))
    exact = GaussianProcessRegressor(kernel, alpha=JITTER, normalize_y=True, random_state=0).fit(X, y)
    return X, y, Xt, ft, yt, model, exact


def test_switch_above_threshold_says_so(big):
    X, y, *_, model, _ = big
    assert model.sparse_ is not None and model.inducing_.shape == (500, 3)
    assert "FITC" in model.note_ and "1200 runs" in model.note_
    assert model.note_ in model.warning_          # diagnostics print warning_
    assert model.gp_.X_train_.shape[0] == 500     # hyperparameters from the subset
    assert model.X_train_.shape[0] == 1200        # predictions from all runs
    small = GPModel(n_restarts=0).fit(*_data(60))
    assert small.sparse_ is None and small.note_ == "" and small.warning_ == ""


def test_thresholds_are_parameters():
    X, y = _data(150)
    middle = GPModel(n_restarts=1, n_subset=40, max_exact=200).fit(X, y)
    assert middle.sparse_ is None and middle.gp_.X_train_.shape[0] == 150 and "restarts on 40" in middle.note_
    approx = GPModel(n_restarts=1, n_subset=40, max_exact=100).fit(X, y)
    assert approx.sparse_ is not None and approx.inducing_.shape[0] == 40 and approx.warning_


def test_accuracy_against_exact_sklearn_gp(big):
    # Held-out RMSE of the FITC path (against the noise-free truth) within 15 % of scikit-learn's exact
    # GaussianProcessRegressor on the same runs, and 95 % prediction intervals covering 85-100 % of noisy
    # held-out observations (nominal 95 %; tolerance common practice, no source).
    X, y, Xt, ft, yt, model, exact = big
    mu, sd = model.predict(Xt, return_std=True, noise=True)
    mu_ex, sd_ex = exact.predict(Xt, return_std=True)        # WhiteKernel in the kernel: sd includes noise
    rmse, rmse_ex = np.sqrt(np.mean((mu - ft) ** 2)), np.sqrt(np.mean((mu_ex - ft) ** 2))
    assert rmse <= 1.15 * rmse_ex
    coverage = np.mean(np.abs(yt - mu) <= 1.959964 * sd)
    assert 0.85 <= coverage <= 1.0
    assert np.mean(np.abs(yt - mu_ex) <= 1.959964 * sd_ex) == pytest.approx(coverage, abs=0.03)


def test_loo_at_scale_equals_refits(big):
    # Closed-form LOO of the FITC model (Rasmussen & Williams 2006, §5.4.2, with the FITC covariance)
    # against brute force: rebuild FITC without run i (same hyperparameters and inducing inputs) and
    # predict run i with noise.
    X, y, *_, model, _ = big
    mu, sd = model.loo()
    assert mu.shape == sd.shape == (1200,) and np.all(sd > 0)
    f = model.sparse_
    noise = model.gp_.kernel_.k2.noise_level + JITTER
    ys = (model.z_train_ - model.y_mean_) / model.y_scale_
    for i in (0, 17, 599, 1199):
        keep = np.arange(1200) != i
        ref = FITC(f.kernel, f.Z, X[keep], ys[keep], noise)
        m_i, v_i = ref.moments(X[i:i + 1])
        assert mu[i] == pytest.approx(model.y_mean_ + model.y_scale_ * m_i[0], rel=1e-6, abs=1e-8)
        assert sd[i] == pytest.approx(model.y_scale_ * np.sqrt(v_i[0] + noise), rel=1e-6)


def test_fitc_matches_dense_formulas():
    # FITC predictive mean and variance (Quinonero-Candela & Rasmussen 2005, JMLR 6, §6):
    # mu* = Q*f (Q_ff + Lambda)^-1 y, var* = k** - Q*f (Q_ff + Lambda)^-1 Qf*,
    # Lambda = diag(K_ff - Q_ff) + s2, evaluated densely with numpy.
    rng = np.random.default_rng(3)
    X, y = _data(200, seed=3)
    Z, Xt = X[kcenter(X, 30)], rng.random((50, 3))
    kern = SignalKernel(1.3, np.array([0.3, 0.5, 0.8]), 2.5, 0.05)
    f = FITC(kern, Z, X, y, 0.01, jitter=0.0)
    Kuu_inv = np.linalg.inv(kern(Z, Z))
    Qff = kern(X, Z) @ Kuu_inv @ kern(Z, X)
    Qtf = kern(Xt, Z) @ Kuu_inv @ kern(Z, X)
    Cinv = np.linalg.inv(Qff + np.diag(kern.diag(X) - np.diag(Qff) + 0.01))
    mean, var = f.moments(Xt)
    np.testing.assert_allclose(mean, Qtf @ Cinv @ y, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(var, kern.diag(Xt) - np.einsum("ij,jk,ik->i", Qtf, Cinv, Qtf),
                               rtol=1e-6, atol=1e-9)


def test_fitc_with_every_run_inducing_is_the_exact_gp():
    # With Z = X, Q = K and Lambda = s2: FITC is the exact GP (Quinonero-Candela & Rasmussen 2005, §6);
    # reference: scikit-learn's GaussianProcessRegressor with the same kernel.
    X, y = _data(120, seed=4)
    model = GPModel(n_restarts=0).fit(X, y)
    k = model.gp_.kernel_
    f = FITC(model._signal, X, X, (y - model.y_mean_) / model.y_scale_, k.k2.noise_level + JITTER, jitter=0.0)
    Xt = np.random.default_rng(5).random((40, 3))
    mean, var = f.moments(Xt)
    ref = GaussianProcessRegressor(k.k1, alpha=k.k2.noise_level + JITTER, optimizer=None)
    ref.fit(X, (y - model.y_mean_) / model.y_scale_)
    r_mu, r_sd = ref.predict(Xt, return_std=True)
    np.testing.assert_allclose(mean, r_mu, rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(np.sqrt(var), r_sd, rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("approx", [False, True])
def test_chunked_prediction_equals_unchunked(approx):
    X, y = _data(300, seed=6)
    model = GPModel(n_restarts=0, n_subset=80, max_exact=100 if approx else 1000).fit(X, y)
    assert (model.sparse_ is not None) == approx
    Xt = np.random.default_rng(7).random((1001, 3))
    whole = model.predict(Xt, noise=True)
    model._CHUNK_ELEMENTS = 7 * model._basis_size()       # 7 rows per block, 143 blocks
    assert model._chunk_rows() == 7
    parts = model.predict(Xt, noise=True)
    np.testing.assert_allclose(parts[0], whole[0], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(parts[1], whole[1], rtol=1e-12, atol=1e-12)


def test_conditioning_the_approximate_model_keeps_its_inducing_points():
    # kriging-believer fantasies (windowfinder.nextruns.suggestions) on the FITC path: the conditioned model is FITC
    # on the augmented runs with the same inducing inputs and hyperparameters
    X, y = _data(150, seed=13)
    model = GPModel(n_restarts=0, n_subset=40, max_exact=100).fit(X, y)
    x_new, z_new = np.array([[0.2, 0.4, 0.6]]), np.array([-0.5])
    new = model.condition(x_new, z_new)
    assert new.X_train_.shape[0] == 151 and model.X_train_.shape[0] == 150
    ys = (np.append(model.z_train_, z_new) - model.y_mean_) / model.y_scale_
    ref = FITC(model._signal, model.inducing_, np.vstack([X, x_new]), ys,
               model.gp_.kernel_.k2.noise_level + JITTER)
    Xt = np.random.default_rng(14).random((20, 3))
    mu, sd = new.predict(Xt)
    r_mu, r_var = ref.moments(Xt)
    np.testing.assert_allclose(mu, model.y_mean_ + model.y_scale_ * r_mu, rtol=1e-10)
    np.testing.assert_allclose(sd, model.y_scale_ * np.sqrt(r_var), rtol=1e-10)


def test_chunk_size_bounds_memory():
    model = GPModel(n_restarts=0).fit(*_data(400, seed=8))
    rows = model._chunk_rows()
    assert rows * 400 <= model._CHUNK_ELEMENTS and rows < model._CHUNK


@pytest.mark.parametrize("nu,trend", list(itertools.product(SUPPORTED_NU, (True, False))))
def test_likelihood_and_gradient_equal_sklearn(nu, trend):
    # reference: scikit-learn GaussianProcessRegressor.log_marginal_likelihood(theta, eval_gradient=True)
    rng = np.random.default_rng(9)
    X, y = rng.random((40, 3)), rng.standard_normal(40)
    kernel = GPModel(nu=nu, trend="quadratic" if trend else "none")._kernel(3)
    gp = GaussianProcessRegressor(kernel, alpha=JITTER, optimizer=None).fit(X, y)
    for theta in rng.uniform(kernel.bounds[:, 0], kernel.bounds[:, 1], size=(3, len(kernel.theta))):
        ref, ref_grad = gp.log_marginal_likelihood(theta, eval_gradient=True)
        lml, grad = MarginalLikelihood(X, y, nu, trend, JITTER)(theta)
        assert lml == pytest.approx(ref, rel=1e-9, abs=1e-8)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-6, atol=1e-6)


def test_prior_terms_and_gradient():
    # log-normal prior on the noise variance: log posterior = log likelihood - (theta_noise - m)^2 / (2 sd^2),
    # Gamma on the length scales (closed forms); gradients against central finite differences
    rng = np.random.default_rng(4)
    X, y = rng.random((25, 2)), rng.standard_normal(25)
    plain, prior = MarginalLikelihood(X, y), MarginalLikelihood(X, y, noise_prior=NOISE_PRIOR)
    theta, h = np.array([0.3, -1.0, -0.5, -2.0, -3.0]), 1e-6
    m, sd = NOISE_PRIOR
    assert prior(theta)[0] == pytest.approx(plain(theta)[0] - 0.5 * ((theta[-1] - m) / sd) ** 2, rel=1e-12)
    # Gamma(a, b) on each length scale: + sum((a - 1) log l - b l)
    a, b = LENGTH_PRIOR
    both = MarginalLikelihood(X, y, noise_prior=NOISE_PRIOR, length_prior=LENGTH_PRIOR)
    ls = np.exp(theta[1:3])
    assert both(theta)[0] == pytest.approx(prior(theta)[0] + np.sum((a - 1) * np.log(ls) - b * ls), rel=1e-12)
    fd = [(both(theta + h * e)[0] - both(theta - h * e)[0]) / (2 * h) for e in np.eye(len(theta))]
    np.testing.assert_allclose(both(theta)[1], fd, rtol=1e-5, atol=1e-6)
    grad = prior(theta)[1]
    fd = [(prior(theta + h * e)[0] - prior(theta - h * e)[0]) / (2 * h) for e in np.eye(len(theta))]
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-6)


@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
def test_fit_reaches_sklearn_optimum():
    # same kernel, restarts and seed with scikit-learn's own likelihood (plus the same priors, added
    # here by hand: log-normal on the noise variance, Gamma on the length scales) minimised by scipy's
    # L-BFGS-B, scikit-learn's default optimizer: the same best log posterior (R&W 2006, §5.2)
    m, sd = NOISE_PRIOR
    a, b = LENGTH_PRIOR

    def sklearn_map(obj_func, theta0, bounds):
        def fun(theta):
            f, g = obj_func(theta)   # negative log likelihood and its gradient
            g = np.array(g, dtype=float)
            g[-1] += (theta[-1] - m) / sd ** 2
            ls = np.exp(theta[1:4])  # three factors
            g[1:4] -= (a - 1.0) - b * ls
            return f + 0.5 * ((theta[-1] - m) / sd) ** 2 - np.sum((a - 1.0) * theta[1:4] - b * ls), g
        res = minimize(fun, theta0, jac=True, method="L-BFGS-B", bounds=bounds)
        return res.x, res.fun

    X, y = _data(40, seed=10)
    model = GPModel(n_restarts=3, random_state=2).fit(X, y)
    ys = (y - model.y_mean_) / model.y_scale_
    ref = GaussianProcessRegressor(model._kernel(3), alpha=JITTER, n_restarts_optimizer=3, random_state=2,
                                   optimizer=sklearn_map)
    ref.fit(X, ys)
    assert model.gp_.log_marginal_likelihood_value_ == pytest.approx(ref.log_marginal_likelihood_value_,
                                                                     abs=1e-4)


def test_kcenter_is_within_twice_the_optimal_radius():
    # Gonzalez (1985): greedy farthest-point selection covers every point within twice the optimal
    # k-center radius; optimum by brute force over all 3-subsets of 18 points.
    X = np.random.default_rng(11).random((18, 2))
    D = cdist(X, X)
    best = min(D[:, list(c)].min(axis=1).max() for c in itertools.combinations(range(18), 3))
    chosen = kcenter(X, 3)
    assert len(set(chosen)) == 3
    assert D[:, chosen].min(axis=1).max() <= 2.0 * best + 1e-12


def test_failure_model_uses_a_subset_above_its_size():
    rng = np.random.default_rng(12)
    X = rng.random((90, 2))
    works = X[:, 0] < 0.6
    fm = FailureModel(n_restarts=0, n_subset=40).fit(X, works)
    assert fm.X_train_.shape[0] == 40 and "40 space-filling runs of 90" in fm.note_
    p = fm.predict_proba(np.array([[0.1, 0.5], [0.95, 0.5]]))
    assert p[0] > 0.5 > p[1]
