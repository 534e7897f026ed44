"""Smoothness selection: the Laplace approximate restricted marginal likelihood (REML).

The criterion
-------------
For smoothing parameters ``lambda`` the selection maximises the Laplace approximation to the
restricted marginal likelihood of a Poisson model (known scale 1), in which the penalty acts
as an improper Gaussian prior and the unpenalised directions (intercept and penalty null
spaces, ``M_p`` of them) are integrated out with a flat prior (Wood 2011, JRSS-B 73:3,
sec. 2-3; Wood 2017, Generalized Additive Models, 2nd ed., sec. 6.11.2)::

    V(lambda) = l(theta_hat) - 1/2 theta_hat' S_lambda theta_hat
                + 1/2 log|S_lambda|_+ - 1/2 log|H + S_lambda| + M_p/2 log(2 pi)

with ``H`` the negative Hessian of the log-likelihood at the penalised optimum ``theta_hat``
and ``|.|_+`` the product of the non-zero eigenvalues. This is the criterion of mgcv's
``method = "REML"`` (its reported score is ``-V``; reference_checks/test_mgcv_reference.py),
called LAML in the code. It is not the marginal likelihood with the unpenalised effects held
fixed (mgcv's ``"ML"``), which selects smoother fits.

Its maximisation (:func:`encodex.fit.engine.fit_poisson`)
---------------------------------------------------------
1. Fast start, performance iteration (Gu 1992, J. Comput. Graph. Stat. 1:169; Wood 2004,
   JASA 99:673): each round forms ``H`` once at the current coefficients, maximises ``V``
   of the working model (the log-likelihood replaced by its second-order expansion there,
   :func:`working_criterion`) by Newton's method on ``log lambda`` with no pass over the
   bins, then takes one Newton step on the coefficients. Its fixed point treats ``H`` as
   fixed in lambda and therefore stops short of the optimum of ``V`` (by up to ~8% in lambda
   in benchmarks/bench_smoothness.py). A round whose ``H + S_lambda`` is not positive
   definite takes a generalised Fellner-Schall update instead (Wood & Fasiolo 2017,
   Biometrics 73:1071, eq. 2 with known scale)::

       lambda_k <- lambda_k * (tr(S_lambda^- S_k) - tr((H + S_lambda)^{-1} S_k)) / (theta' S_k theta)

2. Newton steps on ``rho = log lambda`` with the exact gradient of ``V``, which includes the
   change of the Poisson weights with lambda (:func:`laml_derivatives`), until the gradient
   or the step is small (:class:`encodex.fit.engine.FitOptions`). A parameter that step 1
   left far up to where ``V`` is flat (a term smoothed away) while ``V`` still rises towards
   smaller lambda is walked back first: there a small gradient is no sign of an optimum.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from encodex.design import Design

#: Smoothing parameters are kept inside these bounds: beyond them the fit no longer changes
#: (the term is either its unpenalised null space or unpenalised altogether).
LAMBDA_MIN = 1e-6
LAMBDA_MAX = 1e10

#: Each lambda also stays within this factor of its starting value, which is scaled to the
#: term's Hessian: a penalty 1e7 times the data curvature has switched its part off (edf of
#: order 1e-7), and larger values only worsen the conditioning of H + S.
RELATIVE_RANGE = 1e7

#: Effective degrees of freedom below which a penalised part counts as switched off.
NEGLIGIBLE_EDF = 1e-3

#: Bound below which ``tr(A^{-1} dH/drho_k)`` is taken as 0 (log-units, far below the Newton
#: phase's gradient tolerance).
NEGLIGIBLE_TRACE = 1e-9

#: One sentence naming the criterion, for run.json and the methods text.
CRITERION_STATEMENT = (
    "Smoothing parameters maximise the Laplace approximate restricted marginal likelihood "
    "(REML-type criterion, unpenalised effects integrated out; Wood 2011, J. R. Stat. Soc. B "
    "73:3-36; mgcv's method 'REML'), from a performance iteration (Newton steps on the "
    "working model's criterion; Gu 1992, J. Comput. Graph. Stat. 1:169-179; Wood 2004, J. Am. "
    "Stat. Assoc. 99:673-686) followed by Newton steps on log smoothing parameters with "
    "the exact gradient, stopped when every gradient component is below 1e-4 or a step moves "
    "no log smoothing parameter by more than 0.05 (remaining error measured below 0.3% in the "
    "smoothing parameters; on three reference problems they agree with mgcv 1.8-41's REML to "
    "0.02% and effective degrees of freedom to 1e-4)."
)


@dataclass(frozen=True)
class PenaltyStructure:
    """Per-term eigen-information needed for ``log|S_lambda|_+`` and ``tr(S_lambda^- S_k)``."""

    design: Design
    ranks: tuple[int, ...]       # rank of each term's total penalty
    term_of: tuple[int, ...]     # term index of each penalty
    # Non-zero eigenpairs of the penalty of each single-penalty term (None for a term with
    # several): those of lambda S are lambda times them, so the criterion's evaluations need
    # no eigendecomposition for such terms (two thirds of the calls on 5-minute cells, where
    # eigendecompositions took 12% of the time; benchmarks/RESULTS.md).
    single: tuple = ()

    @classmethod
    def of(cls, design: Design) -> "PenaltyStructure":
        ranks = []
        term_of = []
        single = []
        for j, t in enumerate(design.terms):
            total = sum(s / np.linalg.norm(s) for s in t.penalties)
            ev = np.linalg.eigvalsh(total)
            r = int(np.sum(ev > ev.max() * 1e-9))
            ranks.append(r)
            term_of.extend([j] * len(t.penalties))
            if len(t.penalties) == 1:
                ev, vec = np.linalg.eigh(t.penalties[0])
                single.append((ev[-r:], vec[:, -r:]))
            else:
                single.append(None)
        return cls(design, tuple(ranks), tuple(term_of), tuple(single))

    @property
    def null_space_dim(self) -> int:
        """``M_p``: unpenalised dimensions, the intercept included."""
        return self.design.n_theta - sum(self.ranks)

    def term_pieces(self, lambdas):
        """For each term, (penalties, lambdas, eigenvalues, eigenvectors) of its ``S_lambda``.

        Only the non-zero eigenpairs (the term's penalty rank) are returned.
        """
        out = []
        k = 0
        for j, t in enumerate(self.design.terms):
            m = len(t.penalties)
            lam = np.asarray(lambdas[k:k + m], dtype=float)
            if self.single and self.single[j] is not None:
                ev, vec = self.single[j]
                out.append((t.penalties, lam, lam[0] * ev, vec))
            else:
                out.append((t.penalties, lam, *self._multi_penalty_eigenpairs(j, lam)))
            k += m
        return out

    def _multi_penalty_eigenpairs(self, j: int, lam: np.ndarray):
        """Non-zero eigenpairs of term ``j``'s ``sum lambda_k S_k``, remembered per lambdas.

        The start phase evaluates the working criterion and its derivatives at the same
        lambdas, and at lambdas that differ in one term only (each parameter tried at its
        bound), so the same decompositions are asked for again and again.
        """
        cache = self.__dict__.setdefault("_eigen_cache", {})
        key = (j, lam.tobytes())
        if key not in cache:
            if len(cache) >= 64:
                cache.clear()
            penalties = self.design.terms[j].penalties
            ev, vec = np.linalg.eigh(sum(l * p for l, p in zip(lam, penalties)))
            r = self.ranks[j]
            cache[key] = (ev[-r:], vec[:, -r:])
        return cache[key]

    def log_pdet(self, lambdas) -> float:
        """``log|S_lambda|_+``: sum of logs of the non-zero eigenvalues, term by term."""
        return float(sum(np.sum(np.log(ev)) for _, _, ev, _ in self.term_pieces(lambdas)))

    def trace_pinv_products(self, lambdas) -> np.ndarray:
        """``tr(S_lambda^- S_k)`` for every penalty ``k``."""
        out = []
        for pens, _, ev, vec in self.term_pieces(lambdas):
            for p in pens:
                out.append(float(np.sum(np.einsum("ij,ij->j", vec, p @ vec) / ev)))
        return np.array(out)


def initial_lambdas(design: Design, gram: np.ndarray) -> np.ndarray:
    """Starting values that make each penalty comparable in size to its term's Hessian block.

    ``lambda_k = mean(diag(H_jj)) / mean(diag(S_k))``: a term then starts about halfway between
    unpenalised and fully smoothed, from where the fixed point iteration moves quickly.
    """
    lam = []
    for name, sl, s in design.penalty_list:
        h = np.mean(np.diag(gram)[sl])
        lam.append(max(h, 1e-8) / max(np.mean(np.diag(s)), 1e-300))
    return np.clip(np.array(lam), LAMBDA_MIN, LAMBDA_MAX)


def laml(loglik: float, theta: np.ndarray, gram: np.ndarray, design: Design,
         structure: PenaltyStructure, lambdas: np.ndarray) -> float:
    """The criterion ``V``: log Laplace approximate restricted marginal likelihood (REML).

    Evaluated at a penalised optimum ``theta`` with log-likelihood ``loglik`` and ``gram`` =
    ``H`` there (module docstring; Wood 2011, JRSS-B 73:3). Log-units; mgcv's REML score is
    ``-V``.
    """
    s = design.penalty_matrix(lambdas)
    sign, logdet = np.linalg.slogdet(gram + s)
    if sign <= 0:
        return -np.inf
    return float(loglik - 0.5 * theta @ s @ theta + 0.5 * structure.log_pdet(lambdas)
                 - 0.5 * logdet + 0.5 * structure.null_space_dim * np.log(2 * np.pi))


def fellner_schall_update(theta: np.ndarray, gram: np.ndarray, design: Design,
                          structure: PenaltyStructure, lambdas: np.ndarray,
                          max_log_step: float = 5.0, upper=LAMBDA_MAX, lower=LAMBDA_MIN) -> np.ndarray:
    """One generalised Fellner-Schall update of every smoothing parameter.

    The log-change of each ``lambda`` is capped at ``max_log_step`` per update so that a
    poor start cannot throw it far past the optimum; results are clipped to
    [lower, upper] (scalars or one bound per penalty).
    """
    s = design.penalty_matrix(lambdas)
    try:
        v = np.linalg.inv(gram + s)
    except np.linalg.LinAlgError:
        # A cell with a spike or two in the training bins can drive the Hessian of a direction
        # that no penalty covers to zero; the pseudo-inverse leaves that direction out.
        v = np.linalg.pinv(gram + s)
    tr_pinv = structure.trace_pinv_products(lambdas)
    new = np.empty_like(lambdas)
    for k, (_, sl, sk) in enumerate(design.penalty_list):
        tr_v = float(np.sum(v[sl, sl] * sk))
        num = max(tr_pinv[k] - tr_v, 0.0)
        if lambdas[k] * num < NEGLIGIBLE_EDF:
            # The penalised part of this term uses almost no degrees of freedom: the term is
            # its unpenalised part and larger lambdas change nothing. Go to the bound at once
            # instead of creeping there (the fixed point iteration converges only linearly).
            new[k] = np.inf
            continue
        th = theta[sl]
        den = float(th @ sk @ th)
        if den <= 1e-300:
            ratio = np.exp(max_log_step)
        elif num <= 0.0:
            ratio = np.exp(-max_log_step)
        else:
            ratio = np.clip(num / den, np.exp(-max_log_step), np.exp(max_log_step))
        new[k] = lambdas[k] * ratio
    return np.clip(new, lower, upper)


@dataclass(frozen=True)
class CriterionDerivatives:
    """Derivatives of the LAML ``V`` with respect to ``rho = log lambda`` at a penalised optimum.

    Attributes
    ----------
    gradient : ndarray, shape (n_penalties,)
        Exact ``dV/drho_k``, including the change of the Poisson weights with ``lambda``.
    hessian : ndarray, shape (n_penalties, n_penalties)
        ``d2V/drho_j drho_k`` with the weights held fixed (the weight-derivative terms are left
        out; see :func:`laml_derivatives`).
    dtheta : ndarray, shape (n_penalties, n_theta)
        ``dtheta_hat/drho_k = -A^{-1} lambda_k S_k theta_hat`` (row ``k``).
    """

    gradient: np.ndarray
    hessian: np.ndarray
    dtheta: np.ndarray        # (n_penalties, n_theta): dtheta_hat/drho_k


def _weight_derivative_traces(design: Design, w: np.ndarray, gram: np.ndarray,
                              a_inv: np.ndarray, dtheta: np.ndarray) -> np.ndarray:
    """``tr(A^{-1} dH/drho_k)`` for every penalty, ``dH/drho_k = Z'X' diag(w * X Z dtheta_k) X Z``.

    ``X' diag(v) X`` is linear in the weights ``v``, so every trace is a weighted sum of the
    same bin quantities ``h_i = x_i' Z A^{-1} Z' x_i``::

        tr(A^{-1} dH_k) = sum_i w_i h_i (X Z dtheta_k)_i = (Z'X' (w h))' dtheta_k

    One pass over the bins for ``h`` (:meth:`Design.row_quadratic_forms`, about 1-1.3 Gram
    passes) and one product ``X' r`` (float64) serve every penalty, instead of one Gram pass
    per penalty. ``gram`` is unused (kept for the signature).
    """
    # |tr(A^{-1} dH_k)| <= max|eta_k| tr(A^{-1} H) <= max|eta_k| n_theta (the eigenvalues
    # of A^{-1} H lie in [0, 1]): when every term is smoothed away no pass is needed. The
    # bound on max|eta_k| needs no pass over the bins either.
    scale = design.linear_predictor_bounds(dtheta)
    live = scale * a_inv.shape[0] > NEGLIGIBLE_TRACE
    out = np.zeros(dtheta.shape[0])
    if live.any():
        h = design.row_quadratic_forms(a_inv)
        out[live] = dtheta[live] @ design.transpose_dot(w * h)
    return out


def _pinv_penalty_products(structure: PenaltyStructure, lambdas) -> list:
    """``S_lambda^+ lambda_k S_k`` (term-local) for every penalty, with the term index."""
    out = []
    for j, (pens, lam, ev, vec) in enumerate(structure.term_pieces(lambdas)):
        s_pinv = (vec / ev) @ vec.T
        out.extend((j, s_pinv @ (l * p)) for l, p in zip(lam, pens))
    return out


@dataclass(frozen=True)
class FixedWeightDerivatives:
    """Derivatives of ``V`` in ``rho = log lambda`` with the Poisson weights held fixed.

    For the working model of one round (the log-likelihood replaced by its second-order
    expansion at the current coefficients, ``H`` fixed) these are exact; for ``V`` itself the
    gradient lacks the weight-change term of :func:`laml_derivatives`.

    Attributes
    ----------
    gradient, hessian : ndarray
        ``dV/drho`` and ``d2V/drho drho'`` with ``H`` fixed.
    dtheta : ndarray, shape (n_penalties, n_theta)
        ``dtheta_hat/drho_k = -A^{-1} lambda_k S_k theta_hat``.
    a_inv : ndarray
        ``(H + S_lambda)^{-1}``.
    """

    gradient: np.ndarray
    hessian: np.ndarray
    dtheta: np.ndarray
    a_inv: np.ndarray


def fixed_weight_derivatives(theta: np.ndarray, gram: np.ndarray, design: Design,
                             structure: PenaltyStructure, lambdas) -> FixedWeightDerivatives:
    """Gradient and Hessian of ``V`` in ``rho = log lambda`` with ``H = gram`` held fixed.

    ``theta`` is the penalised optimum at ``lambdas`` (of the Poisson model, or of the
    working model of :func:`working_criterion`). The formulas are those of
    :func:`laml_derivatives` without the ``dH/drho`` terms (Wood 2011, JRSS-B 73:3, sec. 3).
    """
    lambdas = np.asarray(lambdas, dtype=float)
    a = gram + design.penalty_matrix(lambdas)
    try:
        a_inv = np.linalg.inv(a)
    except np.linalg.LinAlgError:
        a_inv = np.linalg.pinv(a)
    pens = design.penalty_list
    m = len(pens)
    b = np.zeros((m, design.n_theta))
    for k, (_, sl, sk) in enumerate(pens):
        b[k, sl] = lambdas[k] * (sk @ theta[sl])
    a_inv_b = b @ a_inv                                 # rows: (A^{-1} b_k)'
    # E_k = A^{-1} lambda_k S_k, kept as its non-zero columns.
    e_cols = [a_inv[:, sl] @ (lambdas[k] * sk) for k, (_, sl, sk) in enumerate(pens)]
    tr_as = np.array([np.trace(e[sl]) for e, (_, sl, _) in zip(e_cols, pens)])
    q = _pinv_penalty_products(structure, lambdas)
    tr_sp = np.array([np.trace(qk) for _, qk in q])
    fixed = 0.5 * np.einsum("kp,p->k", b, theta) + 0.5 * tr_as - 0.5 * tr_sp
    hess = np.diag(fixed) - a_inv_b @ b.T
    for j, (_, sl_j, _) in enumerate(pens):
        for k in range(j, m):
            sl_k = pens[k][1]
            t = np.sum(e_cols[j][sl_k] * e_cols[k][sl_j].T)
            if q[j][0] == q[k][0]:
                t -= np.sum(q[j][1] * q[k][1].T)
            hess[j, k] -= 0.5 * t
            if k != j:
                hess[k, j] = hess[j, k]
    return FixedWeightDerivatives(-fixed, -hess, -a_inv_b, a_inv)


def working_criterion(gram: np.ndarray, rhs: np.ndarray, design: Design,
                      structure: PenaltyStructure, lambdas) -> tuple[float, np.ndarray | None]:
    """``V`` of the working model of one round, and its penalised optimum.

    With the log-likelihood replaced by its second-order expansion at the current
    coefficients ``theta_c`` (gradient ``g``, negative Hessian ``H = gram``), the penalised
    optimum is ``theta_hat = A^{-1} r`` with ``A = H + S_lambda`` and ``r = H theta_c + g``
    (``rhs``), and, up to a constant that does not depend on ``lambda``::

        V_w(lambda) = 1/2 r' theta_hat + 1/2 log|S_lambda|_+ - 1/2 log|A|

    Its derivatives in ``log lambda`` are those of :func:`fixed_weight_derivatives` at
    ``theta_hat`` (exact here, since ``H`` is fixed). Returns ``(-inf, None)`` when ``A`` is
    not positive definite.
    """
    a = gram + design.penalty_matrix(lambdas)
    try:
        c = linalg.cho_factor(a, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return -np.inf, None
    theta = linalg.cho_solve(c, rhs, check_finite=False)
    log_det = 2.0 * float(np.sum(np.log(np.diag(c[0]))))
    value = 0.5 * float(rhs @ theta) + 0.5 * structure.log_pdet(lambdas) - 0.5 * log_det
    return (value if np.isfinite(value) else -np.inf), theta


def laml_derivatives(theta: np.ndarray, w: np.ndarray, gram: np.ndarray, design: Design,
                     structure: PenaltyStructure, lambdas: np.ndarray) -> CriterionDerivatives:
    """Gradient and fixed-weight Hessian of the LAML in ``rho = log lambda``.

    With ``A = H + S_lambda`` (``H = Z'X'WX Z`` at the penalised optimum ``theta``, Poisson
    weights ``W = diag(mu)``), ``b_k = lambda_k S_k theta`` and
    ``dtheta/drho_k = -A^{-1} b_k`` (implicit function theorem at the optimum), the
    derivatives of ``-V`` are (Wood 2011, JRSS-B 73:3, sec. 3 and appendix; the first term by
    the envelope theorem)::

        -dV/drho_k = 1/2 theta' b_k + 1/2 tr(A^{-1} (lambda_k S_k + dH/drho_k))
                     - 1/2 tr(S_lambda^+ lambda_k S_k)

    where ``dH/drho_k = Z'X' diag(mu * X Z dtheta/drho_k) X Z`` is the change of the weights
    (``dmu/deta = mu`` for the log link). With ``W`` held fixed::

        -d2V/drho_j drho_k = delta_jk (-dV/drho_k without its dH term) - b_j' A^{-1} b_k
                             - 1/2 tr(A^{-1} lambda_j S_j A^{-1} lambda_k S_k)
                             + 1/2 tr(S^+ lambda_j S_j S^+ lambda_k S_k).

    The Hessian terms that involve ``dH`` (first and second derivatives of the weights) are
    left out: they cost a pass over the bins per pair of penalties, and they are small beside
    the fixed-weight part (Newton steps with this Hessian and the exact gradient measured a
    contraction of the gradient by 10-100 per step; benchmarks/bench_smoothness.py).

    Parameters
    ----------
    theta : ndarray
        Penalised optimum at ``lambdas`` (constrained coefficients).
    w : ndarray, shape (n_rows,)
        Poisson weights ``mu`` at ``theta`` (0 on rows left out of the fit).
    gram : ndarray
        ``Z'X' diag(w) X Z`` at ``theta``.
    design, structure, lambdas
        As for :func:`laml`.

    Returns
    -------
    CriterionDerivatives
        Of ``V`` itself (gradient of the criterion to be maximised).
    """
    lambdas = np.asarray(lambdas, dtype=float)
    fw = fixed_weight_derivatives(theta, gram, design, structure, lambdas)
    tr_dh = _weight_derivative_traces(design, w, gram, fw.a_inv, fw.dtheta)
    return CriterionDerivatives(fw.gradient - 0.5 * tr_dh, fw.hessian, fw.dtheta)
