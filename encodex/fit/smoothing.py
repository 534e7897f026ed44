"""Smoothness selection: Laplace approximate marginal likelihood (LAML) for Poisson models.

For smoothing parameters ``lambda`` the log LAML of a Poisson model (known scale 1) is
(Wood 2017, sec. 6.11.2; Wood 2011, JRSS-B 73:3)::

    V(lambda) = l(theta_hat) - 1/2 theta_hat' S_lambda theta_hat
                + 1/2 log|S_lambda|_+ - 1/2 log|H + S_lambda| + M_p/2 log(2 pi)

with ``H`` the negative Hessian of the log-likelihood at the penalised optimum ``theta_hat``,
``|.|_+`` the product of the non-zero eigenvalues and ``M_p`` the dimension of the penalty null
space. It is maximised by the generalised Fellner-Schall fixed point (Wood & Fasiolo 2017,
Biometrics 73:1071, eq. 2 with known scale)::

    lambda_k <- lambda_k * (tr(S_lambda^- S_k) - tr((H + S_lambda)^{-1} S_k)) / (theta' S_k theta)

each update re-optimising ``theta`` by Newton's method from its previous value.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

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


@dataclass(frozen=True)
class PenaltyStructure:
    """Per-term eigen-information needed for ``log|S_lambda|_+`` and ``tr(S_lambda^- S_k)``."""

    design: Design
    ranks: tuple[int, ...]       # rank of each term's total penalty
    term_of: tuple[int, ...]     # term index of each penalty

    @classmethod
    def of(cls, design: Design) -> "PenaltyStructure":
        ranks = []
        term_of = []
        for j, t in enumerate(design.terms):
            total = sum(s / np.linalg.norm(s) for s in t.penalties)
            ev = np.linalg.eigvalsh(total)
            ranks.append(int(np.sum(ev > ev.max() * 1e-9)))
            term_of.extend([j] * len(t.penalties))
        return cls(design, tuple(ranks), tuple(term_of))

    @property
    def null_space_dim(self) -> int:
        """``M_p``: unpenalised dimensions, the intercept included."""
        return self.design.n_theta - sum(self.ranks)

    def term_pieces(self, lambdas):
        """For each term, (penalties, lambdas, eigenvalues, eigenvectors) of its ``S_lambda``."""
        out = []
        k = 0
        for j, t in enumerate(self.design.terms):
            m = len(t.penalties)
            lam = np.asarray(lambdas[k:k + m], dtype=float)
            s = sum(l * p for l, p in zip(lam, t.penalties))
            ev, vec = np.linalg.eigh(s)
            r = self.ranks[j]
            out.append((t.penalties, lam, ev[-r:], vec[:, -r:]))
            k += m
        return out

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
    """Log Laplace approximate marginal likelihood at a penalised optimum (module docstring)."""
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
