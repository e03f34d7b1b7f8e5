"""The interface every response model shares: coded inputs, latent predictions, natural intervals."""

from __future__ import annotations

import copy

import numpy as np

from windowfinder.errors import InputError

def _check_xy(X, y=None, d=None):
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X.reshape(-1, 1) if d in (None, 1) else X.reshape(1, -1)
    if X.ndim != 2 or not np.all(np.isfinite(X)):
        bad = int((~np.isfinite(X)).sum()) if X.ndim == 2 else 0
        raise InputError(f"model input: factor settings must be a finite 2-D table (runs x factors), got "
                         f"shape {X.shape}" + (f" with {bad} NaN/infinite cells" if bad else "")
                         + "; check the settings passed in")
    if d is not None and X.shape[1] != d:
        raise InputError(f"factor settings have {X.shape[1]} columns, the model was fitted on {d}")
    if y is None:
        return X
    y = np.asarray(y, dtype=float).ravel()
    if y.shape[0] != X.shape[0]:
        raise InputError(f"{X.shape[0]} runs of factor settings but {y.shape[0]} response values")
    if not np.all(np.isfinite(y)):
        raise InputError("response values must be finite; drop runs that were not measured")
    return X, y


class _ResponseModel:
    """Shared prediction, interval and conditioning logic of the per-response models."""

    kind = ""
    _CHUNK = 20000  # most rows per block in predict
    _CHUNK_ELEMENTS = 2_000_000  # rows x basis size per block (16 MB per array), to bound memory

    def _basis_size(self):
        """Columns of the per-block cross matrix (training runs, inducing points or model terms)."""
        return 1

    def _chunk_rows(self):
        return int(max(1, min(self._CHUNK, self._CHUNK_ELEMENTS // max(self._basis_size(), 1))))

    def interval_quantile(self, level, loo=False):
        """Two-sided quantile multiplier for a central interval of probability ``level``."""
        raise NotImplementedError

    def predict(self, X, return_std=True, noise=False):
        """Latent mean and, with ``return_std``, latent sd (model; plus noise sd when ``noise=True``)."""
        X = _check_xy(X, d=self.X_train_.shape[1])
        rows = self._chunk_rows()
        parts = [self._moments(X[i:i + rows], return_std, noise) for i in range(0, max(X.shape[0], 1), rows)]
        mean = np.concatenate([m for m, _ in parts])
        return (mean, np.concatenate([v for _, v in parts])) if return_std else mean

    def condition(self, X_new, y_new_latent):
        """New model on the data augmented by ``X_new`` with latent values ``y_new_latent``.

        Hyperparameters (and the GP's standardisation) are kept: no re-optimisation. For batch
        fantasies such as the kriging believer.
        """
        X_new = _check_xy(X_new, d=self.X_train_.shape[1])
        z_new = np.broadcast_to(np.asarray(y_new_latent, float).ravel(), (X_new.shape[0],))
        new = copy.copy(self)
        new._fit_fixed(np.vstack([self.X_train_, X_new]), np.concatenate([self.z_train_, z_new]))
        return new

    def predict_interval(self, X, level=0.95, noise=True):
        """Median and central ``level`` interval in natural units.

        The latent normal (or Student-t) quantiles are mapped through the inverse transform, which is
        exact for a monotone transform.

        Returns
        -------
        median, low, high : ndarray (n,)
        """
        if not 0.0 < level < 1.0:
            raise InputError(f"interval level must lie strictly between 0 and 1, got {level}")
        mu, sd = self.predict(X, return_std=True, noise=noise)
        q = self.interval_quantile(level)
        inv = self.transform_.inverse
        return inv(mu), inv(mu - q * sd), inv(mu + q * sd)


