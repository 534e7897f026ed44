"""Concurvity: how well each smooth term of an additive model is reproduced by the others.

Two variables that move together in a session (travelled distance and elapsed time when the
running speed barely varies; speed and position near the walls) give smooth terms whose
function spaces nearly overlap. A held-out test cannot then tell which of the two a cell
carries, and the label should say so instead of picking one.

Measures. Write a term as ``f_j = X_j b_j`` (its constrained columns) and split it into
``g_1``, its orthogonal projection on the column space of the other terms (intercept
included), and the rest. Each measure is a ratio ``||g_1||^2 / ||f_j||^2`` in [0, 1] (0: the
term is unrelated to the others; 1: it is exactly a combination of them):

* ``largest``: the largest value the ratio takes over every coefficient vector ``b_j``; the
  squared cosine of the smallest principal angle between the two column spaces (the largest
  squared canonical correlation). Between two single terms it is symmetric.
* ``average``: the ratio averaged over an orthonormal basis of the term's space (the mean
  squared canonical correlation), a fit-free summary of the overall overlap; it is the
  measure :func:`ambiguous_pairs` flags with (see :data:`DEFAULT_MEASURE`).
* ``fitted``: the ratio for the fitted coefficients of one cell, when they are given.

A variable may also be a function of several others together without being close to any
one of them: on a shuttle track with traversals as trials, the distance run since the
traversal began is the position in one running direction and the track length minus the
position in the other. :func:`ambiguous_combinations` measures a variable against the union
of the terms of a combination (``distance`` against ``position+direction``, ``time`` against
``distance+speed``) and :func:`ambiguity_flags` gathers both kinds of flag for a cell.

Everything is computed from the p x p Gram matrix ``Z' X' W X Z`` of the design
(:meth:`encodex.design.Design.weighted_gram`), never from the tall n x p design, so it costs
one pass over the bins whatever their number. The inner product is the plain sum over the
bins (``W = I``) unless weights are given (e.g. the fitted Poisson means, which measure the
overlap where the cell actually fires).

References
----------
Hastie, T. and Tibshirani, R. (1990). *Generalized Additive Models*, Chapman and Hall,
sec. 5.3 (concurvity as the non-linear analogue of collinearity).
The decomposition of a term into its projection on the other terms and a remainder, with
indices built on ``||g||^2 / ||f||^2``, is described in the documentation of the function
``concurvity`` of the R package mgcv (S. N. Wood; read in version 1.8-41). The
``largest`` and ``fitted`` ratios here are the same quantities under names of our own; the
``average`` ratio (mean squared canonical correlation, on an orthonormal basis of the term)
is ours and is not that package's third index, which divides Frobenius norms of the raw
bases. A section of Wood (2017), *Generalized Additive Models*, 2nd ed., was cited here from
memory before; it has not been checked and is no longer cited.
"""

from __future__ import annotations

import weakref
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

from encodex.errors import InputError, SettingsError
from encodex.variables import canonical_order

#: Default pairwise concurvity (``average`` measure, the larger of the two directions) at or
#: above which two variables are called inseparable. 0.8 means that, averaged over the
#: functions a term can represent, 80% of their energy is reproduced by a function of the
#: other variable, leaving a fifth for a held-out comparison to tell them apart. Measured on
#: the simulator (reference_checks/test_concurvity_reference.py, 300 s sessions): distance
#: and time since trial start reach 0.20-0.50 when speed varies between runs, stops and
#: trials (8-10 minute environments of the default simulation: 0.2-0.4), and 0.95-0.99 at a
#: nearly constant speed; every other pair of built-in variables stays below 0.45 in
#: environments of 5 minutes or more. The threshold sits between the two groups with a wide
#: margin on each side. Overlaps grow in short environments, where the trajectory covers
#: few distinct paths: in 2-minute environments pairs with position reach 0.55-0.65.
DEFAULT_THRESHOLD = 0.8

#: Measure used to flag pairs. The largest ratio is not usable for flagging: a basis function
#: at the top of both ranges is supported only by the last bins of the longest trial, where
#: the largest distance and the largest time coincide, so the largest ratio reaches 0.92-0.998
#: for distance and time even when speed varies (measured, same check); the average over the
#: term's space is not dominated by such thinly supported directions.
DEFAULT_MEASURE = "average"

#: Names of the measures of :func:`pairwise_concurvity`.
MEASURES = ("largest", "average")

#: Eigenvalues of a Gram block below this fraction of its largest are treated as zero
#: (basis functions with no data under them, or exact linear dependence).
_RANK_TOL = 1e-10


