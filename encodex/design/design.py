"""The design of an additive Poisson model: an intercept plus one penalised block per term.

Coefficient layouts
-------------------
``beta`` (length ``n_beta``) holds the intercept and every basis coefficient of every term.
Each term is constrained to sum to zero over the rows the design was built on,
``1' X_j beta_j = 0`` (Wood 2017, sec. 5.4.1), so the intercept is the log mean rate and each
term is a log gain relative to it. The constraint is absorbed by a reparametrisation
``beta_j = Z_j theta_j`` with ``Z_j`` the null space of the column sums (from a QR
decomposition), so the solver works with the shorter unconstrained ``theta`` (length
``n_theta``) and never with the tall design itself.

The design stays in fixed-non-zeros-per-row storage; products with it are gathers and
``bincount`` scatters, and the weighted Gram matrix ``X' W X`` is accumulated from dense chunks
of a few thousand rows so that a dense copy of every bin by every column is never held.

Reference: Wood, S. N. (2017). *Generalized Additive Models*, 2nd ed., CRC Press, sec. 1.8.1
and 5.4.1 (identifiability constraints by QR).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.linalg.blas import dsyrk

from encodex.errors import InputError
from encodex.variables import canonical_order

from .bases import Basis, Block

#: Rows per dense chunk when accumulating X' W X: large enough for BLAS efficiency, small
#: enough (a few MB) to stay in cache-friendly memory whatever the number of bins.
GRAM_CHUNK_ROWS = 4096


def sum_to_zero_null_space(column_sums: np.ndarray) -> np.ndarray:
    """Orthonormal basis ``Z`` (p x p-1) of the vectors orthogonal to ``column_sums``.

    Householder QR of the single constraint column (Wood 2017, sec. 1.8.1): the last ``p - 1``
    columns of the complete ``Q`` span its orthogonal complement.
    """
    c = np.asarray(column_sums, dtype=float).reshape(-1, 1)
    q, _ = np.linalg.qr(c, mode="complete")
    return q[:, 1:]


@dataclass(frozen=True)
class Term:
    """One smooth term: its basis, evaluated block, constraint and penalties.

    Attributes
    ----------
    name : str
        Variable name.
    basis : Basis
        The basis object that produced the block.
    block : Block
        Design rows (fixed non-zeros per row).
    Z : ndarray, shape (p, p - 1)
        Sum-to-zero reparametrisation, ``beta = Z @ theta``.
    penalties : tuple of ndarray
        Penalty matrices in ``theta`` coordinates, ``Z' S Z``.
    """

    name: str
    basis: Basis
    block: Block
    Z: np.ndarray
    penalties: tuple[np.ndarray, ...]

    @property
    def n_beta(self) -> int:
        return self.block.n_columns

    @property
    def n_theta(self) -> int:
        return self.Z.shape[1]


@dataclass(frozen=True)
class Design:
    """Intercept plus smooth terms on ``n_rows`` bins. See the module docstring."""

    n_rows: int
    terms: tuple[Term, ...]

    # --- layout -------------------------------------------------------------------------
    @property
    def names(self) -> tuple[str, ...]:
        return tuple(t.name for t in self.terms)

    @cached_property
    def beta_slices(self) -> dict[str, slice]:
        out, start = {}, 1
        for t in self.terms:
            out[t.name] = slice(start, start + t.n_beta)
            start += t.n_beta
        return out

    @cached_property
    def theta_slices(self) -> dict[str, slice]:
        out, start = {}, 1
        for t in self.terms:
            out[t.name] = slice(start, start + t.n_theta)
            start += t.n_theta
        return out

    @property
    def n_beta(self) -> int:
        return 1 + sum(t.n_beta for t in self.terms)

    @property
    def n_theta(self) -> int:
        return 1 + sum(t.n_theta for t in self.terms)

    @cached_property
    def Z(self) -> np.ndarray:
        """Block-diagonal reparametrisation (n_beta x n_theta), intercept first."""
        z = np.zeros((self.n_beta, self.n_theta))
        z[0, 0] = 1.0
        for t in self.terms:
            z[self.beta_slices[t.name], self.theta_slices[t.name]] = t.Z
        return z

    @cached_property
    def penalty_list(self) -> tuple[tuple[str, slice, np.ndarray], ...]:
        """Every penalty as ``(term name, theta slice, matrix)``, in term order."""
        return tuple((t.name, self.theta_slices[t.name], s) for t in self.terms for s in t.penalties)

    @property
    def n_penalties(self) -> int:
        return len(self.penalty_list)

    def penalty_matrix(self, lambdas: np.ndarray) -> np.ndarray:
        """Total penalty ``S_lambda = sum_k lambda_k S_k`` in theta coordinates."""
        s = np.zeros((self.n_theta, self.n_theta))
        for lam, (_, sl, sk) in zip(np.asarray(lambdas, dtype=float), self.penalty_list):
            s[sl, sl] += lam * sk
        return s

    def beta(self, theta: np.ndarray) -> np.ndarray:
        """Basis coefficients (with intercept) from constrained coefficients."""
        return self.Z @ theta

    # --- products with the design -------------------------------------------------------
    def linear_predictor(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """``X beta`` (without offset) on all rows or on ``rows`` (index array)."""
        beta = self.beta(theta)
        eta = np.full(self.n_rows if rows is None else len(rows), beta[0])
        for t in self.terms:
            b = beta[self.beta_slices[t.name]]
            vals, cols = t.block.values, t.block.columns
            if rows is not None:
                vals, cols = vals[rows], cols[rows]
            eta += np.einsum("ij,ij->i", vals, b[cols])
        return eta

    def transpose_dot(self, r: np.ndarray) -> np.ndarray:
        """``Z' X' r`` for a vector ``r`` over all rows (zeros exclude rows)."""
        out = np.empty(self.n_theta)
        out[0] = r.sum()
        for t in self.terms:
            xr = np.bincount(t.block.columns.ravel(), weights=(t.block.values * r[:, None]).ravel(),
                             minlength=t.n_beta)
            out[self.theta_slices[t.name]] = t.Z.T @ xr
        return out

    @cached_property
    def _row_layout(self) -> tuple[np.ndarray, np.ndarray]:
        """Every row's non-zeros (intercept included) as (values, columns in beta layout)."""
        n = self.n_rows
        vals = [np.ones((n, 1))]
        cols = [np.zeros((n, 1), dtype=np.int32)]
        for t in self.terms:
            vals.append(t.block.values)
            cols.append(t.block.columns + np.int32(self.beta_slices[t.name].start))
        return np.hstack(vals), np.hstack(cols).astype(np.intp)

    def weighted_gram(self, w: np.ndarray, groups: np.ndarray | None = None,
                      n_groups: int | None = None) -> np.ndarray:
        """``Z' X' diag(w) X Z`` for non-negative weights ``w`` over all rows.

        The product is accumulated over dense chunks of :data:`GRAM_CHUNK_ROWS` rows, each
        filled from the non-zeros of its rows and added with the BLAS symmetric rank-k
        update, so memory stays at one chunk whatever the number of bins. Rows with zero
        weight contribute nothing.

        Parameters
        ----------
        w : ndarray, shape (n_rows,)
            Non-negative weights (``mu`` for the Poisson Hessian).
        groups : ndarray of int, shape (n_rows,), optional
            Group of each row (e.g. its cross-validation fold; negative = left out). When
            given, one matrix per group is returned, shape (n_groups, n_theta, n_theta), at the
            cost of a single pass over the rows; groups should come in contiguous runs.
        n_groups : int, optional
            Number of groups (default ``groups.max() + 1``).
        """
        vals, cols = self._row_layout
        p = self.n_beta
        n = self.n_rows
        if groups is None:
            run_starts, run_groups = np.array([0]), np.array([0])
            n_out = 1
        else:
            groups = np.asarray(groups)
            run_starts = np.concatenate([[0], np.flatnonzero(np.diff(groups)) + 1])
            run_groups = groups[run_starts]
            n_out = int(groups.max()) + 1 if n_groups is None else int(n_groups)
        run_stops = np.append(run_starts[1:], n)
        out = np.zeros((n_out, p, p), order="C")
        sw = np.sqrt(w)
        chunk = np.zeros((GRAM_CHUNK_ROWS, p))
        base = (np.arange(GRAM_CHUNK_ROWS) * p)[:, None]
        for r0, r1, gid in zip(run_starts, run_stops, run_groups):
            if gid < 0:
                continue
            g = np.zeros((p, p), order="F")
            for start in range(r0, r1, GRAM_CHUNK_ROWS):
                stop = min(start + GRAM_CHUNK_ROWS, r1)
                m = stop - start
                if not sw[start:stop].any():
                    continue
                c = chunk[:m]
                c.fill(0.0)
                c.reshape(-1)[(base[:m] + cols[start:stop]).ravel()] = (
                    vals[start:stop] * sw[start:stop, None]).ravel()
                # dsyrk with trans=1 adds c' c to the upper triangle of g.
                g = dsyrk(1.0, c, beta=1.0, c=g, trans=1, lower=0, overwrite_c=1)
            out[gid] += np.triu(g) + np.triu(g, 1).T
        out = self.Z.T @ out @ self.Z
        return out[0] if groups is None else out

    def transpose_dot_groups(self, r: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
        """``Z' X' r`` restricted to each group's rows, shape (n_groups, n_theta)."""
        out = np.empty((n_groups, self.n_theta))
        for k in range(n_groups):
            out[k] = self.transpose_dot(np.where(groups == k, r, 0.0))
        return out

    def dense(self) -> np.ndarray:
        """Dense ``X`` (n_rows x n_beta), for tests and small problems only."""
        cols = [np.ones((self.n_rows, 1))] + [t.block.toarray() for t in self.terms]
        return np.hstack(cols)

    # --- derived designs ----------------------------------------------------------------
    def subset(self, names: Iterable[str]) -> "Design":
        """Design with only the named terms (same rows, constraints and order)."""
        names = set(names)
        missing = names - set(self.names)
        if missing:
            raise InputError(f"terms {sorted(missing)} are not in the design {list(self.names)}")
        return Design(self.n_rows, tuple(t for t in self.terms if t.name in names))

    def term(self, name: str) -> Term:
        for t in self.terms:
            if t.name == name:
                return t
        raise KeyError(name)


def build_design(covariates: Mapping[str, np.ndarray], bases: Mapping[str, Basis]) -> Design:
    """Evaluate every basis on its covariate and constrain each term to sum to zero.

    Parameters
    ----------
    covariates : mapping of str to ndarray
        Covariate values on the bins to be modelled (all finite); ``position`` has shape
        (n, 2) in metres, angles are in radians.
    bases : mapping of str to Basis
        One basis per variable to include; terms are ordered canonically
        (:func:`encodex.variables.canonical_order`).

    Returns
    -------
    Design
    """
    terms = []
    n_rows = None
    for name in canonical_order(bases):
        if name not in covariates:
            raise InputError(f"no covariate named '{name}'; available: {sorted(covariates)}")
        basis = bases[name]
        block = basis.evaluate(covariates[name])
        n = block.values.shape[0]
        if n_rows is None:
            n_rows = n
        elif n != n_rows:
            raise InputError(f"covariate '{name}' has {n} rows but others have {n_rows}")
        col_sums = np.bincount(block.columns.ravel(), weights=block.values.ravel(),
                               minlength=block.n_columns)
        z = sum_to_zero_null_space(col_sums)
        pens = tuple(z.T @ s @ z for s in basis.penalties())
        terms.append(Term(name, basis, block, z, pens))
    if n_rows is None:
        first = next(iter(covariates.values()), None)
        if first is None:
            raise InputError("no covariates given: cannot tell the number of bins")
        n_rows = len(first)
    return Design(int(n_rows), tuple(terms))
