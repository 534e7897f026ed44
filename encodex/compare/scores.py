"""Held-out scores of a Poisson model of spike counts.

All scores compare a model's expected counts on held-out bins with a mean-rate model whose
single rate was estimated on the training bins of the same fold.

- Bits per spike: ``(LL_model - LL_mean) / (n_spikes * ln 2)`` on the held-out bins, with
  the held-out spike count in the denominator (Skaggs-style information rate of a predictive
  model; e.g. Hardcastle et al. 2017, Neuron 94:375, who report log-likelihood increase in
  bits per spike).
- McFadden pseudo-R2: ``1 - LL_model / LL_mean`` with full Poisson log-likelihoods
  (McFadden 1974, in Zarembka (ed.), Frontiers in Econometrics, pp. 105-142), out of sample.
- Fraction of deviance explained: ``1 - D_model / D_mean`` with the Poisson deviance
  ``D = 2 * sum(y log(y / mu) - (y - mu))`` (Cameron & Windmeijer 1996, J. Bus. Econ. Stat.
  14:209).

Functions here are pure; they never look at which bins are training or test.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln

from encodex.fit.result import poisson_deviance as _fit_deviance
from encodex.fit.result import poisson_loglik as _fit_loglik
from encodex.fit.result import poisson_loglik_deviance

LN2 = float(np.log(2.0))


def poisson_loglik(y: np.ndarray, mu: np.ndarray) -> float:
    """Full Poisson log-likelihood ``sum(y log mu - mu - log y!)`` in nats.

    ``mu == 0`` with ``y > 0`` gives ``-inf``; ``y == 0`` bins contribute ``-mu``.
    """
    return _fit_loglik(y, mu)


def poisson_deviance(y: np.ndarray, mu: np.ndarray) -> float:
    """Poisson deviance ``2 * sum(y log(y / mu) - (y - mu))`` (terms with y = 0 give 2 mu)."""
    return _fit_deviance(y, mu)


def mean_rate_counts(
    y_train: np.ndarray, offset_train: np.ndarray, offset_test: np.ndarray
) -> np.ndarray:
    """Expected held-out counts of the mean-rate model fitted on the training bins.

    The maximum-likelihood rate of ``y ~ Poisson(exp(offset) * r)`` is
    ``sum(y) / sum(exp(offset))``. A training set without spikes would give rate 0 and an
    infinite held-out loss, so the rate is floored at half a spike over the training time.
    """
    exposure = float(np.sum(np.exp(offset_train)))
    rate = max(float(np.sum(y_train)), 0.5) / exposure
    return rate * np.exp(np.asarray(offset_test, dtype=float))


@dataclass(frozen=True)
class HeldOutScore:
    """Scores of one model on one held-out fold (or on all held-out bins pooled)."""

    n_spikes: int
    loglik: float
    loglik_mean: float
    bits_per_spike: float
    pseudo_r2: float
    deviance_explained: float


#: Held-out predictions are floored at this fraction of the mean-rate prediction. A fold fit
#: whose coefficients diverged (a handful of training spikes, all at one end of a variable)
#: can predict a rate of exactly 0 where a held-out spike falls, an infinite loss; with the
#: floor it costs log(1e-6), about 20 bits for that spike, which still fails the model.
PREDICTION_FLOOR = 1e-6


def heldout_score(y: np.ndarray, mu: np.ndarray, mu_mean: np.ndarray) -> HeldOutScore:
    """Score expected counts ``mu`` against observed ``y`` and the mean-rate counts ``mu_mean``.

    Parameters
    ----------
    y : ndarray of int
        Observed spike counts in the held-out bins.
    mu : ndarray of float
        Expected counts of the model in the same bins.
    mu_mean : ndarray of float
        Expected counts of the mean-rate model (rate from the training bins).

    Returns
    -------
    HeldOutScore
        ``bits_per_spike`` divides the log-likelihood gain by the held-out spike count (by 1
        when the fold holds no spike, so that the score stays finite). Predictions are floored
        at :data:`PREDICTION_FLOOR` times the mean-rate prediction.
    """
    n = int(np.sum(y))
    mu = np.maximum(mu, PREDICTION_FLOOR * np.asarray(mu_mean, dtype=float))
    # The logs of the counts are shared by both predictions (this runs once per fold and
    # model: ~5% of a 5-minute cell's time when each sum found its own spikes).
    y = np.asarray(y, dtype=float)
    spikes = np.flatnonzero(y)
    log_factorials = gammaln(y[spikes] + 1.0)
    ll, d = poisson_loglik_deviance(y, mu, spikes, log_factorials)
    ll0, d0 = poisson_loglik_deviance(y, mu_mean, spikes, log_factorials)
    gain = ll - ll0
    bps = gain / (max(n, 1) * LN2)
    r2 = 1.0 - ll / ll0 if ll0 != 0 else np.nan
    dev = 1.0 - d / d0 if d0 > 0 else np.nan
    return HeldOutScore(n, ll, ll0, float(bps), float(r2), float(dev))


def pool_scores(folds: list[tuple[np.ndarray, np.ndarray, np.ndarray]]) -> HeldOutScore:
    """Score all held-out bins together: ``folds`` is a list of ``(y, mu, mu_mean)``."""
    y = np.concatenate([f[0] for f in folds])
    mu = np.concatenate([f[1] for f in folds])
    mu0 = np.concatenate([f[2] for f in folds])
    return heldout_score(y, mu, mu0)