@dataclass(frozen=True)
class TermConcurvity:
    """Concurvity of one term against a set of other terms.

    Attributes
    ----------
    term : str
        The term measured.
    others : tuple of str
        The terms it is compared against (the intercept is always included with them).
    largest : float
        Largest ``||projection||^2 / ||f||^2`` over every function of the term, in [0, 1].
    average : float
        The same ratio averaged over an orthonormal basis of the term's space, in [0, 1].
    fitted : float
        The ratio for the fitted coefficients, NaN when no coefficients were given.
    """

    term: str
    others: tuple[str, ...]
    largest: float
    average: float
    fitted: float = float("nan")


def _whitener(g: np.ndarray) -> np.ndarray:
    """``W`` with ``W' g W = I`` on the numerical range of the symmetric PSD matrix ``g``."""
    d, u = np.linalg.eigh(0.5 * (g + g.T))
    top = float(d.max()) if d.size else 0.0
    keep = d > _RANK_TOL * max(top, 0.0)
    if top <= 0 or not keep.any():
        return np.zeros((g.shape[0], 0))
    return u[:, keep] / np.sqrt(d[keep])


#: Unweighted Gram matrices of the last few designs (by identity, through weak references):
#: the comparison stage asks for the flags of many cells of one environment, which share a
#: design, and the Gram matrix is the only costly step.
_GRAM_CACHE: dict[int, tuple[weakref.ref, np.ndarray]] = {}
_GRAM_CACHE_SIZE = 4


def _gram(design, weights) -> np.ndarray:
    n = design.n_rows
    if weights is None:
        hit = _GRAM_CACHE.get(id(design))
        if hit is not None and hit[0]() is design:
            return hit[1]
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (n,) or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError(
            f"weights must be {n} finite non-negative numbers (one per bin); got shape {w.shape}"
        )
    g = design.weighted_gram(w)
    if weights is None:
        g.setflags(write=False)
        while len(_GRAM_CACHE) >= _GRAM_CACHE_SIZE:
            _GRAM_CACHE.pop(next(iter(_GRAM_CACHE)))
        try:
            _GRAM_CACHE[id(design)] = (weakref.ref(design), g)
        except TypeError:
            pass  # an object without weak references is simply not cached
    return g


def _measure(gram, idx_j, idx_o, b=None):
    """largest, average, fitted ratios from the Gram matrix and two index sets (theta layout).

    Without ``b``, results on a cached unweighted Gram matrix are remembered with it: every
    cell of an environment asks for the same ones (~50 ms a cell of whitening and SVDs).
    """
    memo = _measure_memo(gram) if b is None else None
    key = (idx_j.tobytes(), idx_o.tobytes())
    if memo is not None and key in memo:
        return memo[key]
    out = _measure_now(gram, idx_j, idx_o, b)
    if memo is not None:
        memo[key] = out
    return out


#: Remembered ratios per cached unweighted Gram matrix (by identity, through weak references).
_MEASURE_MEMO: dict[int, tuple[weakref.ref, dict]] = {}


def _measure_memo(gram: np.ndarray) -> dict | None:
    """The memo of a cached, read-only unweighted Gram matrix (see :func:`_gram`), else None."""
    if gram.flags.writeable:
        return None
    hit = _MEASURE_MEMO.get(id(gram))
    if hit is not None and hit[0]() is gram:
        return hit[1]
    while len(_MEASURE_MEMO) >= _GRAM_CACHE_SIZE:
        _MEASURE_MEMO.pop(next(iter(_MEASURE_MEMO)))
    memo: dict = {}
    _MEASURE_MEMO[id(gram)] = (weakref.ref(gram), memo)
    return memo


def _measure_now(gram, idx_j, idx_o, b=None):
    gjj = gram[np.ix_(idx_j, idx_j)]
    goo = gram[np.ix_(idx_o, idx_o)]
    gjo = gram[np.ix_(idx_j, idx_o)]
    wj = _whitener(gjj)
    wo = _whitener(goo)
    if wj.shape[1] == 0:
        return np.nan, np.nan, np.nan
    if wo.shape[1] == 0:
        obs = 0.0 if b is not None else np.nan
        return 0.0, 0.0, obs
    c = wj.T @ gjo @ wo  # cross-Gram of two orthonormal bases: singular values = cosines
    s = np.linalg.svd(c, compute_uv=False)
    s = np.clip(s, 0.0, 1.0)
    largest = float(s[0] ** 2) if s.size else 0.0
    average = float(np.sum(s**2) / wj.shape[1])
    obs = np.nan
    if b is not None:
        b = np.asarray(b, dtype=float)
        norm2 = float(b @ gjj @ b)
        if norm2 > 0:
            proj = wo.T @ (gjo.T @ b)  # coordinates of the projection in the others' basis
            obs = float(min(max(proj @ proj / norm2, 0.0), 1.0))
    return largest, average, obs


