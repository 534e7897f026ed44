"""Slow drift of a cell's rate over a session, as a nuisance term of every model.

Why: a cell's rate can change slowly over a recording (electrode drift, changing arousal,
plasticity) while behaviour also changes (the animal slows down, covers the arena
differently). Without a term for it, a variable that changes over the session explains part
of the drift and is added to untuned cells, or added to tuned cells as an extra. The drift
term is a smooth function of time on the environment's own clock (seconds since the first
bin of the environment, not the trial clock), a cubic P-spline with a second-order
difference penalty whose smoothness is selected with the other terms. It is in every model,
the baseline included: the baseline becomes the drift-only model, and held-out gains are
relative to it.

Basis size: one basis function per :data:`DRIFT_SPACING_S` of environment plus three, between
:data:`DRIFT_MIN_BASIS` and :data:`DRIFT_MAX_BASIS` (e.g. 30 min: 9 functions, knots 5 min
apart). Knots this far apart cannot follow behaviour that changes within a trial or a run
(seconds to a minute), so the term does not compete with the behavioural variables; the
penalty shrinks it to a straight line in log rate when the data show no curvature.
"""

from __future__ import annotations

import numpy as np

from encodex.errors import InputError

from .bases import IntervalBasis

#: Name of the drift term in designs, fits and unit files (reserved: not a variable name).
DRIFT_TERM = "drift"
#: Seconds of environment per basis function of the drift term.
DRIFT_SPACING_S = 300.0
DRIFT_MIN_BASIS = 4
DRIFT_MAX_BASIS = 12


def drift_basis_size(duration_s: float, spacing_s: float = DRIFT_SPACING_S) -> int:
    """Number of cubic B-splines of the drift term for an environment of ``duration_s`` s."""
    n = int(round(float(duration_s) / spacing_s)) + 3
    return int(np.clip(n, DRIFT_MIN_BASIS, DRIFT_MAX_BASIS))


def drift_basis(clock_s: np.ndarray, spacing_s: float = DRIFT_SPACING_S) -> IntervalBasis:
    """P-spline basis of the drift term over the range of the environment's clock.

    Parameters
    ----------
    clock_s : ndarray, shape (n_rows,)
        Time of each usable bin on the environment's clock, seconds.
    spacing_s : float
        Seconds of environment per basis function (the default is the one measured in
        ``benchmarks/drift_basis_size.py``; other values are for such studies).

    Returns
    -------
    IntervalBasis
        Cubic B-splines with a second-order difference penalty (Eilers & Marx 1996,
        Statistical Science 11:89), :func:`drift_basis_size` functions over the clock's range.
    """
    t = np.asarray(clock_s, dtype=float)
    t = t[np.isfinite(t)]
    if t.size < 2 or not t.max() > t.min():
        raise InputError("the environment's clock does not advance; cannot model slow drift "
                         "(switch it off with --no-drift)")
    lo, hi = float(t.min()), float(t.max())
    return IntervalBasis(drift_basis_size(hi - lo, spacing_s), (lo, hi))
