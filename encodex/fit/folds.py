"""Refit a model on the training part of each cross-validation fold, fast.

Exact refits run Newton's method on every fold's training rows (each costing a few passes
over all bins). The one-step refit instead starts from the model fitted to all bins and takes
a single Newton step for each fold, with the fold's Hessian and gradient formed by
*subtraction*: the per-fold pieces ``X_k' W X_k`` and ``X_k'(mu - y)`` are computed in one
pass over the bins, and "all folds but k" is the total minus piece ``k``. Ten folds then cost
about one pass instead of twenty or thirty.

A Newton step from the full-data optimum is the classical one-step estimator: leaving out a
tenth of the bins moves the optimum by O(1/n) and the step removes the first-order error, so
the remaining error is second order (Bickel 1975, JASA 70:428, "One-step Huber estimates in
the linear model"; for cross-validation the same idea underlies approximate leave-out
formulas, e.g. Rad & Maleki 2020, JRSS-B 82:965). Every step is checked to decrease the
fold's training objective; a fold where it does not is refitted exactly.

Smoothing parameters are those of the full-data fit, reused by every fold (documented in the
model-comparison settings).
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln

from encodex.design import Design
from encodex.threads import single_threaded

from .engine import FitOptions, _posterior_covariance, fit_poisson
from .result import PoissonFit
from .solver import PenalisedPoissonNewton


@single_threaded
def refit_folds(design: Design, y, offset, full: PoissonFit, folds: np.ndarray, n_folds: int,
                exact: bool = False, options: FitOptions | None = None,
                heldout: bool = False, covariances: bool = True):
    """Fit ``full``'s model with its smoothing parameters on every fold's training rows.

    Parameters
    ----------
    design : Design
        The design ``full`` was fitted on (all bins).
    y : ndarray, shape (n_rows,)
        Spike counts.
    offset : float or ndarray
        Log exposure (log bin width, s).
    full : PoissonFit
        Fit of the same model to the bins of all folds (rows with ``folds >= 0``).
    folds : ndarray of int, shape (n_rows,)
        Fold of each bin, ``0 .. n_folds - 1``; negative for bins in no fold (ignored).
        Folds should be contiguous runs of bins (blocks of time).
    n_folds : int
    exact : bool
        Refit every fold by Newton's method to convergence instead of one step.
    heldout : bool
        Also return each fit's expected counts on its own fold's bins (held out from it).
    covariances : bool
        Give each one-step fit its posterior covariance and effective degrees of freedom
        (an ``n_theta x n_theta`` inverse per fold). Scoring needs neither: with False the
        one-step fits carry ``covariance=None`` and empty ``edf`` (exact refits always
        have them).

    Returns
    -------
    list of PoissonFit
        Fit ``k`` used every fold but ``k``; its ``reason`` says "one Newton step from the
        full-data fit" or how the exact refit ended.
    list of ndarray
        Only with ``heldout=True``: expected counts of fit ``k`` on the bins of fold ``k``, in
        row order.

    Notes
    -----
    The one-step refits take one pass over the bins for the per-fold Gram pieces, one for the
    per-fold gradients and one for the linear predictors of all the steps together
    (:meth:`Design.linear_predictors`, one column per fold, in the Gram plan's arithmetic:
    the steps' increments of the linear predictor, exponentiated in that precision and
    multiplied into the exact float64 rates); each fold's objective, log-likelihood and
    deviance are then float64 sums over those columns.
    """
    y = np.asarray(y, dtype=float)
    folds = np.asarray(folds)
    options = options or FitOptions()
    test_rows = [np.flatnonzero(folds == k) for k in range(n_folds)]
    if exact:
        fits = [fit_poisson(design, y, offset, lambdas=full.lambdas,
                            rows=(folds >= 0) & (folds != k), start=full, options=options)
                for k in range(n_folds)]
        if not heldout:
            return fits
        return fits, [f.predict(design, rows=r, offset=offset) for f, r in zip(fits, test_rows)]

    theta = full.theta_for(design)
    s = design.penalty_matrix(full.lambdas)
    eta = design.linear_predictor(theta) + offset
    mu = np.exp(eta)
    gram_k = design.weighted_gram(mu, folds, n_folds)
    grad_k = design.transpose_dot_groups(mu - y, folds, n_folds)
    gram_all = gram_k.sum(axis=0)
    grad_all = grad_k.sum(axis=0)
    penalty_gradient = s @ theta

    # Per-fold sums of the pieces of the objective, log-likelihood and deviance that do not
    # depend on the coefficients; "all folds but k" is the total minus fold k.
    inside = folds >= 0

    def all_but(rows, w):
        """For each fold k, the sum of ``w`` over ``rows`` outside fold k."""
        per_fold = np.bincount(folds[rows], weights=w, minlength=n_folds)[:n_folds]
        return per_fold.sum() - per_fold

    in_rows = np.flatnonzero(inside)
    spikes = np.flatnonzero(inside & (y > 0))
    ys = y[spikes]
    log_fact = all_but(spikes, gammaln(ys + 1.0))
    y_log_y = all_but(spikes, ys * np.log(ys) - ys)
    data0 = all_but(in_rows, (mu - y * eta)[in_rows])
    pen0 = 0.5 * float(theta @ s @ theta)

    solver = PenalisedPoissonNewton(design, y, offset, s, None, options.newton)
    steps = np.empty((n_folds, design.n_theta))
    grads = np.empty((n_folds, design.n_theta))
    hessians = []
    for k in range(n_folds):
        h = gram_all - gram_k[k]
        grads[k] = grad_all - grad_k[k] + penalty_gradient
        steps[k] = solver.direction(h + s, grads[k])
        hessians.append(h)
    # Each fold's step changes the linear predictor by X Z d_k; all folds in one pass,
    # n x n_folds, in the Gram plan's arithmetic (float32 with single precision: relative
    # error ~1e-7, the size of the rounding of the exponential below). Bins without spikes
    # contribute only mu to a fold's objective, so its y * eta part is summed over the bins
    # with spikes alone; "training bins of fold k" is all bins in folds minus fold k's own.
    with np.errstate(over="ignore", invalid="ignore"):
        increments = design.linear_predictors(steps, dtype=None)
        spike_eta = ys[:, None] * (eta[spikes, None] + increments[spikes])
        own = np.bincount(folds[spikes], weights=spike_eta[np.arange(spikes.size), folds[spikes]],
                          minlength=n_folds)[:n_folds]
        train_spike_part = spike_eta.sum(axis=0) - own
        # mu after step k is mu * exp(X Z d_k): the exponential in the plan's precision
        # (float32 runs 3x faster than float64 here: n x n_folds of them per model), the
        # products and sums in float64. A step that moves a bin's log rate by more than
        # float32's exp range (~88) gives an infinite objective: that fold is refitted exactly.
        factors = np.exp(increments, out=increments)
        del increments
        mu_part = _weighted_column_sums(mu if in_rows.size == y.size else mu * inside, factors)

    layouts = full.terms
    fits, predictions = [], []
    for k in range(n_folds):
        th = theta + steps[k]
        rows_k = test_rows[k]
        held_mu = mu[rows_k] * factors[rows_k, k]
        data1 = float(mu_part[k] - held_mu.sum() - train_spike_part[k])
        f0 = data0[k] + pen0
        f1 = data1 + 0.5 * float(th @ s @ th)
        slope = float(grads[k] @ steps[k])
        if not (np.isfinite(f1) and f1 <= f0 + 1e-4 * slope):
            # A full step did not pass the sufficient-decrease (Armijo) test: refit this fold
            # exactly.
            fit = fit_poisson(design, y, offset, lambdas=full.lambdas,
                              rows=inside & (folds != k), start=full, options=options)
            fits.append(fit)
            predictions.append(fit.predict(design, rows=rows_k, offset=offset))
            continue
        cov, edf = None, {}
        if covariances:
            h = hessians[k]
            cov = _posterior_covariance(h + s)
            f_diag = np.einsum("ij,ji->i", cov, h)
            edf = {t_.name: float(f_diag[t_.theta_slice].sum()) for t_ in layouts}
        fits.append(PoissonFit(layouts, th, full.lambdas, cov, edf,
                               -data1 - float(log_fact[k]), 2.0 * (data1 + float(y_log_y[k])),
                               None, True, "one Newton step from the full-data fit", 1, 0,
                               offset))
        predictions.append(held_mu)
    return (fits, predictions) if heldout else fits


def _weighted_column_sums(w: np.ndarray, columns: np.ndarray, chunk: int = 8192) -> np.ndarray:
    """``w @ columns`` in float64 for float32 or float64 ``columns`` (n x m), chunk by chunk.

    A mixed-precision product would first copy all of ``columns`` to float64; chunks keep
    that copy small.
    """
    out = np.zeros(columns.shape[1])
    for start in range(0, w.size, chunk):
        out += w[start:start + chunk] @ columns[start:start + chunk].astype(np.float64, copy=False)
    return out