def _check_terms(design, names, what):
    names = tuple(names)
    missing = [v for v in names if v not in design.names]
    if missing:
        raise SettingsError(
            f"{what} {', '.join(missing)} not in the design (terms: "
            f"{', '.join(design.names) or 'none'}); build the design with every variable"
        )
    return names


def concurvity(design, terms: Iterable[str] | None = None, coef: np.ndarray | None = None,
               weights: np.ndarray | None = None) -> dict[str, TermConcurvity]:
    """Concurvity of each term of a model given all its other terms.

    Parameters
    ----------
    design : encodex.design.Design
        Design holding at least the model's terms (extra terms are ignored).
    terms : iterable of str, optional
        The model's terms (a selected model); all terms of the design by default.
    coef : ndarray, optional
        Fitted constrained coefficients (``PoissonFit.coef``, theta layout of ``design``
        restricted to ``terms``, i.e. of ``design.subset(terms)``); gives ``fitted``.
    weights : ndarray, shape (n_rows,), optional
        Non-negative bin weights of the inner product (default: all ones).

    Returns
    -------
    dict
        term -> :class:`TermConcurvity` (``others`` = the model's other terms), in canonical
        order. A model with one term has concurvity 0 (only the intercept, to which every
        term is orthogonal by its sum-to-zero constraint).

    References
    ----------
    Wood, S. N. (2017). Generalized Additive Models, 2nd ed., CRC Press (concurvity).
    """
    terms = canonical_order(design.names if terms is None else terms)
    _check_terms(design, terms, "model terms")
    sub = design.subset(terms)  # for the coefficient layout only
    # The Gram matrix of the full design holds every sub-model's: each term keeps its
    # columns and constraint, so blocks are picked out by the full design's slices.
    gram = _gram(design, weights)
    if coef is not None:
        coef = np.asarray(coef, dtype=float).ravel()
        if coef.size != sub.n_theta:
            raise InputError(
                f"coef has {coef.size} values but the model {'+'.join(terms)} has "
                f"{sub.n_theta}; pass the fit of design.subset(terms)"
            )
    sl = design.theta_slices
    out = {}
    for t in terms:
        idx_j = np.arange(sl[t].start, sl[t].stop)
        others = tuple(o for o in terms if o != t)
        idx_o = np.concatenate([[0]] + [np.arange(sl[o].start, sl[o].stop) for o in others])
        b = None if coef is None else coef[sub.theta_slices[t]]
        largest, average, fitted = _measure(gram, idx_j, idx_o.astype(int), b)
        out[t] = TermConcurvity(t, others, largest, average, fitted)
    return out


def pairwise_concurvity(design, terms: Iterable[str] | None = None,
                        weights: np.ndarray | None = None,
                        measure: str = DEFAULT_MEASURE) -> dict[tuple[str, str], float]:
    """Concurvity of each term given one other term, for every ordered pair.

    Parameters
    ----------
    design : encodex.design.Design
    terms : iterable of str, optional
        Terms to compare; all terms of the design by default.
    weights : ndarray, optional
        Bin weights of the inner product (default ones).
    measure : {"average", "largest"}
        ``average`` (default; the measure used for flags) or ``largest`` (symmetric in the
        pair; ``average`` is symmetric only between terms with as many columns).

    Returns
    -------
    dict
        ``(a, b) -> concurvity of a given b`` (and the intercept), for every a != b.
    """
    if measure not in MEASURES:
        raise SettingsError(f"unknown concurvity measure {measure!r}; use 'average' or "
                            "'largest'")
    terms = canonical_order(design.names if terms is None else terms)
    _check_terms(design, terms, "terms")
    gram = _gram(design, weights)
    sl = design.theta_slices
    out = {}
    for a in terms:
        ia = np.arange(sl[a].start, sl[a].stop)
        for b in terms:
            if b == a:
                continue
            ib = np.concatenate([[0], np.arange(sl[b].start, sl[b].stop)]).astype(int)
            largest, average, _ = _measure(gram, ia, ib)
            out[(a, b)] = largest if measure == "largest" else average
    return out


