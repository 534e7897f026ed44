"""The unit of work of a population run: one cell in one environment.

Everything here runs inside a worker process (joblib loky, dask) or in the main process; it
only computes and returns plain data, it never writes files. Random streams are derived from
(seed, environment, unit, purpose) by :func:`stream`, never from the order in which workers
pick up the work, so results are identical whatever the number of jobs.
"""

from __future__ import annotations

import hashlib
import time
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from encodex.population.settings import RunSettings
from encodex.variables import VARIABLES, canonical_order, label

#: Status of a cell whose label is a statistical statement.
STATUS_OK = "ok"
STATUS_FEW_SPIKES = "too few spikes"
STATUS_NO_VARIABLES = "no variables"
STATUS_FEW_BINS = "too few bins"
STATUS_ERROR = "error"

#: Streams of randomness, one purpose each.
PURPOSE_FOLDS = 1
PURPOSE_SHUFFLES = 2


def _h(text: str) -> int:
    return int.from_bytes(hashlib.sha256(str(text).encode()).digest()[:4], "little")


def stream(seed: int, environment: str, unit: str | None, purpose: int) -> np.random.Generator:
    """Random generator for one purpose, derived only from (seed, environment, unit)."""
    key = (_h(environment), _h("" if unit is None else unit), int(purpose))
    return np.random.default_rng(np.random.SeedSequence(entropy=int(seed), spawn_key=key))


@dataclass(frozen=True)
class EnvironmentWork:
    """What every worker needs to know about one environment (shared by its cells).

    Attributes
    ----------
    name : str
        Environment name.
    token : str
        Identity of (data, settings) used to cache the design inside a worker.
    covariates : dict of str to ndarray
        Covariates on the environment's usable bins (time order).
    variables : tuple of str
        Variables analysed in this environment.
    bin_size : float
        Seconds.
    fold : ndarray of int
        Fold of each usable bin.
    k : int
        Number of folds.
    basis_sizes : tuple of (str, int)
    kinds : tuple of (str, str)
        Basis kind of every variable (user-defined variables included).
    edges_x, edges_y : ndarray or None
        Spatial bins of the occupancy map (metres), None without position.
    note : str
        Why the environment cannot be analysed ("" when it can).
    """

    name: str
    token: str
    covariates: dict
    variables: tuple
    bin_size: float
    fold: np.ndarray
    k: int
    basis_sizes: tuple
    kinds: tuple
    edges_x: np.ndarray | None
    edges_y: np.ndarray | None
    note: str = ""

    @property
    def n_rows(self) -> int:
        return int(len(self.fold))


_DESIGNS: OrderedDict = OrderedDict()


def environment_design(env: EnvironmentWork):
    """Design with every variable of the environment, built once per worker and reused."""
    if env.token in _DESIGNS:
        _DESIGNS.move_to_end(env.token)
        return _DESIGNS[env.token]
    from encodex.design import build_design, default_bases

    # a direction term is evaluated on the track position too (its factor-by-curve input)
    cov = {v: env.covariates[v] for v in set(env.variables) | ({"position"} & set(env.covariates))}
    bases = default_bases(cov, env.variables, sizes=dict(env.basis_sizes),
                          kinds=dict(env.kinds))
    design = build_design(cov, bases)
    _DESIGNS[env.token] = design
    while len(_DESIGNS) > 2:
        _DESIGNS.popitem(last=False)
    return design


@dataclass(frozen=True)
class UnitOutcome:
    """Plain result of one cell in one environment."""

    environment: str
    unit: str
    record: dict
    arrays: dict
    fit: object | None
    seconds: float


def empty_cell_row(unit: str, environment: str, n_spikes: int, rate: float, status: str,
                   reason: str) -> dict:
    """A cells.csv row of a cell that was not (or could not be) labelled."""
    row = {
        "unit": unit, "environment": environment, "n_spikes": int(n_spikes),
        "mean_rate_hz": rate, "status": status, "reason": reason, "variables": "",
        "bits_per_spike": np.nan, "p_value": np.nan,
    }
    for v in VARIABLES:
        row[f"gain_{v}"] = np.nan
    row.update(shuffle_p=np.nan, ambiguous_with="", pseudo_r2=np.nan,
               deviance_explained=np.nan, selection_path="", tied_with="")
    return row


def analyse_unit(env: EnvironmentWork, unit: str, y: np.ndarray,
                 settings: RunSettings) -> UnitOutcome:
    """Analyse one cell in one environment (runs in a worker; limits BLAS to one thread)."""
    from threadpoolctl import threadpool_limits

    # CPU time of this (single-threaded) worker: a fair cost even on a busy machine.
    start = time.process_time()
    with threadpool_limits(limits=1):
        outcome = _analyse(env, unit, np.asarray(y), settings)
    rec, arrays, fit = outcome
    return UnitOutcome(env.name, unit, rec, arrays, fit, time.process_time() - start)


