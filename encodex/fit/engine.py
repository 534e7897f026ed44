"""Fit a penalised Poisson GLM, with smoothing parameters fixed or selected by LAML."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from encodex.design import Design
from encodex.errors import InputError, SettingsError
from encodex.threads import single_threaded

from .result import (PoissonFit, TermLayout, log_factorial_sum, poisson_deviance,
                     poisson_loglik)
from .smoothing import (LAMBDA_MAX, LAMBDA_MIN, RELATIVE_RANGE, PenaltyStructure,
                        fellner_schall_update, initial_lambdas, laml)
from .solver import NewtonOptions, PenalisedPoissonNewton, _log_mean_rate


@dataclass(frozen=True)
class FitOptions:
    """Settings of :func:`fit_poisson`.

    Attributes
    ----------
    newton : NewtonOptions
        Stopping rules of the inner Newton solver.
    max_outer : int
        Smoothness-selection updates before giving up.
    lambda_tol : float
        Selection stops when no ``log lambda`` changes by more than this in an update (1e-2:
        a 1% change in a smoothing parameter moves the LAML by ~1e-5 and the fitted curves
        far less than their standard errors; reference_checks/test_engine_reference.py
        checks the default options against a direct maximisation of the LAML)...
    laml_tol : float
        ... or when the LAML criterion changed by less than ``laml_tol * (1 + |LAML|)`` in each
        of three consecutive updates (a lambda that no longer affects the fit may drift).
    """

    newton: NewtonOptions = field(default_factory=NewtonOptions)
    max_outer: int = 200
    lambda_tol: float = 1e-2
    laml_tol: float = 1e-10


def _row_mask(rows, n: int) -> np.ndarray:
    if rows is None:
        return np.ones(n)
    rows = np.asarray(rows)
    mask = np.zeros(n)
    if rows.dtype == bool:
        if rows.shape != (n,):
            raise InputError(f"boolean rows must have length {n}; got {rows.shape}")
        mask[rows] = 1.0
    else:
        mask[rows.astype(np.intp)] = 1.0
    return mask


def _check_counts(y, n: int) -> np.ndarray:
    y = np.asarray(y, dtype=float).ravel()
    if y.shape != (n,):
        raise InputError(f"spike counts have {y.size} bins but the design has {n}; "
                         "build both from the same session")
    if not np.all(np.isfinite(y)) or np.any(y < 0) or np.any(y != np.round(y)):
        raise InputError("spike counts must be non-negative whole numbers")
    return y


def _warm_theta(design: Design, start, y, mask, offset) -> np.ndarray:
    theta = np.zeros(design.n_theta)
    theta[0] = _log_mean_rate(mask * y, mask, offset)
    if start is None:
        return theta
    if isinstance(start, PoissonFit):
        theta[0] = start.theta[0]
        for t in start.terms:
            if t.name in design.theta_slices:
                theta[design.theta_slices[t.name]] = start.theta[t.theta_slice]
        return theta
    start = np.asarray(start, dtype=float)
    if start.shape != theta.shape:
        raise SettingsError(f"start has {start.size} coefficients; the design needs {theta.size}")
    return start.copy()


def _warm_lambdas(design: Design, start) -> np.ndarray | None:
    """Smoothing parameters of matching terms from a previous fit; NaN for new ones."""
    if not isinstance(start, PoissonFit):
        return None
    known = {}
    k = 0
    for t in start.terms:
        m = len(t.basis.penalties())
        known[t.name] = start.lambdas[k:k + m]
        k += m
    out = []
    for t in design.terms:
        out.extend(known.get(t.name, [np.nan] * len(t.penalties)))
    return np.array(out, dtype=float)


@single_threaded
def fit_poisson(design: Design, y, offset=0.0, lambdas=None, rows=None, start=None,
                options: FitOptions | None = None) -> PoissonFit:
    """Fit a penalised Poisson GLM to spike counts.

    Minimises ``-loglik(theta) + 1/2 sum_k lambda_k theta' S_k theta`` with
    ``log mu = offset + X Z theta`` (see :mod:`encodex.fit.solver`).

    Parameters
    ----------
    design : Design
        Intercept and smooth terms (:func:`encodex.design.build_design`).
    y : array_like, shape (n_rows,)
        Spike counts per bin.
    offset : float or ndarray
        Log exposure per bin, normally ``log(bin width in s)`` so that ``exp(intercept)`` is a
        rate in Hz.
    lambdas : array_like, optional
        Fixed smoothing parameters, one per penalty (``design.n_penalties``). By default they
        are selected by maximising the Laplace approximate marginal likelihood with the
        generalised Fellner-Schall iteration (Wood & Fasiolo 2017, Biometrics 73:1071).
    rows : ndarray of int or bool, optional
        Bins to fit (training folds); all by default. Left-out bins are never looked at.
    start : PoissonFit or ndarray, optional
        Warm start: coefficients (and smoothing parameters) of matching terms are reused.
    options : FitOptions, optional

    Returns
    -------
    PoissonFit
        Always with finite coefficients; ``converged`` and ``reason`` say whether the optimum
        was reached.
    """
    options = options or FitOptions()
    n = design.n_rows
    y = _check_counts(y, n)
    mask = _row_mask(rows, n)
    offset = offset if np.ndim(offset) == 0 else np.asarray(offset, dtype=float)
    if np.ndim(offset) == 1 and offset.shape != (n,):
        raise InputError(f"offset has {offset.size} values but the design has {n} bins")
    layouts = tuple(TermLayout(t.name, t.basis, t.Z, design.theta_slices[t.name])
                    for t in design.terms)
    theta0 = _warm_theta(design, start, y, mask, offset)
    n_pen = design.n_penalties

    if float(np.dot(mask, y)) == 0.0:
        return _no_spike_fit(design, layouts, theta0, y, mask, offset, lambdas)

    structure = PenaltyStructure.of(design)
    select = lambdas is None and n_pen > 0
    if lambdas is None:
        lam = np.zeros(n_pen)
    else:
        lam = np.asarray(lambdas, dtype=float).ravel()
        if lam.shape != (n_pen,) or np.any(lam < 0) or not np.all(np.isfinite(lam)):
            raise SettingsError(f"lambdas must be {n_pen} non-negative finite numbers "
                                f"(one per penalty); got {lambdas!r}")

    def newton(lmb):
        return PenalisedPoissonNewton(design, y, offset, design.penalty_matrix(lmb), mask,
                                      options.newton)

    n_iter = 0
    n_outer = 0
    if select:
        lam, theta, n_outer, n_iter, change, mu, gram = _select_smoothness(
            design, y, offset, mask, structure, theta0, _warm_lambdas(design, start), options)
        res = newton(lam).solve(theta, mu, gram)
        n_iter += res.n_iter
        reason = res.reason
        converged = res.converged
        if change >= options.lambda_tol:
            converged = False
            reason = (f"smoothness selection did not settle in {options.max_outer} updates "
                      f"(last change in log lambda {change:.2g})")
    else:
        res = newton(lam).solve(theta0)
        n_iter = res.n_iter
        converged, reason = res.converged, res.reason

    s = design.penalty_matrix(lam)
    cov = _posterior_covariance(res.gram + s)
    f_diag = np.einsum("ij,ji->i", cov, res.gram)
    edf = {t.name: float(f_diag[design.theta_slices[t.name]].sum()) for t in design.terms}
    ll = poisson_loglik(y, res.mu, mask)
    value = laml(ll, res.theta, res.gram, design, structure, lam) if select else None
    return PoissonFit(layouts, res.theta, lam, cov, edf, ll, poisson_deviance(y, res.mu, mask),
                      value, converged, reason, n_iter, n_outer, offset)


#: Largest change of any bin's log rate (since the Gram matrix was formed) for which the
#: smoothness-selection rounds reuse the Gram matrix instead of forming it again: each bin's
#: Hessian weight is then off by at most 1%, the size of the lambda tolerance. The final
#: Newton solve, the covariance and the reported LAML always use the exact matrix.
GRAM_REUSE_TOL = 1e-2


def _select_smoothness(design, y, offset, mask, structure, theta0, warm, options):
    """Joint iteration of Newton steps on theta and Fellner-Schall updates of lambda.

    Each round computes the Gram matrix once at the current theta, updates every lambda from
    it, then takes one damped Newton step for the new lambdas with the same Gram matrix (the
    Hessian of the log-likelihood does not depend on lambda). At the joint fixed point theta
    is the penalised optimum for lambda and lambda the LAML stationary point, as in the
    nested iteration, at about one Gram matrix per round instead of several ("performance
    iteration", Wood 2017, sec. 6.12.1, here with the Fellner-Schall update).

    Returns (lambdas, theta, rounds, newton steps, last change in log lambda, mu, Gram
    matrix), the last two at the returned theta (the Gram matrix None when the last one
    was formed at an earlier theta and reused).
    """
    solver = PenalisedPoissonNewton(design, y, offset, np.zeros((design.n_theta,) * 2), mask,
                                    options.newton)
    theta = theta0
    # The data part of the objective (S is zero here); each round adds its own penalty term
    # instead of recomputing X theta and exp on every bin.
    eta = solver.linear_predictor(theta)
    f_data, mu = solver.objective(theta, eta)
    log_y_factorials = log_factorial_sum(y, mask)
    gram = solver.gram(mu)
    eta_at_gram = eta
    init = initial_lambdas(design, gram)
    upper = np.minimum(init * RELATIVE_RANGE, LAMBDA_MAX)
    lower = np.maximum(init / RELATIVE_RANGE, LAMBDA_MIN)
    lam = init if warm is None else np.clip(np.where(np.isnan(warm), init, warm), lower, upper)
    change = np.inf
    rounds = 0
    previous = -np.inf
    flat_rounds = 0
    boost = np.ones_like(lam)
    last_step = np.zeros_like(lam)
    for rounds in range(1, options.max_outer + 1):
        proposal = np.log(fellner_schall_update(theta, gram, design, structure, lam,
                                                upper=upper, lower=lower)) - np.log(lam)
        # Fellner-Schall creeps linearly when a lambda heads for a far optimum (a term being
        # smoothed away): while a lambda keeps moving the same way its step is doubled, and
        # reset as soon as it turns. The fixed points are unchanged (zero proposal, zero step).
        same_way = (np.sign(proposal) == np.sign(last_step)) & (np.abs(proposal) > options.lambda_tol)
        boost = np.where(same_way, np.minimum(boost * 2.0, 64.0), 1.0)
        step = np.clip(proposal * boost, -5.0, 5.0)
        last_step = step
        new = np.clip(lam * np.exp(step), lower, upper)
        change = float(np.max(np.abs(np.log(new) - np.log(lam))))
        lam = new
        solver.S = design.penalty_matrix(lam)
        f = f_data + 0.5 * theta @ solver.S @ theta
        g = solver.gradient(theta, mu)
        d = solver.direction(gram + solver.S, g)
        decrement = -float(g @ d)
        # theta only needs to be close enough to its optimum for the lambda update to be
        # accurate; the final Newton solve at the selected lambdas polishes it.
        step_small = decrement / 2 <= 1e-9 * (1 + abs(f))
        # A lambda that no longer changes the fit (a term shrunk to its unpenalised part)
        # can drift without limit; the criterion itself then stops changing.
        value = laml(-f_data - log_y_factorials, theta, gram, design, structure, lam)
        flat_rounds = flat_rounds + 1 if abs(value - previous) <= options.laml_tol * (
            1 + abs(value)) else 0
        previous = value
        if step_small and (change < options.lambda_tol or flat_rounds >= 3):
            change = 0.0
            break
        t, f_new, eta_new, mu_new = solver.line_search(theta, f, g, d)
        if t > 0.0:
            theta = theta + t * d
            eta, mu = eta_new, mu_new
            f_data = f_new - 0.5 * theta @ solver.S @ theta
        # The Gram matrix is the costly pass. Near the end theta barely moves: while no bin's
        # log rate has moved by more than GRAM_REUSE_TOL since it was formed, it is reused
        # (see GRAM_REUSE_TOL; the final Newton solve works with the exact matrix).
        if np.max(np.abs(eta - eta_at_gram), initial=0.0) > GRAM_REUSE_TOL:
            gram = solver.gram(mu)
            eta_at_gram = eta
    fresh = eta_at_gram is eta
    return lam, theta, rounds, rounds, change, mu, (gram if fresh else None)


def _posterior_covariance(h: np.ndarray) -> np.ndarray:
    try:
        return np.linalg.inv(h)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(h)


def _no_spike_fit(design, layouts, theta0, y, mask, offset, lambdas) -> PoissonFit:
    """A cell with no spikes in the fitted bins: flat response at a half-spike rate."""
    theta = np.zeros(design.n_theta)
    theta[0] = theta0[0]
    lam = (np.full(design.n_penalties, LAMBDA_MAX) if lambdas is None
           else np.asarray(lambdas, dtype=float))
    mu = np.exp(design.linear_predictor(theta) + offset)
    solver = PenalisedPoissonNewton(design, y, offset, design.penalty_matrix(lam), mask)
    cov = _posterior_covariance(solver.gram(mu) + design.penalty_matrix(lam)
                                + 1e-12 * np.eye(design.n_theta))
    return PoissonFit(layouts, theta, lam, cov, {t.name: 0.0 for t in design.terms},
                      poisson_loglik(y, mu, mask), poisson_deviance(y, mu, mask), None, False,
                      "no spikes in the fitted bins: the rate is taken as half a spike over the "
                      "exposure and no term is estimated", 0, 0, offset)
