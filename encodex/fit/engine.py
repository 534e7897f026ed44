"""Fit a penalised Poisson GLM, with smoothing parameters fixed or selected by LAML (REML-type)."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from encodex.design import Design
from encodex.errors import InputError, SettingsError
from encodex.threads import single_threaded

from .result import (PoissonFit, TermLayout, log_factorial_sum, poisson_deviance,
                     poisson_loglik)
from .smoothing import (LAMBDA_MAX, LAMBDA_MIN, RELATIVE_RANGE, PenaltyStructure,
                        fellner_schall_update, fixed_weight_derivatives, initial_lambdas, laml,
                        laml_derivatives, working_criterion)
from .solver import NewtonOptions, PenalisedPoissonNewton, _log_mean_rate


@dataclass(frozen=True)
class FitOptions:
    """Settings of :func:`fit_poisson`.

    Smoothness selection maximises the Laplace approximate restricted marginal likelihood
    (the REML-type criterion ``V`` of :mod:`encodex.fit.smoothing`) in two phases: a fast
    start by performance iteration (:func:`_select_smoothness`), then Newton steps on
    ``log lambda`` with the exact gradient (see :func:`encodex.fit.smoothing.laml_derivatives`).

    Attributes
    ----------
    newton : NewtonOptions
        Stopping rules of the inner Newton solver (coefficients at fixed smoothing).
    max_outer : int
        Rounds of the start phase (one Gram matrix each at most) before it gives up.
    lambda_tol : float
        The start phase stops when no ``log lambda`` changes by more than this in an update...
    laml_tol : float
        ... or when the criterion changed by less than ``laml_tol * (1 + |V|)`` in each of
        three consecutive updates (a lambda that no longer affects the fit may drift).
    gradient_tol : float
        The Newton phase stops when every free ``|dV/dlog lambda_k|`` is at most this (log
        units of the criterion per unit of log lambda)...
    step_tol : float
        ... or once it has taken a Newton step whose largest change in ``log lambda`` is at
        most this: each step shrinks the distance to the optimum by a factor of about 25
        (benchmarks/bench_smoothness.py --quick: worst remaining error 6.2e-4 in log lambda
        with 0.05, at 1.41x the time of the start phase alone; 5.5e-4 at 1.43x with 1e-2).
    max_newton : int
        Newton steps on ``log lambda`` before giving up (0 skips the phase: the start phase
        alone, which stops short of the optimum by up to ~8% in lambda).

    With the defaults the selected smoothing parameters were within 0.07% of the optimum of
    ``V`` where it is curved, effective degrees of freedom within 0.0005 per term and ``V``
    within 1.1e-4 of its maximum (a term on a stretch where ``V`` is flat to within the
    gradient tolerance) on 16 simulated cell-models (benchmarks/bench_smoothness.py --quick);
    on the three mgcv reference problems within 0.02%, 1e-4 and 4e-7 of mgcv's REML
    (reference_checks/test_mgcv_reference.py asserts 1%, 0.005 and 1e-5;
    reference_checks/test_engine_reference.py checks a direct maximisation).
    """

    newton: NewtonOptions = field(default_factory=NewtonOptions)
    max_outer: int = 200
    lambda_tol: float = 1e-2
    laml_tol: float = 1e-10
    gradient_tol: float = 1e-4
    step_tol: float = 5e-2
    max_newton: int = 20

    def __post_init__(self):
        checks = (("lambda_tol", self.lambda_tol > 0), ("gradient_tol", self.gradient_tol > 0),
                  ("step_tol", self.step_tol >= 0),
                  ("max_outer", isinstance(self.max_outer, int) and self.max_outer >= 1),
                  ("max_newton", isinstance(self.max_newton, int) and self.max_newton >= 0))
        for name, ok in checks:
            if not ok:
                raise SettingsError(f"FitOptions.{name}={getattr(self, name)!r} is out of range; "
                                    "use a positive number (max_newton: a whole number >= 0)")


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


def _start_fits(start) -> tuple:
    """Earlier fits of a warm start, in order of preference (empty for none or an array)."""
    if isinstance(start, PoissonFit):
        return (start,)
    if isinstance(start, (tuple, list)) and all(isinstance(f, PoissonFit) for f in start):
        return tuple(start)
    return ()


def _warm_theta(design: Design, start, y, mask, offset) -> np.ndarray:
    theta = np.zeros(design.n_theta)
    theta[0] = _log_mean_rate(mask * y, mask, offset)
    if start is None:
        return theta
    fits = _start_fits(start)
    if fits:
        theta[0] = fits[0].theta[0]
        filled = set()
        for fit in fits:  # each term from the first fit that holds it
            for t in fit.terms:
                if t.name in design.theta_slices and t.name not in filled:
                    theta[design.theta_slices[t.name]] = fit.theta[t.theta_slice]
                    filled.add(t.name)
        return theta
    start = np.asarray(start, dtype=float)
    if start.shape != theta.shape:
        raise SettingsError(f"start has {start.size} coefficients; the design needs {theta.size}")
    return start.copy()


def _warm_lambdas(design: Design, start) -> np.ndarray | None:
    """Smoothing parameters of matching terms from earlier fits; NaN for new ones."""
    fits = _start_fits(start)
    if not fits:
        return None
    known = {}
    for fit in fits:  # each term from the first fit that holds it
        k = 0
        for t in fit.terms:
            m = len(t.basis.penalties())
            known.setdefault(t.name, fit.lambdas[k:k + m])
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
        are selected by maximising the Laplace approximate restricted marginal likelihood
        (REML-type; Wood 2011, JRSS-B 73:3; :mod:`encodex.fit.smoothing`): a performance
        iteration as the start (per round, the working model's criterion maximised by Newton
        steps on ``log lambda``; Gu 1992; Wood 2004, JASA 99:673), then Newton steps on
        ``log lambda`` with the exact gradient (see :class:`FitOptions` for the stopping
        rules and the accuracy they give).
    rows : ndarray of int or bool, optional
        Bins to fit (training folds); all by default. Left-out bins are never looked at.
    start : PoissonFit, sequence of PoissonFit, or ndarray, optional
        Warm start: coefficients (and smoothing parameters) of matching terms are reused;
        with several fits, each term (and the intercept) comes from the first that holds it.
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
        lam, theta, n_outer, n_iter, change, mu, gram, bounds = _select_smoothness(
            design, y, offset, mask, structure, theta0, _warm_lambdas(design, start), options)
        res = newton(lam).solve(theta, mu, gram)
        n_iter += res.n_iter
        finish = _newton_finish(newton, design, y, mask, structure, lam, res, bounds, options)
        lam, res = finish.lambdas, finish.result
        n_outer += finish.steps
        n_iter += finish.n_iter
        reason = res.reason
        converged = res.converged
        if finish.stop == "limit":
            converged = False
            reason = ("smoothness selection did not reach the optimum of the criterion "
                      f"(largest gradient in log lambda {finish.gradient:.2g})")
        elif finish.stop == "skipped" and change >= options.lambda_tol:
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
    """Performance iteration: per round, the working model's optimal lambda, then a Newton step.

    Each round forms the Gram matrix ``H`` once at the current ``theta`` and replaces the
    log-likelihood by its second-order expansion there (the working model). For a fixed
    ``H`` the criterion ``V`` and its first two derivatives in ``log lambda`` need no pass
    over the bins (:func:`encodex.fit.smoothing.working_criterion`), so the round maximises
    the working ``V`` by Newton's method on ``log lambda`` (:func:`_working_newton`), then
    takes one damped Newton step on ``theta`` at those lambdas with the same ``H`` (the
    Hessian of the log-likelihood does not depend on lambda). At the joint fixed point theta
    is the penalised optimum for lambda and lambda the optimum of ``V`` with the weights held
    fixed ("performance iteration": Gu 1992, J. Comput. Graph. Stat. 1:169; Wood 2004, JASA
    99:673; Wood 2017, Generalized Additive Models, sec. 6.12.1). That point differs from the
    optimum of ``V`` by the change of the weights with lambda, which the Newton phase
    (:func:`_newton_finish`) adds. A round whose working matrix ``H + S`` is not positive
    definite takes a generalised Fellner-Schall update instead (Wood & Fasiolo 2017).

    ``V`` can have a second local maximum where a term is smoothed to its unpenalised part
    (see :func:`_smoothed_away_start`). Once the rounds settle, that point is tried once: the
    rounds go on from it, and the higher of the two settled points (by ``V``) is returned.

    Returns (lambdas, theta, rounds, newton steps, last change in log lambda, mu, Gram
    matrix, (lower, upper, start) values of lambda), mu and the Gram matrix at the returned theta
    (the Gram matrix None when the last one was formed at an earlier theta and reused).
    """
    solver = PenalisedPoissonNewton(design, y, offset, np.zeros((design.n_theta,) * 2), mask,
                                    options.newton)
    no_penalty = solver.S
    # The data part of the objective (S is zero here); each round adds its own penalty term
    # instead of recomputing X theta and exp on every bin.
    eta = solver.linear_predictor(theta0)
    f_data, mu = solver.objective(theta0, eta)
    st = _StartState(theta0, eta, mu, f_data, solver.gram(mu), eta, np.empty(0))
    log_y_factorials = log_factorial_sum(y, mask)
    init = initial_lambdas(design, st.gram)
    upper = np.minimum(init * RELATIVE_RANGE, LAMBDA_MAX)
    lower = np.maximum(init / RELATIVE_RANGE, LAMBDA_MIN)
    st.lam = init if warm is None else np.clip(np.where(np.isnan(warm), init, warm), lower, upper)
    bounds = (np.log(lower), np.log(upper))
    change, rounds, previous, flat_rounds = np.inf, 0, -np.inf, 0
    settled, tried = None, False
    for rounds in range(1, options.max_outer + 1):
        solver.S = no_penalty
        data_gradient = solver.gradient(st.theta, st.mu)          # Z'X'(m mu - m y)
        rhs = st.gram @ st.theta - data_gradient
        found = _working_newton(st.gram, rhs, np.log(st.lam), bounds, design, structure,
                                options.gradient_tol)
        new = found[0] if found is not None else np.log(fellner_schall_update(
            st.theta, st.gram, design, structure, st.lam, upper=upper, lower=lower))
        change = float(np.max(np.abs(new - np.log(st.lam))))
        st.lam = np.exp(new)
        solver.S = design.penalty_matrix(st.lam)
        f = st.f_data + 0.5 * st.theta @ solver.S @ st.theta
        g = data_gradient + solver.S @ st.theta
        d = solver.direction(st.gram + solver.S, g)
        # theta only needs to be close enough to its optimum for the lambda update to be
        # accurate; the final Newton solve at the selected lambdas polishes it.
        step_small = -float(g @ d) / 2 <= 1e-9 * (1 + abs(f))
        # A lambda that no longer changes the fit (a term shrunk to its unpenalised part)
        # can drift without limit; the criterion itself then stops changing.
        value = laml(-st.f_data - log_y_factorials, st.theta, st.gram, design, structure,
                     st.lam)
        flat_rounds = flat_rounds + 1 if abs(value - previous) <= options.laml_tol * (
            1 + abs(value)) else 0
        previous = value
        if step_small and (change < options.lambda_tol or flat_rounds >= 3):
            change = 0.0
            jump = None if tried else _smoothed_away_start(
                st.gram, rhs, np.log(st.lam), bounds, design, structure, options.gradient_tol)
            tried = True
            if jump is None:
                break
            settled = (value, dataclasses.replace(st))
            st.lam, previous, flat_rounds = np.exp(jump), -np.inf, 0
            continue
        _advance(solver, st, f, g, d)
    if settled is not None and settled[0] > value:
        st, change = settled[1], 0.0
    fresh = st.eta_at_gram is st.eta
    return (st.lam, st.theta, rounds, rounds, change, st.mu, (st.gram if fresh else None),
            (lower, upper, init))


@dataclass
class _StartState:
    """Where the start phase's rounds are: coefficients, their fit and the Gram matrix.

    ``eta_at_gram`` is the linear predictor at which ``gram`` was formed (the same object
    as ``eta`` when the Gram matrix is fresh).
    """

    theta: np.ndarray
    eta: np.ndarray
    mu: np.ndarray
    f_data: float                  # objective without the penalty
    gram: np.ndarray
    eta_at_gram: np.ndarray
    lam: np.ndarray


def _advance(solver, st: _StartState, f: float, g: np.ndarray, d: np.ndarray) -> None:
    """One damped Newton step on theta along ``d``, and the Gram matrix where it is stale."""
    t, f_new, eta_new, mu_new = solver.line_search(st.theta, f, g, d)
    if t > 0.0:
        st.theta = st.theta + t * d
        st.eta, st.mu = eta_new, mu_new
        st.f_data = f_new - 0.5 * st.theta @ solver.S @ st.theta
    # The Gram matrix is the costly pass. Near the end theta barely moves: while no bin's log
    # rate has moved by more than GRAM_REUSE_TOL since it was formed, it is reused (see
    # GRAM_REUSE_TOL; the final Newton solve works with the exact matrix).
    if np.max(np.abs(st.eta - st.eta_at_gram), initial=0.0) > GRAM_REUSE_TOL:
        st.gram = solver.gram(st.mu)
        st.eta_at_gram = st.eta


#: Newton steps on log lambda per round of the performance iteration (each costs a few
#: factorisations of the n_theta x n_theta matrix ``H + S``, no pass over the bins).
WORKING_MAX_STEPS = 30

#: A round's Newton iteration on the working model stops once a step moves no log lambda by
#: more than this (the outer rounds stop at ``FitOptions.lambda_tol``, ten times larger).
WORKING_STEP_TOL = 1e-3


def _smoothed_away_start(gram, rhs, rho, bounds, design, structure, gradient_tol):
    """A start for the rounds with one term smoothed away, if the working ``V`` prefers it.

    ``V`` can have a local maximum where a term is smoothed to its unpenalised part (its
    lambda at the upper bound, where ``V`` is flat) besides an interior one; Newton steps
    from an interior start do not reach it. Each free smoothing parameter is tried at its
    upper bound in the working model of the settled rounds; returns the Newton optimum
    (:func:`_working_newton`) from the best such point when its working ``V`` beats that of
    ``rho``, else None. The generalised Fellner-Schall update used before jumped to that
    bound whenever a term's penalised part had almost no degrees of freedom; without this
    trial, 2 of the 1,794 cells of benchmarks/labels_at_the_edges.py lost their exact label
    to the lower of two local maxima (benchmarks/RESULTS.md).
    """
    upper = bounds[1]
    value, _ = working_criterion(gram, rhs, design, structure, np.exp(rho))
    best = (value + 1e-9 * (1.0 + abs(value)), None)
    for k in np.flatnonzero(rho < upper - 1e-9):
        trial = rho.copy()
        trial[k] = upper[k]
        trial_value, _ = working_criterion(gram, rhs, design, structure, np.exp(trial))
        if trial_value > best[0]:
            best = (trial_value, trial)
    if best[1] is None:
        return None
    found = _working_newton(gram, rhs, best[1], bounds, design, structure, gradient_tol)
    return found[0] if found is not None and found[1] > value else None


def _working_newton(gram, rhs, rho, bounds, design, structure, gradient_tol):
    """Newton's method on the working model's ``V`` from ``rho``; ``(rho, V)`` or None.

    ``rhs = H theta_c + g`` defines the working model (:func:`encodex.fit.smoothing.
    working_criterion`). Directions use the exact Hessian, made positive definite
    (:func:`_ascent_direction`), on the parameters not held at a bound of ``bounds`` (log
    lower, log upper) by a gradient pointing outwards; a step is capped at
    :data:`MAX_LOG_STEP` and halved until ``V`` does not decrease. Stops when every free gradient component is at most ``gradient_tol`` or a
    step moves no ``rho`` by more than :data:`WORKING_STEP_TOL`. None when ``H + S`` is not
    positive definite at ``rho``.
    """
    lower, upper = bounds
    value, theta = working_criterion(gram, rhs, design, structure, np.exp(rho))
    if theta is None:
        return None
    for _ in range(WORKING_MAX_STEPS):
        der = fixed_weight_derivatives(theta, gram, design, structure, np.exp(rho))
        g = der.gradient
        free = ~(((rho >= upper - 1e-9) & (g >= 0)) | ((rho <= lower + 1e-9) & (g <= 0)))
        if np.max(np.abs(g[free]), initial=0.0) <= gradient_tol:
            break
        step = np.zeros_like(rho)
        step[free] = _ascent_direction(-der.hessian[np.ix_(free, free)], g[free])
        step *= min(1.0, MAX_LOG_STEP / max(float(np.max(np.abs(step))), 1e-300))
        for _ in range(12):
            new = np.clip(rho + step, lower, upper)
            new_value, new_theta = working_criterion(gram, rhs, design, structure, np.exp(new))
            if new_value >= value - 1e-11 * (1.0 + abs(value)):
                break
            step *= 0.5
        else:
            break
        moved = float(np.max(np.abs(new - rho)))
        rho, value, theta = new, new_value, new_theta
        if moved <= WORKING_STEP_TOL:
            break
    return rho, value


#: Largest change of any log lambda in one Newton step of the selection's second phase.
MAX_LOG_STEP = 2.0

#: Curvature ``-d2V/drho^2`` below which the criterion counts as flat in a direction.
PLATEAU_CURVATURE = 1e-2


@dataclass(frozen=True)
class _Finish:
    lambdas: np.ndarray
    result: object            # NewtonResult at ``lambdas``
    steps: int
    n_iter: int
    gradient: float           # largest free |dV/dlog lambda| where it was last evaluated
    stop: str                 # "gradient", "step", "flat" or "limit"


def _ascent_direction(neg_hessian: np.ndarray, g: np.ndarray) -> np.ndarray:
    """Newton direction ``P^{-1} g`` with ``P = -d2V`` made positive definite.

    Eigenvalues of ``P`` are replaced by their absolute values, floored at 1e-7 of the
    largest (Nocedal & Wright 2006, Numerical Optimization, sec. 3.4), so that a direction
    where the criterion is flat (a term smoothed away) gets a long step, not a wrong-way one.
    """
    ev, vec = np.linalg.eigh(0.5 * (neg_hessian + neg_hessian.T))
    ev = np.maximum(np.abs(ev), max(np.max(np.abs(ev), initial=0.0) * 1e-7, 1e-12))
    return vec @ ((vec.T @ g) / ev)


def _solve_from_prediction(solver, res, delta):
    """Newton solve from ``res.theta + delta`` when it lowers the objective, else from ``res``."""
    f_here = solver.objective_at(res.theta, res.mu)
    trial = res.theta + delta
    f_trial, mu_trial = solver.objective(trial)
    if f_trial < f_here:
        return solver.solve(trial, mu_trial)
    return solver.solve(res.theta, res.mu, res.gram)


def _walk_off_plateau(newton, design, y, mask, structure, rho, start, plateau, res, value):
    """Move the ``plateau`` log lambdas towards ``start`` in quarters while ``V`` rises.

    Returns ``(lambdas, NewtonResult, V, newton iterations)`` of the best point, with
    ``lambdas`` None if the first quarter already lowers ``V`` (the plateau is the optimum's
    side: the term is smoothed away by the data).
    """
    best = (None, res, value)
    n_iter = 0
    for frac in (0.75, 0.5, 0.25, 0.0):
        lam = np.exp(np.where(plateau, start + frac * (rho - start), rho))
        here = best[1]
        trial = newton(lam).solve(here.theta, here.mu, here.gram)
        n_iter += trial.n_iter
        trial_value = laml(poisson_loglik(y, trial.mu, mask), trial.theta, trial.gram, design,
                           structure, lam)
        if not (trial.converged and trial_value > best[2]):
            break
        best = (lam, trial, trial_value)
    return (*best, n_iter)


def _newton_finish(newton, design, y, mask, structure, lam, res, bounds, options) -> _Finish:
    """Newton steps on ``rho = log lambda`` from the start phase's lambdas, to the optimum.

    Each step uses the exact gradient of the criterion ``V`` (with the change of the Poisson
    weights with lambda) and its fixed-weight Hessian (:func:`encodex.fit.smoothing.
    laml_derivatives`), on the free smoothing parameters: those not held at a bound of
    ``bounds`` by a gradient pointing outwards. The step is capped at :data:`MAX_LOG_STEP` and
    halved until ``V`` does not decrease (beyond rounding, ``1e-11 (1 + |V|)``); ``theta`` is
    re-solved exactly at every trial ``lambda`` (a trial whose solve did not converge counts
    as a failed one).

    A smoothing parameter more than ``e`` times its start value, where ``V`` is flat
    (curvature below :data:`PLATEAU_CURVATURE`) but still rises towards smaller lambda, is
    walked back towards its start value once (:func:`_walk_off_plateau`).

    Stops when (a) every free ``|dV/drho_k| <= options.gradient_tol``, or (b) the step just
    taken moved no ``rho_k`` by more than ``options.step_tol``, or (c) no halving of the step
    increases ``V`` (the criterion is flat to rounding: "flat"), or (d) after
    ``options.max_newton`` steps ("limit", reported as not converged).
    """
    lower, upper, start = (np.log(b) for b in bounds)
    value = laml(poisson_loglik(y, res.mu, mask), res.theta, res.gram, design, structure, lam)
    n_iter = 0
    gmax = np.inf
    probed = np.zeros(lam.size, dtype=bool)
    for steps in range(options.max_newton):
        der = laml_derivatives(res.theta, mask * res.mu, res.gram, design, structure, lam)
        rho, g = np.log(lam), der.gradient
        held = ((rho >= upper - 1e-9) & (g >= 0)) | ((rho <= lower + 1e-9) & (g <= 0))
        free = ~held
        # A term smoothed far beyond its start sits on a plateau of V (no curvature, gradient
        # ~1/lambda) where a small gradient does not mean an optimum. If V still rises towards
        # smaller lambda there, try the start value once (a start phase's jump to the bound
        # can strand a term that the data do support).
        plateau = (free & ~probed & (g < 0) & (rho > start + 1.0)
                   & (-np.diag(der.hessian) <= PLATEAU_CURVATURE))
        if plateau.any():
            probed |= plateau
            walked = _walk_off_plateau(newton, design, y, mask, structure, rho, start, plateau,
                                       res, value)
            n_iter += walked[3]
            if walked[0] is not None:
                lam, res, value = walked[:3]
                continue
        gmax = float(np.max(np.abs(g[free]), initial=0.0))
        if gmax <= options.gradient_tol:
            return _Finish(lam, res, steps, n_iter, gmax, "gradient")
        step = np.zeros_like(rho)
        step[free] = _ascent_direction(-der.hessian[np.ix_(free, free)], g[free])
        step *= min(1.0, MAX_LOG_STEP / max(float(np.max(np.abs(step))), 1e-300))
        for _ in range(12):
            new_lam = np.exp(np.clip(rho + step, lower, upper))
            # Start from the first-order prediction of the new optimum; keep the current
            # point (and its Gram matrix, which does not depend on lambda) if that is worse.
            new_res = _solve_from_prediction(newton(new_lam), res,
                                             (np.log(new_lam) - rho) @ der.dtheta)
            n_iter += new_res.n_iter
            new_value = laml(poisson_loglik(y, new_res.mu, mask), new_res.theta, new_res.gram,
                             design, structure, new_lam)
            if new_res.converged and new_value >= value - 1e-11 * (1.0 + abs(value)):
                break
            step *= 0.5
        else:
            return _Finish(lam, res, steps + 1, n_iter, gmax, "flat")
        taken = float(np.max(np.abs(np.log(new_lam) - rho)))
        lam, res, value = new_lam, new_res, new_value
        if taken <= options.step_tol:
            return _Finish(lam, res, steps + 1, n_iter, gmax, "step")
    stop = "limit" if options.max_newton > 0 else "skipped"
    return _Finish(lam, res, options.max_newton, n_iter, gmax, stop)


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
