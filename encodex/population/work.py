"""The unit of work of a population run: one cell in one environment.

Everything here runs inside a worker process (joblib loky, dask) or in the main process; it
only computes and returns plain data, it never writes files. Random streams are derived from
(seed, environment, unit, purpose) by :func:`stream`, never from the order in which workers
pick up the work, so results are identical whatever the number of jobs.
"""

from __future__ import annotations

import hashlib
import os
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from encodex.defaults import SIGNFLIP_TESTS
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
PURPOSE_GOODNESS = 3


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
    gram_precision : str
        Arithmetic of the design's X'WX (:func:`encodex.design.build_design`).
    knots : str
        Knot placement of the bases (:func:`encodex.design.default_bases`).
    clock : ndarray or None
        Seconds since the environment's first bin, per usable bin: the covariate of the slow
        drift term (:mod:`encodex.design.drift`); None when the drift term is off.
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
    gram_precision: str = "double"
    clock: np.ndarray | None = None
    knots: str = "quantile"

    @property
    def n_rows(self) -> int:
        return int(len(self.fold))


@dataclass(frozen=True)
class SpikeColumn:
    """One unit's spike counts on an environment's usable bins, kept by their non-zero bins.

    What a task carries to a worker instead of a bins-long int64 array: at a few Hz and
    20 ms bins about a tenth of the bins hold a spike, so this is ~10x fewer bytes to pickle,
    send and hold while the task waits (measured in benchmarks/RESULTS.md).

    Attributes
    ----------
    n_rows : int
        Number of bins.
    bins : ndarray of int32 or int64
        Bins with at least one spike, increasing.
    counts : ndarray of unsigned int
        Spike count of each of those bins (the narrowest type that holds the largest).
    """

    n_rows: int
    bins: np.ndarray
    counts: np.ndarray

    @classmethod
    def from_csc(cls, counts, j: int) -> "SpikeColumn":
        """Column ``j`` of a ``scipy.sparse`` CSC matrix of counts (bins x units)."""
        lo, hi = int(counts.indptr[j]), int(counts.indptr[j + 1])
        n = int(counts.shape[0])
        rows = np.asarray(counts.indices[lo:hi])
        vals = np.asarray(counts.data[lo:hi])
        keep = vals != 0
        rows, vals = rows[keep], vals[keep]
        order = np.argsort(rows, kind="stable")
        top = int(vals.max()) if vals.size else 0
        ctype = np.min_scalar_type(max(top, 0))
        if vals.size and (np.any(vals < 0) or np.any(vals != np.round(vals))):
            ctype = np.float64  # left for the fit stage to reject with its own message
        itype = np.int32 if n < 2**31 else np.int64
        return cls(n, rows[order].astype(itype), vals[order].astype(ctype))

    def toarray(self) -> np.ndarray:
        """Counts of every bin, int64 (n_rows,) (repeated bins are summed)."""
        out = np.zeros(self.n_rows, dtype=np.int64 if self.counts.dtype.kind == "u" else float)
        np.add.at(out, self.bins, self.counts)
        return out


_DESIGNS: OrderedDict = OrderedDict()


def environment_design(env: EnvironmentWork):
    """Design with every variable of the environment, built once per worker and reused."""
    if env.token in _DESIGNS:
        _DESIGNS.move_to_end(env.token)
        return _DESIGNS[env.token]
    from encodex.design import DRIFT_TERM, build_design, default_bases, drift_basis

    # a direction term is evaluated on the track position too (its factor-by-curve input)
    cov = {v: env.covariates[v] for v in set(env.variables) | ({"position"} & set(env.covariates))}
    bases = default_bases(cov, env.variables, sizes=dict(env.basis_sizes),
                          kinds=dict(env.kinds), knots=env.knots)
    if env.clock is not None:
        cov[DRIFT_TERM] = env.clock
        bases[DRIFT_TERM] = drift_basis(env.clock)
    design = build_design(cov, bases, gram_precision=env.gram_precision)
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
    from encodex.compare.goodness import GOODNESS_COLUMNS

    row.update({c: np.nan for c in GOODNESS_COLUMNS})
    return row


_WATCHING: list = []      # non-empty once this process has started its check


def watch_run_process(run_pid: int) -> bool:
    """In a worker started by the run ``run_pid``, exit when that process is gone.

    joblib's workers wait for work for as long as their parent lives; when the run is killed
    outright (``kill -9``, an out-of-memory kill) nothing tells them, and they stayed idle
    for hours holding their designs (~400 MB each at 60 min). Called as the workers'
    initializer (``encodex.population.run``), so that a worker that has not yet been given
    a cell is covered too. A worker whose run died while it was starting exits at once; one
    whose parent is ``run_pid`` checks once a second from a daemon thread whether its
    parent is still that process, and exits if not. Anywhere else (a process whose parent is
    another, live one; Windows, where signal 0 would terminate the process it is sent to)
    it does nothing. Returns whether this call started the check.
    """
    if _WATCHING or os.name != "posix":
        return False
    if os.getppid() != run_pid:
        try:
            os.kill(run_pid, 0)             # signal 0: only asks whether the process exists
        except ProcessLookupError:
            os._exit(0)                     # the run died before this worker was ready
        except PermissionError:
            pass
        return False
    _WATCHING.append(True)

    def watch():
        while os.getppid() == run_pid:
            time.sleep(1.0)
        os._exit(0)

    threading.Thread(target=watch, name="encodex-run-watch", daemon=True).start()
    return True


