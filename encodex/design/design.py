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

The design stays sparse: products with it go through one CSR block per term, and the
weighted Gram matrix ``X' W X`` is accumulated from dense chunks of a few thousand rows of a
compact layout (see :meth:`Design.weighted_gram`), so that a dense copy of every bin by every
column is never held. A sub-design cut by :meth:`Design.subset` (one model of the forward
path) shares these blocks and layouts with the design it was cut from.

Reference: Wood, S. N. (2017). *Generalized Additive Models*, 2nd ed., CRC Press, sec. 1.8.1
and 5.4.1 (identifiability constraints by QR).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import sparse

from encodex.errors import InputError, SettingsError
from encodex.variables import canonical_order

from .bases import Basis, Block

#: Rows per dense chunk when accumulating X' W X: large enough for BLAS efficiency, small
#: enough (a few MB) to stay in cache-friendly memory whatever the number of bins.
GRAM_CHUNK_ROWS = 4096

#: Rows of consecutive runs weighted in one go by :meth:`Design.weighted_gram` (the buffer is
#: ``width x GRAM_BATCH_ROWS`` values: 4.5 MB for the 69 compact columns of the full design).
GRAM_BATCH_ROWS = 16384

#: Arithmetic of X'WX: "double" (float64 throughout) or "single" (compact rows and each chunk's
#: rank-k update in float32, chunks summed in float64; 1.5x faster, relative error ~1e-8).
GRAM_PRECISIONS = ("double", "single")


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
    #: The design this one was cut from by :meth:`subset` (None for a design built directly).
    #: Sub-designs share its per-term sparse matrices and row-grouping plans, which are built
    #: once per environment and reused by every model of every cell.
    root: "Design | None" = field(default=None, compare=False, repr=False)
    #: Arithmetic of :meth:`weighted_gram` (one of :data:`GRAM_PRECISIONS`). Only the
    #: Hessian is affected: products ``X beta`` and ``X' r`` stay in float64, so a Newton
    #: solve still converges to the exact optimum.
    gram_precision: str = "double"

    def __post_init__(self):
        if self.gram_precision not in GRAM_PRECISIONS:
            raise SettingsError(f"gram_precision must be one of {GRAM_PRECISIONS} (got "
                             f"{self.gram_precision!r}); use 'double'")

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
    @property
    def _base(self) -> "Design":
        """The design whose caches this one uses (itself unless cut by :meth:`subset`)."""
        return self if self.root is None else self.root

    def _term_matrix(self, term: Term):
        """A term's block as CSR (cached on the base design): products run in compiled loops."""
        cache = self._base.__dict__.setdefault("_term_csr", {})
        m = cache.get(term.name)
        if m is None:
            m = cache[term.name] = term.block.tocsr()
        return m

    def linear_predictor(self, theta: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """``X beta`` (without offset) on all rows or on ``rows`` (index or boolean array)."""
        beta = self.beta(theta)
        if rows is None:
            eta = np.full(self.n_rows, beta[0])
            for t in self.terms:
                eta += self._term_matrix(t) @ beta[self.beta_slices[t.name]]
            return eta
        rows = np.asarray(rows)
        eta = None
        for t in self.terms:
            b = beta[self.beta_slices[t.name]]
            part = np.einsum("ij,ij->i", t.block.values[rows], b[t.block.columns[rows]])
            eta = part if eta is None else eta + part
        if eta is None:
            eta = np.zeros(np.arange(self.n_rows)[rows].size)
        return eta + beta[0]

    def linear_predictors(self, thetas: np.ndarray, dtype=np.float64) -> np.ndarray:
        """``X Z theta_j`` for several coefficient vectors at once (rows of ``thetas``).

        Returns an (n_rows, n_vectors) array of ``dtype`` (None: the plan's own, float32
        with ``gram_precision="single"``, which saves the cast). The products run over the
        compact rows of :meth:`weighted_gram`'s plan: one dense BLAS product per run of rows
        (and contiguous stretch of the design's compact columns), instead of a sparse pass
        per term; 20 vectors over 180,000 bins measured 2.5-3.3x faster than the sparse
        products (``benchmarks/bench_predictors.py``). The arithmetic is that of the plan:
        float32 with ``gram_precision="single"`` (relative error ~1e-7 of
        ``sum_j |x_ij beta_j|``), which suits increments such as Newton steps and
        derivatives; add them to a linear predictor from :meth:`linear_predictor` where
        the exact value matters.
        """
        thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
        plan = self._base._gram_plan(None)
        runs, width, spans = plan.layout_for(self)
        rows = plan.columns_by_row
        betas = (thetas @ self.Z.T).astype(rows.dtype)         # (m, n_beta)
        # In the plan's own dtype throughout: a float64 ``out=`` for float32 operands takes
        # numpy off BLAS (4x slower, measured); the scatter into row order casts.
        out_sorted = np.empty((plan.order.size, thetas.shape[0]), dtype=rows.dtype)
        buf = np.empty((width, GRAM_CHUNK_ROWS), dtype=rows.dtype)
        for r0, r1, _, cols in runs:
            b = np.ascontiguousarray(betas[:, cols].T)          # (width, m)
            for start in range(r0, r1, GRAM_CHUNK_ROWS):
                stop = min(start + GRAM_CHUNK_ROWS, r1)
                c = buf[:, :stop - start]
                for lo, hi, at in spans:
                    c[at:at + hi - lo] = rows[lo:hi, start:stop]
                np.matmul(c.T, b, out=out_sorted[start:stop])
        out = np.empty((self.n_rows, thetas.shape[0]), dtype=dtype or rows.dtype)
        out[plan.order] = out_sorted
        return out

    def linear_predictor_bounds(self, thetas: np.ndarray) -> np.ndarray:
        """Upper bounds on ``max_i |(X Z theta_j)_i|`` per row of ``thetas`` (no pass over bins).

        ``|x_i' beta| <= |beta_0| + sum_terms max_i ||x_i,term||_1 max|beta_term|``; each
        term's largest row sum of absolute values is computed once (cached on the base
        design). For B-spline terms (rows summing to 1) the bound is the intercept plus each
        term's largest coefficient.
        """
        thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
        cache = self._base.__dict__.setdefault("_row_l1_max", {})
        betas = thetas @ self.Z.T
        out = np.abs(betas[:, 0])
        for t in self.terms:
            if t.name not in cache:
                cache[t.name] = float(np.max(np.sum(np.abs(t.block.values), axis=1), initial=0.0))
            part = np.abs(betas[:, self.beta_slices[t.name]])
            out = out + cache[t.name] * np.max(part, axis=1, initial=0.0)
        return out

    def transpose_dot(self, r: np.ndarray) -> np.ndarray:
        """``Z' X' r`` for a vector ``r`` over all rows (zeros exclude rows)."""
        out = np.empty(self.n_beta)
        out[0] = np.sum(r)
        for t in self.terms:
            out[self.beta_slices[t.name]] = self._term_matrix(t).T @ r
        return self.Z.T @ out

    def transpose_dot_groups(self, r: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
        """``Z' X' r`` restricted to each group's rows, shape (n_groups, n_theta).

        ``r`` is laid out as a sparse (n_groups x n_rows) matrix with each row's value in its
        group's row (rows of a negative group are left out), and multiplied by each term's
        sparse block: one pass over the non-zeros, without a dense n x n_groups array (2x
        faster than multiplying a spread dense array, measured at 180,000 bins).
        """
        groups = np.asarray(groups)
        order, indptr = self._group_index(groups, n_groups)
        spread = sparse.csr_array((np.asarray(r, dtype=float)[order], order, indptr),
                                  shape=(n_groups, self.n_rows))
        out = np.empty((n_groups, self.n_beta))
        out[:, 0] = spread.sum(axis=1)
        for t in self.terms:
            out[:, self.beta_slices[t.name]] = (spread @ self._term_matrix(t)).toarray()
        return out @ self.Z

    def _group_index(self, groups: np.ndarray, n_groups: int) -> tuple[np.ndarray, np.ndarray]:
        """Rows sorted by group (negative groups left out) and each group's start: cached."""
        key = (hash(groups.tobytes()), int(n_groups))
        cache = self._base.__dict__.setdefault("_group_indexes", {})
        if key not in cache:
            if len(cache) >= 2:
                cache.pop(next(iter(cache)))
            order = np.argsort(groups, kind="stable")
            order = order[groups[order] >= 0]
            indptr = np.searchsorted(groups[order], np.arange(n_groups + 1))
            cache[key] = (order.astype(np.int64), indptr.astype(np.int64))
        return cache[key]

    @cached_property
    def _local_term(self) -> Term | None:
        """The term worth handling by row groups: the widest, if much wider than its support."""
        if not self.terms:
            return None
        widest = max(self.terms, key=lambda t: t.n_beta)
        q = widest.block.values.shape[1]
        return widest if widest.n_beta >= 3 * q else None

    def _gram_plan(self, groups: np.ndarray | None) -> "_GramPlan":
        key = None if groups is None else hash(np.asarray(groups).tobytes())
        cache = self.__dict__.setdefault("_gram_plans", {})
        if key not in cache:
            # A plan holds the rows in compact form; keep at most two (all rows, and the
            # folds of the environment being analysed, shared by all its cells and models).
            if len(cache) >= 2:
                cache.pop(next(iter(cache)))
            cache[key] = _GramPlan.build(self, groups, np.float32 if self.gram_precision
                                         == "single" else np.float64)
        return cache[key]

    def weighted_gram(self, w: np.ndarray, groups: np.ndarray | None = None,
                      n_groups: int | None = None) -> np.ndarray:
        """``Z' X' diag(w) X Z`` for non-negative weights ``w`` over all rows.

        Parameters
        ----------
        w : ndarray, shape (n_rows,)
            Non-negative weights (``mu`` for the Poisson Hessian).
        groups : ndarray of int, shape (n_rows,), optional
            Group of each row (e.g. its cross-validation fold; negative = left out). When
            given, one matrix per group is returned, shape (n_groups, n_theta, n_theta), at the
            cost of a single pass over the rows.
        n_groups : int, optional
            Number of groups (default ``groups.max() + 1``).

        Notes
        -----
        Only the products of non-zeros that can meet are formed. Rows are grouped (once per
        base design and grouping, cached) by the support of the widest term, e.g. the 4 x 4
        position functions that are non-zero in a bin: within a group that term occupies the
        same 16 columns, so each group's rows form a narrow dense matrix
        ``[1 | 16 local | other terms]`` (57 instead of 141 columns for the default
        five-variable design, a sixth of the multiply-adds). The grouped rows are kept in that
        compact layout with the plan (for 180,000 bins and 57 columns, 82 MB; at most two
        plans per base design). A sub-design (:meth:`subset`) uses its base design's plan and
        takes only its own columns of the compact rows; without the wide term its groups
        merge into one run per row group. Each run is accumulated in chunks of
        :data:`GRAM_CHUNK_ROWS` weighted rows with the BLAS symmetric rank-k update and
        added into its place in ``X' W X``; consecutive short runs (the fold-grouped plan
        has ~950 of ~150 rows) are weighted together, up to :data:`GRAM_BATCH_ROWS` rows.
        With ``gram_precision="single"`` the compact rows are kept and multiplied in float32
        (half the memory; X'WX relative error ~1e-8, bounded in
        ``reference_checks/test_single_precision_gram.py``).
        """
        plan = self._base._gram_plan(groups)
        runs, width, spans = plan.layout_for(self)
        n_out = 1 if groups is None else (int(np.max(groups)) + 1 if n_groups is None
                                          else int(n_groups))
        p = self.n_beta
        out = np.zeros((n_out, p, p))
        rows = plan.columns_by_row
        sw = np.sqrt(np.asarray(w, dtype=float)[plan.order]).astype(rows.dtype, copy=False)
        batch_buf = np.empty(width * GRAM_BATCH_ROWS, dtype=rows.dtype)
        chunk_buf = np.empty((width, GRAM_CHUNK_ROWS), dtype=rows.dtype)
        # Runs come sorted by group; each group's runs are accumulated in compact layout and
        # added into X'WX with one bincount over their flat positions (fancy-index adds run
        # by run were 44% of a fold-grouped pass, measured over 943 runs of ~190 rows).
        group_of = np.fromiter((r[2] for r in runs), dtype=np.int64, count=len(runs))
        cuts = np.flatnonzero(np.diff(group_of)) + 1
        for first, last in zip(np.concatenate([[0], cuts]), np.append(cuts, len(runs))):
            block = runs[first:last]
            pieces = np.zeros((len(block), width, width))
            for i, k in _batches(block, GRAM_BATCH_ROWS):
                # Consecutive short runs are weighted together, one multiply per column
                # range for the batch instead of one per run (a fold-grouped pass has ~950
                # runs of ~150 rows: 0.75-0.93x its time, same numbers to the last bit).
                _accumulate_runs(pieces[i:k], block[i:k], rows, sw, spans, batch_buf,
                                 chunk_buf)
            cols = np.stack([b[3] for b in block])                  # (runs, width)
            flat = (cols[:, :, None] * p + cols[:, None, :]).ravel()
            out[group_of[first]] += np.bincount(flat, weights=pieces.ravel(),
                                                minlength=p * p).reshape(p, p)
        out = self.Z.T @ out @ self.Z
        return out[0] if groups is None else out

    def row_quadratic_forms(self, m: np.ndarray) -> np.ndarray:
        """``h_i = x_i' Z m Z' x_i`` for every row ``x_i`` of ``X`` (e.g. leverages).

        Parameters
        ----------
        m : ndarray, shape (n_theta, n_theta)
            Symmetric matrix in the constrained parametrisation (e.g. ``(H + S)^{-1}``).

        Returns
        -------
        ndarray, shape (n_rows,)

        Notes
        -----
        Uses the compact rows of :meth:`weighted_gram`'s plan: within a run of rows sharing
        the local term's support, ``h = colsum(C * (M_run C))`` with ``C`` the run's compact
        rows and ``M_run`` the matching sub-matrix of ``Z m Z'``. One general matrix product
        per run, about twice the multiply-adds of a Gram pass; it replaces one Gram pass per
        smoothing parameter in the exact LAML gradient
        (:func:`encodex.fit.smoothing.laml_derivatives`), since ``tr(m Z'X' diag(v) X Z) =
        sum_i v_i h_i`` for any weights ``v``.
        """
        m_beta = self.Z @ np.asarray(m, dtype=float) @ self.Z.T
        plan = self._base._gram_plan(None)
        runs, width, spans = plan.layout_for(self)
        rows = plan.columns_by_row
        h_sorted = np.zeros(plan.order.size)
        buf = np.empty((width, GRAM_CHUNK_ROWS))
        for r0, r1, _, cols in runs:
            m_run = m_beta[np.ix_(cols, cols)]
            for start in range(r0, r1, GRAM_CHUNK_ROWS):
                stop = min(start + GRAM_CHUNK_ROWS, r1)
                c = buf[:, :stop - start]
                for lo, hi, at in spans:
                    c[at:at + hi - lo] = rows[lo:hi, start:stop]
                h_sorted[start:stop] = np.einsum("ij,ij->j", c, m_run @ c)
        h = np.zeros(self.n_rows)
        h[plan.order] = h_sorted
        return h

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
        terms = tuple(t for t in self.terms if t.name in names)
        base = self._base
        cache = base.__dict__.setdefault("_subsets", {})
        key = tuple(t.name for t in terms)
        if key not in cache:
            cache[key] = (base if key == base.names else
                          Design(self.n_rows, terms, root=base,
                                 gram_precision=base.gram_precision))
        return cache[key]

    def term(self, name: str) -> Term:
        for t in self.terms:
            if t.name == name:
                return t
        raise KeyError(name)


def build_design(covariates: Mapping[str, np.ndarray], bases: Mapping[str, Basis],
                 gram_precision: str = "double") -> Design:
    """Evaluate every basis on its covariate and constrain each term to sum to zero.

    Parameters
    ----------
    covariates : mapping of str to ndarray
        Covariate values on the bins to be modelled (all finite); ``position`` has shape
        (n, 2) in metres, angles are in radians.
    bases : mapping of str to Basis
        One basis per variable to include; terms are ordered canonically
        (:func:`encodex.variables.canonical_order`).
    gram_precision : {"double", "single"}
        Arithmetic of ``X' W X`` (:meth:`Design.weighted_gram`); every other product is
        float64.

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
        block = basis.evaluate(_term_values(covariates, name, basis))
        n = block.values.shape[0]
        if n_rows is None:
            n_rows = n
        elif n != n_rows:
            raise InputError(f"covariate '{name}' has {n} rows but others have {n_rows}")
        col_sums = np.bincount(block.columns.ravel(), weights=block.values.ravel(),
                               minlength=block.n_columns)
        # A term that cannot be confounded with the intercept (a direction difference curve)
        # keeps every column.
        z = (sum_to_zero_null_space(col_sums) if getattr(basis, "centred", True)
             else np.eye(block.n_columns))
        pens = tuple(z.T @ s @ z for s in basis.penalties())
        terms.append(Term(name, basis, block, z, pens))
    if n_rows is None:
        first = next(iter(covariates.values()), None)
        if first is None:
            raise InputError("no covariates given: cannot tell the number of bins")
        n_rows = len(first)
    return Design(int(n_rows), tuple(terms), gram_precision=gram_precision)


def _term_values(covariates, name, basis):
    """The covariate a basis is evaluated on: its own, or the columns it names in ``inputs``."""
    inputs = getattr(basis, "inputs", None)
    if not inputs:
        return covariates[name]
    missing = [v for v in inputs if v not in covariates]
    if missing:
        raise InputError(f"the term '{name}' needs the covariates {', '.join(missing)}; pass "
                         "them with the others")
    return np.column_stack([np.asarray(covariates[v], dtype=float) for v in inputs])


def _contiguous_spans(columns: np.ndarray) -> list[tuple[int, int, int]]:
    """Split increasing ``columns`` into ranges: ``(first, last + 1, position in columns)``."""
    cut = np.flatnonzero(np.diff(columns) != 1) + 1
    starts = np.concatenate([[0], cut])
    stops = np.append(cut, columns.size)
    return [(int(columns[a]), int(columns[b - 1]) + 1, int(a)) for a, b in zip(starts, stops)]


def _batches(runs: list, max_rows: int):
    """Split ``runs`` (consecutive ``(start, stop, ...)``) into ``(i, k)`` index ranges.

    Each range spans at most ``max_rows`` rows, or is a single longer run.
    """
    i = 0
    while i < len(runs):
        b0 = runs[i][0]
        k = i + 1
        while k < len(runs) and runs[k][1] - b0 <= max_rows:
            k += 1
        yield i, k
        i = k


def _accumulate_runs(pieces: np.ndarray, runs: list, rows: np.ndarray, sw: np.ndarray,
                     spans: list, batch_buf: np.ndarray, chunk_buf: np.ndarray) -> None:
    """Add each run's weighted compact ``C C'`` into its slice of ``pieces`` (in place).

    ``runs`` are consecutive in the plan's row order. When they span at most
    ``batch_buf.size / width`` rows they are weighted at once into ``batch_buf`` (flat, laid
    out as a (width, rows) array of exactly the batch's length); otherwise there is a single
    run, weighted chunk by chunk into ``chunk_buf`` (width, GRAM_CHUNK_ROWS). Either way a
    chunk's rows are contiguous with a row stride that is not a large power of two: a
    16384-float stride made the rank-k update of 4096-row chunks 1.1-1.3x slower here.
    """
    width = chunk_buf.shape[0]
    b0, b1 = runs[0][0], runs[-1][1]
    batched = (b1 - b0) * width <= batch_buf.size
    if batched:
        cw = batch_buf[:width * (b1 - b0)].reshape(width, b1 - b0)
        # Compact columns are stored as rows of a (width, n) array: a sub-design's columns
        # are a few contiguous ranges of them, weighted straight into place.
        for lo, hi, at in spans:
            np.multiply(rows[lo:hi, b0:b1], sw[b0:b1], out=cw[at:at + hi - lo])
    for g, (r0, r1, *_) in zip(pieces, runs):
        if not sw[r0:r1].any():
            continue
        for start in range(r0, r1, GRAM_CHUNK_ROWS):
            stop = min(start + GRAM_CHUNK_ROWS, r1)
            if batched:
                c = cw[:, start - b0:stop - b0]
            else:
                c = chunk_buf[:, :stop - start]
                for lo, hi, at in spans:
                    np.multiply(rows[lo:hi, start:stop], sw[start:stop],
                                out=c[at:at + hi - lo])
            # numpy recognises c @ c.T and calls the BLAS symmetric rank-k update (its
            # bundled BLAS measured 3x faster here than scipy.linalg.blas.dsyrk). In single
            # precision each chunk's update is float32 (1.7x faster) and the sum over chunks
            # float64, so rounding does not grow with the bins.
            g += c @ c.T


@dataclass(frozen=True)
class _GramPlan:
    """Row order and chunk layout used by :meth:`Design.weighted_gram` (see its notes).

    Attributes
    ----------
    order : ndarray
        Row permutation grouping rows by (group, support of the local term).
    starts, stops, group_ids : ndarray
        Runs of rows (in ``order``) sharing group and local support.
    columns : list of ndarray
        For each run, the beta column (of the base design) of every compact column.
    columns_by_row : ndarray, shape (width, n)
        The rows in ``order`` in the compact layout, stored transposed (one compact column
        per array row, so that a sub-design's columns are contiguous stretches): intercept,
        the local term's support, then every other term's columns (57 columns instead of
        141 for the default design).
    width : int
        Number of compact columns.
    local : str or None
        Name of the local term.
    compact_of : ndarray
        Compact column of every base-design beta column outside the local term (-1 inside).
    """

    order: np.ndarray
    starts: np.ndarray
    stops: np.ndarray
    group_ids: np.ndarray
    columns: list
    columns_by_row: np.ndarray
    width: int
    local: str | None
    compact_of: np.ndarray
    _layouts: dict = field(default_factory=dict, compare=False, repr=False)

    def layout_for(self, design: "Design"):
        """Runs and compact columns for ``design`` (the base design or a sub-design of it).

        Returns ``(runs, width, spans)``: ``runs`` a list of ``(start, stop, group, columns)``
        with ``columns`` the design's own beta column of each picked compact column, ``width``
        the number of picked compact columns and ``spans`` those columns as contiguous ranges
        (:func:`_contiguous_spans`). Cached per design.
        """
        key = design.names
        if key in self._layouts:
            return self._layouts[key]
        base = design._base
        to_own = np.full(base.n_beta, -1, dtype=np.intp)
        to_own[0] = 0
        for t in design.terms:
            to_own[base.beta_slices[t.name]] = np.arange(design.beta_slices[t.name].start,
                                                         design.beta_slices[t.name].stop)
        q = self.width - 1 - int(np.count_nonzero(self.compact_of >= 0))  # local slots
        has_local = self.local is not None and self.local in design.names
        others = [self.compact_of[base.beta_slices[t.name]] for t in design.terms
                  if t.name != self.local]
        picked = np.concatenate([[0], np.arange(1, 1 + q) if has_local else [], *others]
                                ).astype(np.intp)
        if has_local:
            runs = [(int(a), int(b), int(g), to_own[c[picked]])
                    for a, b, g, c in zip(self.starts, self.stops, self.group_ids, self.columns)]
        else:
            # Without the local term every run of a row group has the same columns: merge them.
            runs = []
            if self.starts.size:
                cut = np.flatnonzero(np.diff(self.group_ids)) + 1
                first = np.concatenate([[0], cut])
                last = np.append(cut, self.starts.size) - 1
                cols = to_own[self.columns[0][picked]]
                runs = [(int(self.starts[i]), int(self.stops[j]), int(self.group_ids[i]), cols)
                        for i, j in zip(first, last)]
        self._layouts[key] = (runs, int(picked.size), _contiguous_spans(picked))
        return self._layouts[key]

    @classmethod
    def build(cls, design: "Design", groups: np.ndarray | None,
              dtype=np.float64) -> "_GramPlan":
        n = design.n_rows
        local = design._local_term
        g = np.zeros(n, dtype=np.int64) if groups is None else np.asarray(groups, dtype=np.int64)
        if local is None:
            q = 0
            key = np.zeros(n, dtype=np.int64)
        else:
            q = local.block.values.shape[1]
            # Rows whose local term starts at the same column share all its columns.
            key = local.block.columns[:, 0].astype(np.int64)
        combined = g * (int(key.max()) + 1 if n else 1) + key
        order = np.argsort(combined, kind="stable")
        keep = g[order] >= 0
        order = order[keep]
        combined = combined[order]
        bounds = np.flatnonzero(np.diff(combined)) + 1
        starts = np.concatenate([[0], bounds]) if order.size else np.empty(0, dtype=np.intp)
        stops = np.append(starts[1:], order.size) if order.size else np.empty(0, dtype=np.intp)
        group_ids = g[order[starts]] if order.size else np.empty(0, dtype=np.int64)

        # Compact column of every non-zero: intercept 0, local slots 1..q, then the other
        # terms' columns in beta order.
        p = design.n_beta
        other_cols = np.ones(p, dtype=bool)
        if local is not None:
            other_cols[design.beta_slices[local.name]] = False
        other_cols[0] = False
        compact_of = np.full(p, -1, dtype=np.intp)
        compact_of[other_cols] = 1 + q + np.arange(int(other_cols.sum()))
        other_beta = np.flatnonzero(other_cols)
        width = 1 + q + other_beta.size
        # Filled one term at a time: the rows in every term's layout at once (n x 37 values
        # and columns, and their reordered copies) took ~240 MB above the plan at 180,000
        # bins, twice over when both workers start together.
        by_row = np.zeros((width, order.size), dtype=dtype)
        by_row[0] = 1.0
        at = np.arange(order.size)[:, None]
        for t in design.terms:
            values = t.block.values[order]
            if t is local:
                # The local term's k-th non-zero of a row goes to slot 1 + k.
                by_row[1:1 + q] = values.T
            else:
                cols = t.block.columns[order].astype(np.intp) + design.beta_slices[t.name].start
                by_row[compact_of[cols], at] = values
            del values
        if local is not None:
            # each run's local columns: those of its first row (all its rows share them)
            local_cols = local.block.columns[order[starts]].astype(np.intp)
            local_cols += design.beta_slices[local.name].start
            columns = [np.concatenate([[0], c, other_beta]) for c in local_cols]
        else:
            full = np.concatenate([[0], other_beta]).astype(np.intp)
            columns = [full] * len(starts)
        return cls(order, starts, stops, group_ids, columns, by_row, width,
                   None if local is None else local.name, compact_of)
