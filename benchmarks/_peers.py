"""The solver benchmark's problem and its peers: the same penalised Poisson objective, four ways.

The objective (:mod:`encodex.fit.solver`), with ``A = X Z`` the dense constrained design
(intercept column first), ``o`` the offset (log bin width, s) and ``S`` the total penalty
``sum_k lambda_k S_k`` in the same coordinates::

    f(theta) = sum_t (mu_t - y_t eta_t) + 1/2 theta' S theta,   eta = o + A theta,  mu = exp(eta).

Each peer below is set up so that its own objective is an increasing affine function of ``f``
(so it has the same minimiser); :func:`objective` evaluates ``f`` independently of encodex so
that every solution can be scored on the same scale.

* statsmodels (``PenalizedMixin`` on ``GLM``, Poisson family, log link, with the offset): it
  maximises ``loglik(theta) - pen_weight * sum_i (R theta)_i^2`` with
  ``statsmodels.base._penalties.L2ConstraintsPenalty(restriction=R)``. With ``R' R = S`` and
  ``pen_weight = 1/2`` this is ``-f`` minus the constant ``sum log y_t!``. Newton's method
  (``method="newton"``, statsmodels' own, analytic score and Hessian) from the same start as
  encodex (intercept at the log mean rate, every other coefficient 0).
* glum (``GeneralizedLinearRegressor``, Poisson, log link, ``l1_ratio=0``): it minimises
  ``1/(2 sum w) * deviance + alpha/2 * b' P2 b`` (glum documentation, "Objective"), with unit
  sample weights ``sum w = n``. The Poisson half-deviance is ``sum (mu - y eta)`` plus a constant,
  so with ``P2 = S / c`` (without the unpenalised intercept, which glum fits separately) and
  ``alpha = c/n`` glum's objective is ``f / n`` plus a constant (``c = max |S|``, any ``c > 0``
  gives the same penalty; this one keeps glum's absolute eigenvalue check meaningful). Solver
  ``irls-ls`` (Newton with a line search on the full Hessian, glum's exact second-order solver
  for pure L2 penalties; ``lbfgs`` did not converge and ``irls-cd`` was far slower here).
* numpy/scipy (:func:`fit_numpy`): the straightforward hand-built pipeline, dense Newton on
  ``f`` itself with BLAS products over the dense design.
"""

from __future__ import annotations

import os
import platform
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from encodex.design import Design, build_design, default_bases
from encodex.variables import VARIABLES, label

#: Basis sizes of the benchmark design (issue 2): 10 x 10 planar position, 12 heading, 8 speed,
#: 10 distance, 10 time functions, 140 basis columns before the sum-to-zero constraints.
SIZES = {"position": 10, "heading": 12, "speed": 8, "distance": 10, "time": 10}

#: Bin width of the benchmark, s.
BIN_SIZE = 0.02

#: The simulated cell is the first one the simulator tuned to this label.
CELL_LABEL = label(("position", "speed"))


@dataclass(frozen=True)
class Problem:
    """One unit's counts on a constrained design, as every solver sees it."""

    design: Design
    y: np.ndarray          # spike counts per bin
    offset: float          # log(bin width / 1 s)
    unit: str
    seed: int
    duration_s: float

    @property
    def n_bins(self) -> int:
        return self.design.n_rows


def make_problem(duration_s: float, seed: int = 1, n_cells: int = 20,
                 gram_precision: str = "double") -> Problem:
    """Simulate one open-field session and pick a position+speed cell.

    Uses :func:`encodex.simulate.simulate_recording` (a single environment of ``duration_s``,
    no tracking dropouts so that every 20 ms bin is usable: 1800 s gives 90,000 bins) and
    :func:`encodex.session.build_session`. Tries successive seeds until the simulator has made
    a cell tuned to position and speed.
    """
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    for s in range(seed, seed + 20):
        rec, truth = simulate_recording(seed=s, n_cells=n_cells, duration_s=duration_s,
                                        environments=("room_a",), dropouts=False)
        hits = truth.loc[truth["variables"] == CELL_LABEL, "unit"]
        if len(hits):
            break
    else:  # pragma: no cover - the simulator makes 6% of cells position+speed
        raise RuntimeError(f"no {CELL_LABEL} cell in 20 simulated sessions of {n_cells} cells")
    session = build_session(rec, bin_size=BIN_SIZE).restrict(0)
    cov = {v: np.asarray(session.covariates[v]) for v in VARIABLES}
    bases = default_bases(cov, VARIABLES, sizes=SIZES)
    design = build_design(cov, bases, gram_precision=gram_precision)
    unit = str(hits.iloc[0])
    y = session.unit_counts(unit).astype(float)
    return Problem(design, y, float(np.log(session.bin_size)), unit, s, float(duration_s))


def constrained_dense(design: Design) -> np.ndarray:
    """Dense ``X Z`` (bins x constrained coefficients), the only design the peers accept."""
    return np.ascontiguousarray(design.dense() @ design.Z)


def objective(A: np.ndarray, y: np.ndarray, offset: float, S: np.ndarray,
              theta: np.ndarray) -> float:
    """``sum(mu - y eta) + 1/2 theta' S theta`` computed from the dense design."""
    eta = offset + A @ theta
    return float(np.sum(np.exp(eta)) - y @ eta + 0.5 * theta @ S @ theta)