def _analyse(env: EnvironmentWork, unit: str, y: np.ndarray, settings: RunSettings):
    n_spikes = int(y.sum())
    duration = env.n_rows * env.bin_size
    rate = n_spikes / duration if duration > 0 else np.nan
    arrays = _ratemap(env, y)
    if env.note:
        row = empty_cell_row(unit, env.name, n_spikes, rate, STATUS_FEW_BINS
                             if "bins" in env.note else STATUS_NO_VARIABLES, env.note)
        return {"cell": row, "models": []}, arrays, None
    if n_spikes < settings.min_spikes:
        row = empty_cell_row(
            unit, env.name, n_spikes, rate, STATUS_FEW_SPIKES,
            f"{n_spikes} spikes in this environment, fewer than the {settings.min_spikes} "
            "required; not labelled",
        )
        return {"cell": row, "models": []}, arrays, None
    try:
        return _analyse_cell(env, unit, y, settings, n_spikes, rate, arrays)
    except Exception as exc:  # one failing cell must not stop a population run
        msg = " ".join(f"{type(exc).__name__}: {exc}".split())
        row = empty_cell_row(unit, env.name, n_spikes, rate, STATUS_ERROR, msg)
        return {"cell": row, "models": []}, arrays, None


def _analyse_cell(env, unit, y, settings, n_spikes, rate, arrays):
    from encodex.compare.cell import analyse_cell, model_rows
    from encodex.compare.folds import Folds

    design = environment_design(env)
    offset = np.full(env.n_rows, np.log(env.bin_size))
    folds = Folds(env.fold, env.k)
    min_shift = int(np.ceil(settings.min_shift_s / env.bin_size))
    a = analyse_cell(
        design, y, offset, folds, env.variables, alpha=settings.alpha,
        exhaustive=settings.exhaustive, correction=settings.correction,
        shuffles=settings.shuffles, min_shift_bins=min_shift,
        rng=stream(settings.seed, env.name, unit, PURPOSE_SHUFFLES),
        fold_fits=settings.fold_fits,
    )
    sel = a.selection
    chosen_cv = a.models[sel.chosen]
    row = {
        "unit": unit, "environment": env.name, "n_spikes": n_spikes, "mean_rate_hz": rate,
        "status": STATUS_OK, "reason": "; ".join(a.notes), "variables": sel.label,
        "bits_per_spike": chosen_cv.pooled.bits_per_spike if sel.chosen else 0.0,
        "p_value": sel.p_value,
    }
    for v in canonical_order(set(VARIABLES) | set(env.variables)):
        row[f"gain_{v}"] = sel.gains.get(v, np.nan)
    # Concurvity flags (encodex.compare.concurvity): variables the chosen ones cannot be told
    # apart from on this environment's bins, whatever the spikes.
    from encodex.compare.concurvity import ambiguity_flags

    flagged = ambiguity_flags(design, sel.chosen)
    row.update(
        shuffle_p=a.shuffle_p,
        ambiguous_with=";".join(flagged),
        pseudo_r2=chosen_cv.pooled.pseudo_r2 if sel.chosen else 0.0,
        deviance_explained=chosen_cv.pooled.deviance_explained if sel.chosen else 0.0,
        selection_path=" > ".join(
            f"{'+' if s.accepted else 'x'}{label(set(s.best) - set(s.base))}(p={s.p_value:.3g})"
            for s in sel.steps
        ),
        tied_with=";".join(sel.ambiguous_with),
    )
    if a.final_fit is not None:
        arrays.update(_responses(a.final_fit))
        from encodex.fit.direction import direction_curves

        arrays.update(direction_curves(a.final_fit))
    if settings.shuffles:
        arrays["shuffle__null_bits_per_spike"] = a.shuffle_null
    return {"cell": row, "models": model_rows(a.models)}, arrays, a.final_fit


def _responses(fit) -> dict:
    out = {}
    for name in fit.names:
        r = fit.response(name)
        if isinstance(r.grid, tuple):
            out[f"{name}__grid_x"], out[f"{name}__grid_y"] = r.grid
        else:
            out[f"{name}__grid"] = r.grid
        out[f"{name}__log_gain"] = r.log_gain
        out[f"{name}__se"] = r.se
    return out


def _ratemap(env: EnvironmentWork, y: np.ndarray) -> dict:
    if "position" in env.covariates and np.ndim(env.covariates["position"]) == 1:
        from encodex.track_maps import track_arrays  # position along a track

        return track_arrays(env.covariates, y, env.bin_size, dict(env.kinds))
    if env.edges_x is None or "position" not in env.covariates:
        return {}
    from encodex.classic import occupancy_map

    occ, spk = occupancy_map(env.covariates["position"], y, env.bin_size, env.edges_x,
                             env.edges_y)
    return {"ratemap__occupancy_s": occ, "ratemap__spikes": spk,
            "ratemap__edges_x": env.edges_x, "ratemap__edges_y": env.edges_y}
