"""A scikit-learn-compatible estimator of one cell's spike counts.

:class:`SpikeGLM` wraps the penalised Poisson spline model (:func:`encodex.fit.fit_poisson`)
in the ``fit / predict / score`` interface with ``get_params / set_params``, so that it can be
cloned, put in a :class:`sklearn.pipeline.Pipeline` or scored with
:func:`sklearn.model_selection.cross_val_score`.

Features ``X`` are behavioural covariates per time bin: a pandas DataFrame with columns named
by :meth:`SpikeGLM.feature_names` (``position_x``, ``position_y`` in metres, ``heading`` in
radians, ``speed`` in m/s, ``distance`` in metres, ``time`` in seconds), or an array with
those columns in that order. ``y`` is the spike count per bin.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin

from encodex.compare.scores import LN2, poisson_loglik
from encodex.errors import InputError, SettingsError
from encodex.variables import KINDS, VARIABLES, canonical_order


class SpikeGLM(RegressorMixin, BaseEstimator):
    """Penalised Poisson GLM of one cell's spike counts on behavioural variables.

    Parameters
    ----------
    variables : tuple of str
        Variables in the model (subset of position, heading, speed, distance, time).
    bin_size : float
        Width of a time bin in seconds; the model's offset is ``log(bin_size)`` so that
        rates are in Hz.
    basis_sizes : dict, optional
        Number of basis functions per variable (planar: per axis).
    lambdas : array_like, optional
        Fixed smoothing parameters; by default chosen by LAML on the training data passed to
        :meth:`fit` (never on data passed to :meth:`score`).

    Attributes
    ----------
    fit_ : encodex.fit.PoissonFit
        The fitted model (``.response(variable)`` gives the tuning curve with 95% band).
    bases_ : dict
        Bases built on the training covariates (ranges from the training data; values
        outside are clipped).
    mean_rate_hz_ : float
        Training spikes / training time, the reference of :meth:`score`.

    References
    ----------
    Eilers & Marx (1996), Statistical Science 11:89 (P-splines); Wood (2017), Generalized
    Additive Models, 2nd ed.
    """

    def __init__(self, variables=("position",), bin_size=0.02, basis_sizes=None, lambdas=None):
        self.variables = variables
        self.bin_size = bin_size
        self.basis_sizes = basis_sizes
        self.lambdas = lambdas

    # -- features ---------------------------------------------------------------------------
    def _vars(self) -> tuple[str, ...]:
        vs = (self.variables,) if isinstance(self.variables, str) else tuple(self.variables)
        bad = [v for v in vs if v not in VARIABLES]
        if not vs or bad:
            raise SettingsError(f"variables must be a non-empty subset of {VARIABLES}; got {vs}")
        return canonical_order(vs)

    def feature_names(self) -> tuple[str, ...]:
        """Column names expected in ``X``, in order."""
        out = []
        for v in self._vars():
            out.extend([f"{v}_x", f"{v}_y"] if KINDS[v] == "planar" else [v])
        return tuple(out)

    def _covariates(self, X) -> dict[str, np.ndarray]:
        names = self.feature_names()
        if hasattr(X, "columns"):
            missing = [c for c in names if c not in X.columns]
            if missing:
                raise InputError(f"X lacks column(s) {missing}; expected {list(names)}")
            arr = np.column_stack([np.asarray(X[c], dtype=float) for c in names])
        else:
            arr = np.asarray(X, dtype=float)
            if arr.ndim == 1:
                arr = arr[:, None]
            if arr.ndim != 2 or arr.shape[1] != len(names):
                raise InputError(f"X must have {len(names)} columns {list(names)}; got shape "
                                 f"{arr.shape}")
        if not np.all(np.isfinite(arr)):
            raise InputError("X has NaN or infinite values; drop those bins first")
        cov, j = {}, 0
        for v in self._vars():
            if KINDS[v] == "planar":
                cov[v] = arr[:, j:j + 2]
                j += 2
            else:
                cov[v] = arr[:, j]
                j += 1
        return cov

    @staticmethod
    def _counts(y, n) -> np.ndarray:
        y = np.asarray(y, dtype=float).ravel()
        if y.shape != (n,):
            raise InputError(f"y has {y.size} bins but X has {n}")
        if np.any(y < 0) or np.any(y != np.round(y)) or not np.all(np.isfinite(y)):
            raise InputError("y must hold spike counts (non-negative whole numbers)")
        return y

    # -- estimator API ----------------------------------------------------------------------
    def fit(self, X, y):
        """Fit on training bins; smoothness chosen by LAML on these bins only."""
        from encodex.design import build_design, default_bases
        from encodex.fit import fit_poisson

        if not (np.isfinite(self.bin_size) and self.bin_size > 0):
            raise SettingsError(f"bin_size must be a positive number of seconds; got "
                                f"{self.bin_size}")
        cov = self._covariates(X)
        n = len(next(iter(cov.values())))
        y = self._counts(y, n)
        self.bases_ = default_bases(cov, self._vars(), sizes=self.basis_sizes)
        design = build_design(cov, self.bases_)
        self.fit_ = fit_poisson(design, y, np.log(self.bin_size), lambdas=self.lambdas)
        self.mean_rate_hz_ = max(float(y.sum()), 0.5) / (n * self.bin_size)
        self.n_features_in_ = len(self.feature_names())
        return self

    def _log_mu(self, X) -> np.ndarray:
        if not hasattr(self, "fit_"):
            from sklearn.exceptions import NotFittedError

            raise NotFittedError("call fit(X, y) before predict or score")
        cov = self._covariates(X)
        n = len(next(iter(cov.values())))
        eta = np.full(n, self.fit_.intercept + np.log(self.bin_size))
        for v in self.fit_.names:
            # Evaluate the training basis and apply the training constraint (via term_beta),
            # so that new data never change the meaning of the coefficients.
            block = self.bases_[v].evaluate(cov[v])
            beta = self.fit_.term_beta(v)
            eta += np.einsum("ij,ij->i", block.values, beta[block.columns])
        return eta

    def predict(self, X) -> np.ndarray:
        """Expected spike count per bin (multiply by 1/bin_size for a rate in Hz)."""
        return np.exp(self._log_mu(X))

    def score(self, X, y, sample_weight=None) -> float:
        """Bits per spike gained over the training mean rate on ``(X, y)`` (higher is better).

        ``(LL_model - LL_mean) / (n_spikes ln 2)`` with Poisson log-likelihoods, the
        held-out score used for model comparison (:mod:`encodex.compare.scores`).
        """
        if sample_weight is not None:
            raise SettingsError("sample_weight is not supported by SpikeGLM.score")
        mu = self.predict(X)
        y = self._counts(y, mu.size)
        mu0 = np.full(mu.size, self.mean_rate_hz_ * self.bin_size)
        gain = poisson_loglik(y, mu) - poisson_loglik(y, mu0)
        return float(gain / (max(float(y.sum()), 1.0) * LN2))
