"""Expected window growth: how much one more run is expected to enlarge the process window.

A setting is *confirmed* when a new run there meets every limit (and works) with probability at least
the confidence ``c``; the window is a box of confirmed settings whose tolerance band is confirmed too.
One more run at ``x`` changes each response model's posterior: with ``y`` its unknown latent outcome,
the posterior mean at a reference setting ``z`` moves by ``s(z, x) eps`` with
``s(z, x) = k_n(z, x) / sqrt(k_n(x, x) + tau^2)`` and ``eps ~ N(0, 1)``, and the posterior variance
falls to ``k_n(z, z) - s(z, x)^2`` whatever ``y`` turns out to be (``k_n`` the current posterior
covariance, ``tau`` the run-to-run noise sd; Rasmussen & Williams 2006, eqs. 2.24-2.26, one run ahead).
This one-step look-ahead of a Gaussian-process excursion set is the basis of the stepwise uncertainty
reduction criteria of Bect, Ginsbourger, Li, Picheny & Vazquez (2012, "Sequential design of computer
experiments for the estimation of a probability of failure", Statistics and Computing 22) and Chevalier,
Bect, Ginsbourger, Vazquez, Picheny & Richet (2014, "Fast parallel kriging-based stepwise uncertainty
reduction with application to the identification of an excursion set", Technometrics 56). Here it is
applied to the joint probability of several limits with run-to-run noise, and the quantity looked
ahead at is the window itself:

- **faces** (a window exists): the reference settings lie in :data:`N_LAYERS` layers just outside each
  face of the window's tolerance band, reaching half the window's width along that factor (at least
  :data:`MARGIN`). A face can advance as far as its leading layers are all confirmed, so the criterion
  is ``sum_faces area x E_eps[advance]`` - the expected first-order growth of the box's volume,
  minus the same measure before the run. Own construction on the look-ahead above; no published
  source for the face form.
- **volume** (no window yet, or exploring): ``E_eps[vol{z : confirmed}] - vol{z : confirmed now}`` on a
  Sobol set of the whole space: the expected growth of the confirmed volume anywhere.

The fantasised outcomes ``eps`` are common random numbers (:data:`N_DRAWS` per response, the same for
every candidate), so candidates are compared on the same draws. The failure model is not looked ahead.
"""

from __future__ import annotations

import numpy as np

from scipy.special import ndtr

from windowfinder.inputs.designs import sobol

N_REFERENCE = 256     # reference settings over the whole space (no window yet)
N_LAYERS = 4          # layers of depth outside each face of the window
N_FACE_POINTS = 8     # settings per layer and per factor along the face ...
MAX_FACE_POINTS = 24  # ... at most this many per layer
DEPTH = 0.5           # deepest layer: half the window's width along that factor ...
MARGIN = 0.05         # ... but at least this, coded units
N_DRAWS = 16          # fantasised outcomes per response (common random numbers)
CHUNK = 64            # candidates per block (memory: N_REFERENCE x CHUNK x N_DRAWS floats)


def _log_p(mu, sd, lo, hi):
    """log P(lo <= N(mu, sd^2) <= hi), floored at 1e-300; plain normal tails (only values near the
    confidence matter here)."""
    p = ndtr((hi - mu) / sd) if np.isfinite(hi) else 1.0
    if np.isfinite(lo):
        p = p - ndtr((lo - mu) / sd)
    return np.log(np.maximum(p, 1e-300))


def _face_layers(lower, upper, tolerance, depth, n_layers, n_points, seed):
    """Reference settings just outside each face of the window's guard box, in layers of depth.

    Returns the settings (faces x layers x points, d), and per face the box area it would add to per
    unit of advance and the depth of one layer; faces on the edge of the space are left out.
    """
    d = len(lower)
    g_lo, g_hi = np.clip(lower - tolerance, 0.0, 1.0), np.clip(upper + tolerance, 0.0, 1.0)
    width = upper - lower
    Z, area, step = [], [], []
    for j in range(d):
        others = [k for k in range(d) if k != j]
        face = g_lo[others] + (g_hi - g_lo)[others] * sobol(max(d - 1, 1), n_points, seed + j)[:, : d - 1]
        for side in (-1.0, 1.0):
            start = g_lo[j] if side < 0 else g_hi[j]
            room = start if side < 0 else 1.0 - start
            reach = min(max(depth * width[j], MARGIN), room)
            if reach < 1e-3:
                continue
            for layer in range(1, n_layers + 1):
                P = np.empty((n_points, d))
                P[:, others] = face
                P[:, j] = start + side * reach * layer / n_layers
                Z.append(P)
            area.append(float(np.prod(width[others])))
            step.append(reach / n_layers)
    if not Z:
        return np.empty((0, d)), np.empty(0), np.empty(0)
    return np.vstack(Z), np.array(area), np.array(step)