def analyse_unit(env: EnvironmentWork, unit: str, y: np.ndarray,
                 settings: RunSettings) -> UnitOutcome:
    """Analyse one cell in one environment (runs in a worker; limits BLAS to one thread)."""
    from threadpoolctl import threadpool_limits

    # CPU time of this (single-threaded) worker: a fair cost even on a busy machine.
    start = time.process_time()
    y = y.toarray() if isinstance(y, SpikeColumn) else np.asarray(y)
    with threadpool_limits(limits=1):
        outcome = _analyse(env, unit, y, settings)
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

    from encodex.design import DRIFT_TERM

    design = environment_design(env)
    offset = np.full(env.n_rows, np.log(env.bin_size))
    folds = Folds(env.fold, env.k)
    min_shift = int(np.ceil(settings.min_shift_s / env.bin_size))
    a = analyse_cell(
        design, y, offset, folds, env.variables, alpha=settings.alpha,
        exhaustive=settings.exhaustive, correction=settings.correction,
        min_step_gain=settings.min_step_gain,
        shuffles=settings.shuffles, min_shift_bins=min_shift,
        rng=stream(settings.seed, env.name, unit, PURPOSE_SHUFFLES),
        fold_fits=settings.fold_fits,
        goodness_rng=stream(settings.seed, env.name, unit, PURPOSE_GOODNESS),
        nuisance=(DRIFT_TERM,) if env.clock is not None else (),
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
        selection_path=selection_path(sel.steps, settings.alpha, settings.correction),
        tied_with=";".join(sel.ambiguous_with),
    )
    if a.goodness is not None:
        row.update(a.goodness.row())
        arrays.update(a.goodness.arrays())
    # the chosen model's terms (the drift-only model's for "none"), keys in one place
    # (encodex.population.curves)
    fit = a.final_fit if a.final_fit is not None else a.baseline_fit
    if fit is not None:
        from encodex.population.curves import response_arrays

        cov = dict(env.covariates)
        if env.clock is not None:
            cov[DRIFT_TERM] = env.clock
        arrays.update(response_arrays(
            fit, design, y, env.bin_size, cov,
            None if env.edges_x is None else (env.edges_x, env.edges_y)))
        from encodex.fit.direction import direction_curves
        from encodex.population.curves import joint_baseline_hz

        track = direction_curves(fit)
        if track:
            track["track__baseline_hz"] = np.asarray(joint_baseline_hz(
                fit, design, ("position", "direction"), env.bin_size))
        arrays.update(track)
    if settings.shuffles:
        arrays["shuffle__null_bits_per_spike"] = a.shuffle_null
    return {"cell": row, "models": model_rows(a.models)}, arrays, a.final_fit


def selection_path(steps, alpha: float, correction: str) -> str:
    """The forward steps as text: ``+position(p=0.002<=0.05) > xspeed(p=0.0244>0.0167)``.

    A step whose test passed but whose mean improvement (bits per spike) fell short of the
    effect-size floor is written ``xheading(p=0.009<=0.05)[gain 0.00075<0.0078]``.

    ``+`` a variable was added, ``x`` the step's best candidate was rejected; each p-value is
    shown against the level its step was tested at (the step's own record; for steps written
    before steps recorded it: alpha, divided by the step's number of candidates under the
    Bonferroni correction). The sign says how the p-value compared with the level under the
    step test's own rule (``<=`` for the sign-flip test, ``<`` for the Wilcoxon rules).
    """
    out = []
    for s in steps:
        level = getattr(s, "level", float("nan"))
        if not np.isfinite(level):
            level = alpha / max(1, len(s.candidates)) if correction == "bonferroni" else alpha
        if correction in SIGNFLIP_TESTS:
            sign = "<=" if s.p_value <= level else ">"
        else:
            sign = "<" if s.p_value < level else ">="
        text = (f"{'+' if s.accepted else 'x'}{label(set(s.best) - set(s.base))}"
                f"(p={s.p_value:.3g}{sign}{level:.3g})")
        passed = s.p_value <= level if correction in SIGNFLIP_TESTS else s.p_value < level
        if passed and not s.accepted:  # refused by the effect-size floor
            text += f"[gain {s.mean_improvement:.3g}<{getattr(s, 'min_gain', 0.0):.3g}]"
        out.append(text)
    return " > ".join(out)


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
