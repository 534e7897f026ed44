"""Penalised Poisson regression by Newton's method (penalised IRLS) at fixed smoothing.

Model
-----
Spike counts ``y_t ~ Poisson(mu_t)`` with ``log mu_t = o_t + (X Z theta)_t``, where ``o_t`` is
the offset (log bin width, s) and ``Z`` the sum-to-zero reparametrisation of the design.

Objective
---------
Minimise the penalised negative log-likelihood over the rows with weight ``m_t = 1``
(training rows; 0 excludes a row)::

    f(theta) = sum_t m_t (mu_t - y_t eta_t) + 1/2 theta' S theta,   S = sum_k lambda_k S_k

(the constant ``sum log y_t!`` is left out). Its gradient and Hessian are::

    g = Z' X' m (mu - y) + S theta,      H = Z' X' diag(m mu) X Z + S.

Newton step ``d = -H^{-1} g`` by Cholesky, then a backtracking (Armijo) line search on ``f``.

Convergence criteria (both explicit)
------------------------------------
* Newton decrement: ``g' H^{-1} g / 2 <= tol * (1 + |f|)``, the predicted decrease of ``f``
  by a full step (Boyd & Vandenberghe 2004, *Convex Optimization*, sec. 9.5.1);
* gradient: ``max_i |g_i| / sqrt(H_ii) <= gtol * sqrt(max(1, sum_t m_t y_t))``: each
  component in unit-curvature coordinates (so heavily penalised directions are judged like
  the others), relative to the Poisson noise of the spike total.

The iteration stops with ``converged=False`` and a reason when the iteration limit is reached,
when the line search cannot decrease ``f``, or when coefficients grow without bound
(perfectly separable data with no penalty to stop them).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from encodex.design import Design


@dataclass(frozen=True)
class NewtonOptions:
    """Stopping rules of the Newton solver.

    Attributes
    ----------
    max_iter : int
        Newton iterations before giving up.
    tol : float
        Relative Newton-decrement tolerance (see module docstring). Newton converges
        quadratically near the optimum, so this tight value costs about one iteration more
        than a loose one and leaves coefficients within ~1e-9 relative of the exact optimum
        (measured against statsmodels and glum in benchmarks/bench_solver.py).
    gtol : float
        Gradient tolerance per spike.
    max_halvings : int
        Step halvings in the line search before it is declared failed.
    max_abs_theta : float
        Coefficients beyond this magnitude are taken as diverging (a log gain of 50 is a
        factor e^50 in rate, far beyond any neuron).
    """

    max_iter: int = 100
    tol: float = 1e-14
    gtol: float = 1e-6
    max_halvings: int = 40
    max_abs_theta: float = 50.0


@dataclass
class NewtonResult:
    """State at the end of a Newton run."""

    theta: np.ndarray
    mu: np.ndarray
    objective: float
    gradient: np.ndarray
    gram: np.ndarray          # Z' X' diag(m mu) X Z at theta (without the penalty)
    n_iter: int
    converged: bool
    reason: str


class PenalisedPoissonNewton:
    """Newton solver for one penalised Poisson problem; one method per step.

    Parameters
    ----------
    design : Design
    y : ndarray, shape (n,)
        Spike counts per bin.
    offset : float or ndarray
        Log exposure per bin (``log(bin width)``, s).
    penalty : ndarray, shape (n_theta, n_theta)
        Total penalty ``S_lambda``.
    mask : ndarray, shape (n,), optional
        1 for rows in the fit, 0 for rows left out (held-out folds).
    options : NewtonOptions
    """

    def __init__(self, design: Design, y: np.ndarray, offset, penalty: np.ndarray,
                 mask: np.ndarray | None = None, options: NewtonOptions = NewtonOptions()):
        self.design = design
        self.y = y
        self.offset = offset
        self.S = penalty
        self.mask = np.ones(design.n_rows) if mask is None else mask
        self.my = self.mask * y
        self.options = options

    # --- pieces -------------------------------------------------------------------------
    def linear_predictor(self, theta):
        return self.design.linear_predictor(theta) + self.offset

    def objective(self, theta, eta=None):
        """Penalised negative log-likelihood and the mean counts; inf when it overflows."""
        if eta is None:
            eta = self.linear_predictor(theta)
        with np.errstate(over="ignore", invalid="ignore"):
            mu = np.exp(eta)
            f = float(np.dot(self.mask, mu) - np.dot(self.my, eta) + 0.5 * theta @ self.S @ theta)
        return (f if np.isfinite(f) else np.inf), mu

    def objective_at(self, theta, mu):
        """Objective at ``theta`` from its known mean counts ``mu`` (logs on spike bins only)."""
        spikes = np.flatnonzero(self.my)
        with np.errstate(divide="ignore"):
            return float(np.dot(self.mask, mu) - np.dot(self.my[spikes], np.log(mu[spikes]))
                         + 0.5 * theta @ self.S @ theta)

    def gradient(self, theta, mu):
        return self.design.transpose_dot(self.mask * mu - self.my) + self.S @ theta

    def gram(self, mu):
        return self.design.weighted_gram(self.mask * mu)

    @staticmethod
    def direction(hessian, g):
        """Solve ``H d = -g`` by Cholesky, adding a small ridge if ``H`` is not positive definite.

        ``H`` can be singular when a basis function has no support in the fitted rows and no
        penalty ties it to its neighbours; the ridge then keeps that coefficient at its start.
        """
        scale = max(np.max(np.abs(np.diag(hessian))), 1e-300)
        ridge = 0.0
        for _ in range(12):
            try:
                c = linalg.cho_factor(hessian + ridge * np.eye(len(g)), lower=True,
                                      check_finite=False)
                d = -linalg.cho_solve(c, g, check_finite=False)
                if np.all(np.isfinite(d)):
                    return d
            except linalg.LinAlgError:
                pass
            ridge = scale * 1e-10 if ridge == 0.0 else ridge * 100.0
        raise linalg.LinAlgError("Hessian could not be factorised even with a ridge")

    def line_search(self, theta, f, g, d):
        """Backtracking line search with the Armijo condition; returns (t, f_new, eta, mu).

        A step must lower ``f`` strictly: near the optimum of an ill-conditioned problem
        (a smoothing parameter of 1e8 or more) rounding can make ``f`` equal at every trial
        point, and accepting such a step would repeat forever without progress. Halving
        stops (t = 0) once the predicted decrease ``t |g'd|`` is below what ``f`` can
        resolve (a few ulps of ``|f|``).
        """
        slope = float(g @ d)
        resolution = 4.0 * np.finfo(float).eps * max(abs(f), 1.0)
        t = 1.0
        for _ in range(self.options.max_halvings):
            if t * abs(slope) < resolution:
                break
            cand = theta + t * d
            eta = self.linear_predictor(cand)
            f_new, mu = self.objective(cand, eta)
            if f_new <= f + 1e-4 * t * slope and f_new < f:
                return t, f_new, eta, mu
            t *= 0.5
        return 0.0, f, None, None

    # --- driver -------------------------------------------------------------------------
    def solve(self, theta0: np.ndarray, mu0: np.ndarray | None = None,
              gram0: np.ndarray | None = None) -> NewtonResult:
        """Run Newton's method from ``theta0``.

        ``mu0`` and ``gram0``, when given, are the mean counts and ``Z' X' diag(m mu) X Z`` at
        ``theta0`` (a caller that has them saves a pass over the bins for each).
        """
        opt = self.options
        theta = np.asarray(theta0, dtype=float).copy()
        if mu0 is None:
            f, mu = self.objective(theta)
            gram0 = None
        else:
            mu = mu0
            f = self.objective_at(theta, mu)
        if not np.isfinite(f):
            # A warm start from another problem can overflow here; restart from the mean rate.
            theta = np.zeros_like(theta)
            theta[0] = _log_mean_rate(self.my, self.mask, self.offset)
            f, mu = self.objective(theta)
            gram0 = None
        n_spikes = max(float(self.my.sum()), 1.0)
        reason = f"iteration limit ({opt.max_iter}) reached"
        converged = False
        it = 0
        for it in range(1, opt.max_iter + 1):
            g = self.gradient(theta, mu)
            gram = self.gram(mu) if gram0 is None or it > 1 else gram0
            d = self.direction(gram + self.S, g)
            decrement = -float(g @ d)
            # Gradient in unit-curvature coordinates, so that a heavily penalised direction
            # (huge lambda, rounding noise in S theta) is judged on the same scale as others.
            scaled_g = np.abs(g) / np.sqrt(np.maximum(np.diag(gram) + np.diag(self.S), 1e-300))
            if decrement / 2 <= opt.tol * (1 + abs(f)) and np.max(scaled_g) <= opt.gtol * np.sqrt(n_spikes):
                converged, reason = True, "converged"
                it -= 1
                break
            t, f_new, _, mu_new = self.line_search(theta, f, g, d)
            if t == 0.0:
                # No decrease possible: at the optimum to machine precision if the decrement is
                # tiny, otherwise a genuine failure.
                if decrement / 2 <= 1e3 * opt.tol * (1 + abs(f)):
                    converged, reason = True, "converged (objective flat to machine precision)"
                else:
                    reason = "line search failed to decrease the objective"
                break
            theta = theta + t * d
            f, mu = f_new, mu_new
            if np.max(np.abs(theta[1:]), initial=0.0) > opt.max_abs_theta:
                reason = ("coefficients diverging (perfectly separable data or a basis function "
                          "without support); add smoothing or drop the variable")
                break
        else:
            g = self.gradient(theta, mu)
            gram = self.gram(mu)
        if not converged and reason.startswith("coefficients"):
            g = self.gradient(theta, mu)
            gram = self.gram(mu)
        return NewtonResult(theta, mu, f, g, gram, it, converged, reason)


def _log_mean_rate(my, mask, offset) -> float:
    """Intercept of the mean-rate model, ``log(sum y / sum exp(offset))``.

    With no spikes the maximum-likelihood rate is 0 and the intercept unbounded; half a spike
    is used instead (a stated continuity correction) so that the value stays finite.
    """
    exposure = float(np.dot(mask, np.exp(np.broadcast_to(offset, mask.shape))))
    total = float(my.sum())
    return float(np.log(max(total, 0.5) / exposure))
