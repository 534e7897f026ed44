"""B-spline kernels: knot vectors, non-zero basis values, difference penalties.

Pure numpy; no I/O. A B-spline of degree ``k`` is non-zero on at most ``k + 1`` adjacent
knot intervals, so each evaluated row is stored compactly as ``k + 1`` values and the index of
the first non-zero function ("fixed non-zeros per row" storage).

References
----------
de Boor, C. (2001). *A Practical Guide to Splines*, revised ed., Springer (Cox-de Boor recursion).
Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with B-splines and penalties.
*Statistical Science* 11:89-121.
Wood, S. N. (2017). *Generalized Additive Models: An Introduction with R*, 2nd ed., CRC Press.
"""

from __future__ import annotations

import numpy as np


def uniform_knots(lo: float, hi: float, n_basis: int, degree: int) -> np.ndarray:
    """Equally spaced knot vector giving ``n_basis`` B-splines of ``degree`` on ``[lo, hi]``.

    The ``n_basis - degree`` intervals between ``lo`` and ``hi`` are equal and the knots extend
    ``degree`` equal steps beyond each end, as for P-splines (Eilers & Marx 1996).
    """
    n_intervals = n_basis - degree
    if n_intervals < 1:
        raise ValueError(f"n_basis ({n_basis}) must exceed the degree ({degree})")
    h = (hi - lo) / n_intervals
    return lo + h * np.arange(-degree, n_intervals + degree + 1, dtype=float)


def quantile_breaks(values: np.ndarray, n_intervals: int, even_share: float = 0.1) -> np.ndarray:
    """Interval ends for B-splines dense where ``values`` are dense.

    The ``n_intervals + 1`` breaks are equally spaced quantiles of ``values`` blended with
    even spacing over their range, ``(1 - even_share) * quantile + even_share * even``: the
    blend keeps every interval at least ``even_share`` times the even width long, so ties
    (e.g. many zeros) never give empty intervals.

    Parameters
    ----------
    values : ndarray
        Observed values (non-finite values are ignored).
    n_intervals : int
        Number of knot intervals (``n_basis - degree``).
    even_share : float
        Weight of even spacing in the blend, in (0, 1].

    Returns
    -------
    ndarray, shape (n_intervals + 1,)
        Strictly increasing breaks from the smallest to the largest value.

    Notes
    -----
    Knots placed evenly through the covariate's values (at its quantiles) are the usual
    choice for regression splines (Wood 2017, ch. 5, cubic regression splines; cited from
    memory); with a difference penalty on the coefficients (Eilers & Marx 1996) smoothness
    is then measured on the knot-index (roughly quantile) scale.
    """
    v = np.asarray(values, dtype=float).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0 or n_intervals < 1 or not 0 < even_share <= 1:
        raise ValueError("quantile_breaks needs finite values, n_intervals >= 1 and "
                         "0 < even_share <= 1")
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        raise ValueError("quantile_breaks needs at least two distinct values")
    share = np.linspace(0.0, 1.0, n_intervals + 1)
    breaks = (1.0 - even_share) * np.quantile(v, share) + even_share * (lo + share * (hi - lo))
    breaks[0], breaks[-1] = lo, hi
    return breaks


def breaks_knots(breaks: np.ndarray, degree: int) -> np.ndarray:
    """Knot vector from interval ends, extended ``degree`` steps beyond each end.

    The steps outside repeat the first and the last interval's width, as
    :func:`uniform_knots` does for even spacing.
    """
    b = np.asarray(breaks, dtype=float)
    steps = np.arange(1, degree + 1, dtype=float)
    return np.concatenate([b[0] - (b[1] - b[0]) * steps[::-1], b,
                           b[-1] + (b[-1] - b[-2]) * steps])


def bspline_nonzeros(x: np.ndarray, knots: np.ndarray, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Values of the ``degree + 1`` B-splines that are non-zero at each ``x``.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Points inside ``[knots[degree], knots[-degree - 1]]``.
    knots : ndarray
        Non-decreasing knot vector.
    degree : int
        Spline degree (3 for cubic).

    Returns
    -------
    values : ndarray, shape (n, degree + 1)
        ``values[i, a]`` is basis function ``first[i] + a`` evaluated at ``x[i]``.
    first : ndarray of int, shape (n,)
        Index of the first non-zero basis function at each point.

    Notes
    -----
    Cox-de Boor recursion carried out on all points at once (de Boor 2001, ch. IX); the
    rightmost point of the range belongs to the last interval.
    """
    x = np.asarray(x, dtype=float)
    t = np.asarray(knots, dtype=float)
    k = degree
    n_funcs = len(t) - k - 1
    # Interval index mu with t[mu] <= x < t[mu + 1], mu in [k, n_funcs - 1].
    mu = np.searchsorted(t, x, side="right") - 1
    mu = np.clip(mu, k, n_funcs - 1)
    values = np.zeros((x.size, k + 1))
    values[:, 0] = 1.0
    left = np.empty((x.size, k + 1))
    right = np.empty((x.size, k + 1))
    for j in range(1, k + 1):
        left[:, j] = x - t[mu + 1 - j]
        right[:, j] = t[mu + j] - x
        saved = np.zeros(x.size)
        for r in range(j):
            denom = right[:, r + 1] + left[:, j - r]
            temp = values[:, r] / denom
            values[:, r] = saved + right[:, r + 1] * temp
            saved = left[:, j - r] * temp
        values[:, j] = saved
    return values, mu - k


def difference_matrix(n: int, order: int, circular: bool = False) -> np.ndarray:
    """Matrix ``D`` of ``order``-th differences of ``n`` adjacent coefficients.

    With ``circular=True`` the differences wrap around (coefficient ``n - 1`` is adjacent to
    coefficient 0), which is the penalty of a periodic P-spline.
    """
    if circular:
        stencil = np.diff(np.eye(order + 1), order, axis=0)[0]  # e.g. [1, -2, 1]
        d = np.zeros((n, n))
        for i in range(n):
            for a, s in enumerate(stencil):
                d[i, (i + a) % n] += s
        return d
    return np.diff(np.eye(n), order, axis=0)


def difference_penalty(n: int, order: int, circular: bool = False) -> np.ndarray:
    """P-spline penalty ``D' D`` (Eilers & Marx 1996)."""
    d = difference_matrix(n, order, circular)
    return d.T @ d