class WindowGain:
    """Expected growth of the window from one more run (see the module docstring).

    Parameters
    ----------
    d : int
        Number of factors.
    confidence : float
    box : (ndarray, ndarray) or None
        Lower and upper corner of the current window (coded). None: no window yet; the criterion is
        the expected growth of the confirmed volume over the whole space.
    tolerance : ndarray (d,) or None
        Coded factor tolerances: the guard band around the window.
    n_draws : int
    seed : int

    Attributes
    ----------
    Z_ : ndarray (n, d)
        Reference settings: layers outside each face of the guard box, or a Sobol set of the space.
    area_, step_ : ndarray (faces,)
        Window area of each face and the depth of one layer (face mode).
    """

    def __init__(self, d, confidence, box=None, tolerance=None, n_draws=N_DRAWS, seed=0):
        self.d, self.confidence = int(d), float(confidence)
        self.n_draws, self.seed = int(n_draws), int(seed)
        self.area_ = self.step_ = None
        self._cache, self._v_now, self._log_works = {}, {}, None
        if box is not None:
            t = np.zeros(d) if tolerance is None else np.asarray(tolerance, float)
            Z, area, step = _face_layers(np.asarray(box[0], float), np.asarray(box[1], float), t, DEPTH,
                                         N_LAYERS, min(N_FACE_POINTS * max(d - 1, 1), MAX_FACE_POINTS), seed)
            if len(area):
                self.Z_, self.area_, self.step_ = Z, area, step
                return
        self.Z_ = sobol(d, N_REFERENCE, seed)

    def _state(self, model):
        """Mean and sd at the reference settings and their whitened cross-covariances, once per model
        (the models of one state of the batch; a conditioned model is a new object)."""
        key = id(model)
        if key not in self._cache:
            mu_sd = model.predict(self.Z_, return_std=True, noise=False)
            self._cache[key] = (mu_sd, model.whitened(self.Z_), model)   # the model keeps its id valid
        return self._cache[key][:2]

    def _value(self, ok):
        """Window measure of confirmed indicators ``ok`` (z, m, S) -> (m,): the expected advance of
        the faces times their area, or the confirmed share of the space."""
        if self.area_ is None:
            return ok.mean(axis=(0, 2))
        faces = len(self.area_)
        layers = ok.reshape(faces, N_LAYERS, -1, *ok.shape[1:]).all(axis=2)     # (F, L, m, S)
        advance = np.cumprod(layers, axis=1).sum(axis=1) * self.step_[:, None, None]
        return np.einsum("f,fms->m", self.area_, advance) / ok.shape[2]

    def __call__(self, models, limits, p_works, X):
        """Expected window growth from one run at each row of ``X`` (coded units of volume).

        Parameters
        ----------
        models : dict name -> GPModel
            Response models offering ``cross_covariance``.
        limits : list of (name, lo, hi)
            Latent-scale limits (``-inf`` / ``inf`` for open sides).
        p_works : callable (n, d) -> (n,)
            Probability that a run works (not part of the fantasy).
        X : ndarray (m, d)

        Returns
        -------
        ndarray (m,)
        """
        X = np.atleast_2d(np.asarray(X, float))
        Z, log_c = self.Z_, np.log(self.confidence)
        names = list(dict.fromkeys(n for n, _, _ in limits))
        eps = {n: np.random.default_rng([self.seed, k]).standard_normal(self.n_draws)
               for k, n in enumerate(names)}     # common random numbers: the same for every candidate
        cached = {n: self._state(models[n]) for n in names}
        now = {n: cached[n][0] for n in names}
        tau2 = {n: float(getattr(models[n], "noise_std_", 0.0)) ** 2 for n in names}
        if self._log_works is None:      # the failure model is not looked ahead: the same for every state
            self._log_works = np.log(np.maximum(np.asarray(p_works(Z), float), 1e-300))
        log_works = self._log_works
        key = tuple(id(models[n]) for n in names) + tuple(limits)
        if key not in self._v_now:
            base = log_works + sum(_log_p(now[n][0], np.sqrt(now[n][1] ** 2 + tau2[n]), lo, hi)
                                   for n, lo, hi in limits)
            self._v_now[key] = float(self._value((base >= log_c)[:, None, None])[0])
        v_now = self._v_now[key]
        out = np.empty(len(X))
        for i in range(0, len(X), CHUNK):
            Xc = X[i:i + CHUNK]
            log_in = log_works[:, None, None]
            fantasy = {}
            for n in names:
                m = models[n]
                var_x = m.predict(Xc, return_std=True, noise=False)[1] ** 2 + tau2[n]
                s = m.cross_covariance(Z, Xc, cached[n][1]) / np.sqrt(var_x)[None, :]   # (z, m)
                mu, sd = now[n]
                var = np.maximum(sd[:, None] ** 2 - s ** 2, 0.0) + tau2[n]
                fantasy[n] = (mu[:, None, None] + s[:, :, None] * eps[n][None, None, :],
                              np.sqrt(var)[:, :, None])
            for n, lo, hi in limits:
                log_in = log_in + _log_p(*fantasy[n], lo, hi)
            out[i:i + CHUNK] = self._value(log_in >= log_c) - v_now
        return out