def _as_design(design_or_covariates, variables, kinds):
    from encodex.design import Design, build_design, default_bases

    if isinstance(design_or_covariates, Design):
        return design_or_covariates
    if isinstance(design_or_covariates, Mapping):
        cov = design_or_covariates
        names = [v for v in cov if v in set(variables)] if variables else list(cov)
        rows = np.ones(len(np.asarray(cov[names[0]])), dtype=bool)
        for v in names:
            a = np.asarray(cov[v], dtype=float)
            rows &= np.isfinite(a.reshape(a.shape[0], -1)).all(axis=1)
        sub = {v: np.asarray(cov[v])[rows] for v in names}
        return build_design(sub, default_bases(sub, names, kinds=kinds))
    raise InputError(
        "ambiguous_pairs needs an encodex.design.Design or a mapping of covariates on the "
        f"bins; got {type(design_or_covariates).__name__}"
    )


def ambiguous_pairs(design, chosen: Iterable[str], threshold: float = DEFAULT_THRESHOLD,
                    weights: np.ndarray | None = None,
                    kinds: Mapping[str, str] | None = None,
                    measure: str = DEFAULT_MEASURE) -> dict[str, tuple[str, ...]]:
    """For each chosen variable, the other variables it cannot be told apart from.

    Two variables are inseparable when the pairwise concurvity of their terms
    (:func:`pairwise_concurvity`), the larger of its two directions, reaches ``threshold``:
    smooth functions of one are nearly smooth functions of the other on these bins, so a
    model comparison cannot say which of the two the cell carries.

    Parameters
    ----------
    design : encodex.design.Design or mapping of str to ndarray
        Design with every candidate variable of the environment, on its bins (the one the
        comparison stage already builds), or the covariates themselves (rows with a NaN in
        any of them are dropped and default bases are built; ``kinds`` gives the basis kind
        of user variables).
    chosen : iterable of str
        Variables of the selected model (may be empty).
    threshold : float
        Concurvity in (0, 1] at or above which a pair is flagged (default
        :data:`DEFAULT_THRESHOLD`, 0.8; see its comment for the reasoning).
    weights : ndarray, optional
        Bin weights of the inner product (default ones).
    kinds : mapping, optional
        Basis kinds of user variables, used only when covariates are given.
    measure : {"average", "largest"}
        Pairwise measure (default ``average``; see :data:`DEFAULT_MEASURE`).

    Returns
    -------
    dict
        chosen variable -> tuple of the other variables (chosen or not, canonical order)
        it is inseparable from; every chosen variable is a key, with ``()`` when none.
        The union, joined with ``";"``, fills the ``ambiguous_with`` column of cells.csv.

    Examples
    --------
    >>> flags = ambiguous_pairs(design_of_environment, ("distance",))
    >>> flags
    {'distance': ('time',)}
    """
    if not (np.isfinite(threshold) and 0 < threshold <= 1):
        raise SettingsError(f"threshold must lie in (0, 1], got {threshold}; default 0.8")
    chosen = canonical_order(chosen)
    if not isinstance(design, Mapping):
        d = _as_design(design, None, kinds)
    else:
        d = _as_design(design, tuple(design.keys()), kinds)
    _check_terms(d, chosen, "chosen variables")
    if not chosen:
        return {}
    pairs = pairwise_concurvity(d, weights=weights, measure=measure)
    out = {}
    for a in chosen:
        flagged = []
        for b in d.names:
            if b == a:
                continue
            c = max(pairs[(a, b)], pairs[(b, a)])
            if np.isfinite(c) and c >= threshold:
                flagged.append(b)
        out[a] = canonical_order(flagged)
    return out


#: Largest number of variables in a combination tested by :func:`ambiguous_combinations`
#: (not counting the variables a member brings along: direction brings position).
DEFAULT_COMBINATION_SIZE = 2


def _combination_name(combo) -> str:
    return "+".join(canonical_order(combo))


def _overlap(gram, sl, term: str, others) -> float:
    """Average ratio of one term against the union of other terms (intercept included)."""
    idx_j = np.arange(sl[term].start, sl[term].stop)
    idx_o = np.concatenate([[0]] + [np.arange(sl[o].start, sl[o].stop) for o in others])
    return _measure(gram, idx_j, idx_o.astype(int))[1]


def _combinations(names, exclude, size):
    """Complete combinations (requirements included) of 2..size names, none in ``exclude``."""
    import itertools

    from encodex.variables import is_complete, with_requirements

    pool = [v for v in names if v not in exclude]
    out = []
    for r in range(2, size + 1):
        for combo in itertools.combinations(pool, r):
            full = with_requirements(combo)
            if set(full) & set(exclude) or not set(full) <= set(names):
                continue
            if is_complete(full) and full not in out:
                out.append(full)
    return out