def gradient(A, y, offset, S, theta) -> np.ndarray:
    """Gradient of :func:`objective`."""
    mu = np.exp(offset + A @ theta)
    return A.T @ (mu - y) + S @ theta


def penalty_root(S: np.ndarray) -> np.ndarray:
    """A matrix ``R`` with ``R' R = S`` for a symmetric positive semi-definite ``S``.

    From the eigendecomposition ``S = V diag(w) V'``: ``R = diag(sqrt(w)) V'`` (rounding-level
    negative eigenvalues set to 0); rows of zero eigenvalues are dropped.
    """
    S = 0.5 * (S + S.T)
    w, v = np.linalg.eigh(S)
    keep = w > max(w.max(), 0.0) * 1e-14
    return np.sqrt(w[keep])[:, None] * v[:, keep].T


def start_theta(y: np.ndarray, offset: float, p: int) -> np.ndarray:
    """Shared start: intercept at the log mean rate, every term flat (encodex's own start)."""
    theta = np.zeros(p)
    theta[0] = np.log(y.sum() / (len(y) * np.exp(offset)))
    return theta


def fit_statsmodels(A, y, offset, S, theta0):
    """Penalised Poisson GLM by statsmodels' Newton method; returns ``(theta, n_iter)``."""
    import statsmodels.api as sm
    from statsmodels.base._penalized import PenalizedMixin
    from statsmodels.base._penalties import L2ConstraintsPenalty

    class PenalizedGLM(PenalizedMixin, sm.GLM):
        pass

    penal = L2ConstraintsPenalty(restriction=penalty_root(S))
    model = PenalizedGLM(y, A, family=sm.families.Poisson(), offset=np.full(len(y), offset),
                         penal=penal, pen_weight=0.5)
    res = model.fit(method="newton", start_params=theta0, maxiter=100, tol=1e-12, disp=0)
    n_iter = int(res.mle_retvals.get("iterations", -1)) if res.mle_retvals else -1
    return np.asarray(res.params, dtype=float), n_iter


def glum_design(A: np.ndarray) -> np.ndarray:
    """``A`` without its intercept column, C-contiguous (glum copies other layouts)."""
    return np.ascontiguousarray(A[:, 1:])


def fit_glum(X, y, offset, S):
    """Penalised Poisson GLM by glum's IRLS with line search; returns ``(theta, n_iter)``.

    ``X`` is :func:`glum_design` of the constrained design: glum fits the intercept itself.
    """
    from glum import GeneralizedLinearRegressor

    n = len(y)
    # glum checks P2 >= 0 with an absolute eigenvalue tolerance (-1e-15), which rounding in a
    # penalty with lambdas ~1e7 fails; P2 = S / c with alpha = c / n is the same penalty.
    P2 = S[1:, 1:]
    c = float(np.max(np.abs(P2))) or 1.0
    model = GeneralizedLinearRegressor(
        family="poisson", link="log", alpha=c / n, l1_ratio=0.0, P2=P2 / c,
        fit_intercept=True, solver="irls-ls", gradient_tol=1e-9, max_iter=200)
    model.fit(X, y, offset=np.full(n, offset))
    theta = np.concatenate([[model.intercept_], model.coef_])
    return theta, int(model.n_iter_)


def fit_numpy(A, y, offset, S, theta0, tol=1e-10, max_iter=100):
    """The straightforward pipeline's solver: dense penalised Newton with numpy/scipy BLAS.

    What a careful analyst writes by hand: ``eta = o + A theta``, gradient ``A'(mu - y) + S
    theta``, Hessian ``A' diag(mu) A + S`` formed densely (one BLAS product over every bin
    and coefficient), Cholesky solve, step halving until the objective decreases; stops when
    the Newton decrement ``g' H^-1 g / 2`` is below ``tol * (1 + |f|)``. Returns
    ``(theta, n_iter)``.
    """
    from scipy import linalg

    theta = np.asarray(theta0, dtype=float).copy()
    eta = offset + A @ theta
    mu = np.exp(eta)
    f = float(mu.sum() - y @ eta + 0.5 * theta @ S @ theta)
    it = 0
    for it in range(1, max_iter + 1):
        g = A.T @ (mu - y) + S @ theta
        H = (A * mu[:, None]).T @ A + S
        d = -linalg.cho_solve(linalg.cho_factor(H, lower=True), g)
        if -float(g @ d) / 2 <= tol * (1 + abs(f)):
            break
        t = 1.0
        while t > 1e-10:
            cand = theta + t * d
            eta_c = offset + A @ cand
            with np.errstate(over="ignore"):
                mu_c = np.exp(eta_c)
            f_c = float(mu_c.sum() - y @ eta_c + 0.5 * cand @ S @ cand)
            if np.isfinite(f_c) and f_c < f:
                theta, eta, mu, f = cand, eta_c, mu_c, f_c
                break
            t *= 0.5
        else:
            break
    return theta, it


def machine() -> dict:
    """CPU, Python and platform of this machine, and its load (others' work shares the CPUs)."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"nproc": os.cpu_count(), "cpu": cpu, "python": platform.python_version(),
            "platform": platform.platform(), "loadavg_1min": os.getloadavg()[0]}


def emit(res: dict, table) -> int:
    """Print a benchmark's result: ONE line of JSON, a blank line, then ``table(res)``."""
    import json

    print(json.dumps(res), flush=True)
    print()
    print(table(res))
    return 0
