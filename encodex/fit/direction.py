"""Fitted rate along a track in each running direction, with bands.

With a direction term (:class:`encodex.design.bases.DirectionCurveBasis`) the log gain
along the track is ``f(x) + s d(x)``: the shared position curve plus or minus the difference
curve. Its standard error needs the covariance between the two terms' coefficients, which
:meth:`encodex.fit.PoissonFit.response` (one term at a time) does not combine.
"""

from __future__ import annotations

import numpy as np


def direction_curves(fit, n: int = 100) -> dict:
    """Log gain along the track in each running direction, with its standard error.

    Parameters
    ----------
    fit : encodex.fit.PoissonFit
        A fit holding the terms ``position`` (1-D track) and ``direction``.
    n : int
        Number of grid points along the track.

    Returns
    -------
    dict
        ``track__grid`` (n,) metres; ``track__log_modulation`` and ``track__se`` of shape (2, n):
        row 0 running towards larger positions (+1), row 1 the other way (-1). Empty when
        the fit lacks either term. Bands: ``log_modulation +- 1.96 se`` from the joint posterior
        covariance of both terms (Marra & Wood 2012, Scand. J. Stat. 39:53).
    """
    if "position" not in fit.names or "direction" not in fit.names:
        return {}
    tp, td = fit._layout("position"), fit._layout("direction")
    grid = tp.basis.grid(n)
    xp = tp.basis.evaluate(grid).toarray() @ tp.Z
    xd = td.basis.evaluate(grid).toarray() @ td.Z
    idx = np.concatenate([np.arange(tp.theta_slice.start, tp.theta_slice.stop),
                          np.arange(td.theta_slice.start, td.theta_slice.stop)])
    cov = fit.covariance[np.ix_(idx, idx)]
    th = fit.theta[idx]
    gains, ses = [], []
    for s in (1.0, -1.0):
        x = np.hstack([xp, s * xd])
        gains.append(x @ th)
        ses.append(np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", x, cov, x), 0.0)))
    return {"track__grid": grid, "track__log_modulation": np.array(gains),
            "track__se": np.array(ses)}
