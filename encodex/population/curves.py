"""Arrays of a unit file that describe the chosen model's response terms (no I/O).

Every smooth term of the chosen model is saved generically (whatever its name: built-in,
user variable or nuisance term), with the keys listed in :data:`TERM_KEYS`:

* ``<term>__grid`` (planar: ``<term>__grid_x``, ``<term>__grid_y``), in the variable's unit;
* ``<term>__log_modulation``: natural log of the factor by which the term multiplies the rate
  at each grid point; each term sums to zero over the environment's bins (identifiability),
  so a factor of 1 is *not* the mean rate;
* ``<term>__se``: standard error of ``log_modulation`` (posterior, natural-log scale);
* ``<term>__baseline_hz``: the rate (Hz) that a factor of 1 stands for, defined as the model's
  rate averaged over the environment's bins with this term's own contribution removed, so
  that ``baseline_hz * exp(log_modulation(x))`` is the partial-dependence rate of the term
  (the model's rate at ``x`` averaged over the other terms' values as they occurred);
* 1-D terms whose covariate is known: ``<term>__edges`` (20 equal bins over the basis
  range), ``<term>__occupancy_s``, ``<term>__spikes`` and ``<term>__predicted_spikes``
  (model's expected spikes) per bin, for the empirical tuning curve and occupancy;
* with a position map: ``ratemap__predicted_spikes`` (the model's expected spikes per
  spatial bin, on the same bins as ``ratemap__spikes``).

References
----------
Friedman, J. H. (2001). Greedy function approximation: a gradient boosting machine. Annals of
Statistics 29:1189-1232 (partial dependence).
"""

from __future__ import annotations

import numpy as np

__all__ = ["TERM_KEYS", "CURVE_BINS", "response_arrays", "joint_baseline_hz"]

#: Suffixes of the per-term keys (after ``<term>__``).
TERM_KEYS = ("grid", "grid_x", "grid_y", "log_modulation", "se", "baseline_hz", "edges",
             "occupancy_s", "spikes", "predicted_spikes")
#: Bins of the empirical tuning curve of a 1-D term (over its basis range).
CURVE_BINS = 20


def _term_parts(fit, design) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Full linear predictor (exact, float64) and each term's contribution on every bin.

    The contributions come from one pass over the Gram plan's rows
    (:meth:`Design.linear_predictors`, in the plan's arithmetic: float32 rounding by default,
    far below what a curve shows); the full predictor, from which expected counts are
    summed, from the exact sparse product.
    """
    sub = design.subset(fit.names) if design.names != fit.names else design
    theta = np.asarray(fit.theta_for(sub), float)
    rows = []
    for name in fit.names:
        t = np.zeros_like(theta)
        s = sub.theta_slices[name]
        t[s] = theta[s]
        rows.append(t)
    parts = sub.linear_predictors(np.vstack(rows)) if rows else None
    return (sub.linear_predictor(theta),
            {n: parts[:, i] for i, n in enumerate(fit.names)})


def _binned(values, y, mu, bin_size, edges) -> dict[str, np.ndarray]:
    v = np.asarray(values, float)
    ok = np.isfinite(v)
    idx = np.clip(np.searchsorted(edges, v[ok], side="right") - 1, 0, edges.size - 2)
    nb = edges.size - 1
    return {"occupancy_s": np.bincount(idx, minlength=nb) * float(bin_size),
            "spikes": np.bincount(idx, weights=np.asarray(y, float)[ok], minlength=nb),
            "predicted_spikes": np.bincount(idx, weights=np.asarray(mu, float)[ok],
                                            minlength=nb)}


def response_arrays(fit, design, y: np.ndarray, bin_size: float, covariates: dict,
                    position_edges=None) -> dict[str, np.ndarray]:
    """Unit-file arrays of the chosen model's terms (see the module docstring for keys).

    Parameters
    ----------
    fit : encodex.fit.PoissonFit
        The chosen model fitted on all of the environment's bins.
    design : encodex.design.Design
        The environment's design (every candidate term) or the chosen model's own.
    y : ndarray
        Spike counts on the same bins.
    bin_size : float
        Seconds.
    covariates : dict
        Covariates on the same bins (for the binned occupancy of 1-D terms).
    position_edges : (ndarray, ndarray), optional
        Spatial bin edges (metres) of the occupancy map, for ``ratemap__predicted_spikes``.
    """
    out: dict[str, np.ndarray] = {}
    if not fit.names:
        return out
    eta, parts = _term_parts(fit, design)
    mu = np.exp(eta) * bin_size
    for name in fit.names:
        r = fit.response(name)
        if isinstance(r.grid, tuple):
            out[f"{name}__grid_x"], out[f"{name}__grid_y"] = r.grid
        else:
            out[f"{name}__grid"] = r.grid
        out[f"{name}__log_modulation"] = r.log_modulation
        out[f"{name}__se"] = r.se
        # mean over bins of exp(eta - f): the rate with this term's own effect taken out
        out[f"{name}__baseline_hz"] = np.asarray(float(np.mean(np.exp(eta - parts[name]))))
        v = covariates.get(name)
        basis = design.term(name).basis
        # a factor-by-curve term (track direction) is a curve over another covariate: its
        # own values (+1, -1) give no tuning curve to bin
        own = tuple(getattr(basis, "inputs", (name,))) in ((name,),)
        if v is not None and own and np.ndim(v) == 1 and not isinstance(r.grid, tuple):
            lo, hi = (float(b) for b in basis.range)
            edges = np.linspace(lo, hi, CURVE_BINS + 1)
            out[f"{name}__edges"] = edges
            for k, a in _binned(v, y, mu, bin_size, edges).items():
                out[f"{name}__{k}"] = a
    pos = covariates.get("position")
    if position_edges is not None and pos is not None:
        from encodex.classic import occupancy_map

        _, pred = occupancy_map(pos, mu, bin_size, *position_edges)
        out["ratemap__predicted_spikes"] = pred
    return out


def joint_baseline_hz(fit, design, names, bin_size: float | None = None) -> float:
    """The rate (Hz) that a joint curve of several terms is relative to.

    The mean over the environment's bins of ``exp(eta - sum of the named terms)``: the
    model's rate with those terms' own effects taken out, so that
    ``baseline * exp(f_1(x) + f_2(x) + ...)`` is their joint partial-dependence rate
    (Friedman 2001). Used for the per-direction curves along a track (position and
    direction together). ``bin_size`` is accepted for symmetry with
    :func:`response_arrays` and not needed (the linear predictor excludes the exposure).
    """
    eta, parts = _term_parts(fit, design)
    removed = sum(parts[n] for n in names if n in parts)
    return float(np.mean(np.exp(eta - removed)))