def ambiguous_combinations(design, chosen: Iterable[str], threshold: float = DEFAULT_THRESHOLD,
                           weights: np.ndarray | None = None,
                           size: int = DEFAULT_COMBINATION_SIZE) -> dict[str, tuple[str, ...]]:
    """Combinations of variables that a cell's variables cannot be told apart from.

    Two questions, with the ``average`` ratio (:func:`concurvity`) of a term against the union
    of the terms of a combination (the intercept included):

    * each chosen variable against every combination of 2..``size`` other variables of the
      design (with the variables they require, e.g. position for direction): distance run
      since a traversal began against ``position+direction`` on a shuttle track;
    * each variable not chosen against every such combination of the chosen ones: a cell
      labelled ``position+direction`` there may as well carry distance.

    A combination is reported only when the ratio reaches ``threshold`` and no single member
    of it (nor a smaller flagged combination) already reaches it alone: such pairs are
    :func:`ambiguous_pairs`' to report.

    Parameters
    ----------
    design : encodex.design.Design
        Design with every candidate variable of the environment, on its bins.
    chosen : iterable of str
        Variables of the selected model.
    threshold : float
        Ratio in (0, 1] at or above which a combination is flagged (default 0.8, as for
        pairs; see :data:`DEFAULT_THRESHOLD`).
    weights : ndarray, optional
        Bin weights of the inner product (default ones).
    size : int
        Largest number of variables in a combination (default 2).

    Returns
    -------
    dict
        A chosen variable -> names of the combinations it cannot be told apart from
        (``"position+direction"``), and a chosen combination's name -> the variables it
        cannot be told apart from; only keys with flags.

    Examples
    --------
    >>> ambiguous_combinations(shuttle_design, ("distance",))
    {'distance': ('position+direction',)}
    """
    if not (np.isfinite(threshold) and 0 < threshold <= 1):
        raise SettingsError(f"threshold must lie in (0, 1], got {threshold}; default 0.8")
    if int(size) < 2:
        raise SettingsError(f"size must be at least 2 variables, got {size}")
    chosen = canonical_order(chosen)
    _check_terms(design, chosen, "chosen variables")
    if not chosen:
        return {}
    names = design.names
    gram = _gram(design, weights)
    sl = design.theta_slices
    single = {(a, b): _overlap(gram, sl, a, (b,)) for a in names for b in names if a != b}

    def flagged_alone(a, combo):
        return any(max(single[(a, b)], single[(b, a)]) >= threshold for b in combo if b != a)

    out: dict[str, list[str]] = {}
    for a in chosen:
        hits: list[tuple[str, ...]] = []
        for combo in _combinations(names, (a,), int(size)):
            if flagged_alone(a, combo) or any(set(h) <= set(combo) for h in hits):
                continue
            if _overlap(gram, sl, a, combo) >= threshold:
                hits.append(combo)
        if hits:
            out[a] = [_combination_name(h) for h in hits]
    for combo in _combinations(chosen, (), int(size)):
        for b in names:
            if b in chosen or flagged_alone(b, combo):
                continue
            if _overlap(gram, sl, b, combo) >= threshold:
                out.setdefault(_combination_name(combo), []).append(b)
    return {k: tuple(v) for k, v in out.items()}


def ambiguity_flags(design, chosen: Iterable[str], threshold: float = DEFAULT_THRESHOLD,
                    weights: np.ndarray | None = None) -> tuple[str, ...]:
    """Everything a cell's variables cannot be told apart from: the ``ambiguous_with`` column.

    The union of :func:`ambiguous_pairs` (single variables, canonical order) and
    :func:`ambiguous_combinations` (combinations named ``"a+b"``, and single variables a
    chosen combination cannot be told apart from), without repeats.

    Parameters
    ----------
    design : encodex.design.Design
        Design with every candidate variable of the environment.
    chosen : iterable of str
        Variables of the selected model (empty: no flags).
    threshold : float
        See :data:`DEFAULT_THRESHOLD`.
    weights : ndarray, optional
        Bin weights of the inner product (default ones).

    Returns
    -------
    tuple of str
        E.g. ``("time",)`` or ``("position+direction",)``; joined with ``";"`` in cells.csv.
    """
    chosen = canonical_order(chosen)
    if not chosen:
        return ()
    pairs = ambiguous_pairs(design, chosen, threshold, weights)
    singles = set(v for vs in pairs.values() for v in vs)
    combos: list[str] = []
    for key, vs in ambiguous_combinations(design, chosen, threshold, weights).items():
        for v in vs:
            if "+" in v:
                combos.append(v)
            else:
                singles.add(v)
    return canonical_order(singles) + tuple(dict.fromkeys(combos))
