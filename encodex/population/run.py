"""Population runs: every cell of every environment, in parallel, with checkpoints.

One call from Python (:func:`run_population`) and the ``encodex fit`` command share this code.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import time
import warnings
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from encodex.compare.folds import chunked_folds
from encodex.compare.goodness import GOODNESS_COLUMNS, GOODNESS_STATEMENT
from encodex.compare.selection import describe_test, smallest_p
from encodex.defaults import SIGNFLIP_TESTS
from encodex.errors import InputError, SettingsError
from encodex.fit.smoothing import CRITERION_STATEMENT
from encodex.population.allocator import heap_settings_plugin
from encodex.population.checkpoint import (
    atomic_write_text, check_output_folder, data_fingerprint, open_checkpoint, read_unit_record,
    unit_path, write_unit_file,
)
from encodex.population.settings import RunSettings, stable_hash
from encodex.population.summary import session_summary
from encodex.population.work import (
    PURPOSE_FOLDS, EnvironmentWork, SpikeColumn, UnitOutcome, analyse_unit, environment_design,
    stream, watch_run_process,
)
from encodex.variables import VARIABLES, canonical_order

#: Columns of cells.csv: the contract of DEVELOPERS.md first, then extra columns.
CELL_COLUMNS = (
    "unit", "environment", "n_spikes", "mean_rate_hz", "status", "reason", "variables",
    "bits_per_spike", "p_value", *(f"gain_{v}" for v in VARIABLES), "shuffle_p",
    "ambiguous_with", "pseudo_r2", "deviance_explained", "selection_path", "tied_with",
    *GOODNESS_COLUMNS,
)
MODEL_COLUMNS = (
    "unit", "environment", "model", "fold", "n_spikes_test", "loglik_test", "bits_per_spike",
    "pseudo_r2", "deviance_explained",
)

DRIFT_STATEMENT = (
    "every model, the baseline included, holds a smooth of time on the environment's clock "
    "(cubic P-spline, one basis function per 300 s of environment plus three, 4 to 12, "
    "second-order difference penalty, smoothness selected with the other terms); gains and "
    "bits per spike are relative to the drift-only model"
)

LABEL_STATEMENT = (
    "A label (column 'variables') is a statistical statement about this session's recorded "
    "behaviour: adding each listed variable improved held-out prediction of the spike counts "
    "across cross-validation folds (the step test of run.json, methods.selection, at the "
    "stated alpha). "
    "It is not proof that the cell encodes the variable mechanistically: correlated "
    "behaviour, unmodelled variables or limited sampling can produce or hide a label."
)

SMOOTHNESS_STATEMENTS = {
    "refit": (
        "Smoothing parameters are selected by LAML on the training bins of each fold, "
        "separately for every model (warm-started from the previous fold's fit of the same "
        "model); held-out bins are never used to tune them. Response curves come from the "
        "chosen model refitted on all usable bins of the environment."
    ),
    "one-step": (
        "Smoothing parameters are selected by LAML once per cell and model, on all usable "
        "bins of the environment; each fold's model is one Newton step from that fit with the "
        "fold's bins removed, so its held-out bins reach it only through that starting point "
        "(a second-order effect) and the smoothing parameters "
        "(reference_checks/test_one_step_folds.py bounds the effect "
        "against exact refits; use fold_fits='refit' for the strict version). Response curves "
        "come from the chosen model's all-bins fit."
    ),
}

FOLD_STATEMENT = (
    "Each environment's usable bins, in time order, are cut into folds x chunks_per_fold "
    "contiguous chunks of equal size, dealt to the folds by a permutation drawn from "
    "(seed, environment); every model of every cell is scored on the same folds. Chunks "
    "are much longer than the autocorrelation of behaviour and spiking, so held-out bins "
    "are not near-copies of training bins."
)


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C during a run: finished units are saved; ``message`` says how to resume."""

    def __init__(self, message: str):
        super().__init__(message)
        self.message = message


@dataclass
class PopulationResult:
    """Results of a population run.

    Attributes
    ----------
    cells : DataFrame
        One row per unit and environment (columns as ``cells.csv``).
    models : DataFrame
        One row per unit, environment, model and fold (columns as ``models.csv``).
    run : dict
        Settings, versions, timings and session counts (as ``run.json``).
    fits : Mapping
        ``fits[(environment, unit)]`` is the chosen model refitted on all usable bins
        (:class:`encodex.fit.PoissonFit`, with ``.response(variable)`` for plotting); only
        cells with status "ok" and a label other than "none" have one. Fits of units read
        back from a checkpoint are recomputed on first access.
    out : Path or None
        Output folder, if any.
    """

    cells: pd.DataFrame
    models: pd.DataFrame
    run: dict
    fits: Mapping
    out: Path | None = None

    def label(self, unit: str, environment: str | None = None) -> str:
        """Label of a unit (in the only environment, or the one named)."""
        c = self.cells[self.cells["unit"] == str(unit)]
        if environment is not None:
            c = c[c["environment"] == str(environment)]
        if len(c) != 1:
            raise SettingsError(f"unit {unit!r} has {len(c)} rows; name the environment")
        return str(c["variables"].iloc[0])


class _Fits(Mapping):
    """Chosen-model fits: those computed in this call, others refitted lazily."""

    def __init__(self, known: dict, envs: dict, session, cells: pd.DataFrame):
        self._known = dict(known)
        self._envs = envs
        self._session = session
        ok = cells[(cells["status"] == "ok") & (cells["variables"] != "none")
                   & (cells["variables"] != "")]
        self._labels = {(e, u): lab for e, u, lab in
                        zip(ok["environment"], ok["unit"], ok["variables"])}

    def __getitem__(self, key):
        if key not in self._labels:
            raise KeyError(f"no fitted model for {key!r}: give (environment, unit) of a cell "
                           "with status 'ok' and a label other than 'none'")
        if key not in self._known:
            from threadpoolctl import threadpool_limits

            from encodex.fit import fit_poisson
            from encodex.variables import parse_label

            env_name, unit = key
            env = self._envs[env_name]
            from encodex.design import DRIFT_TERM

            nuisance = (DRIFT_TERM,) if env.clock is not None else ()
            full = environment_design(env)
            y = _env_counts(self._session, env_name, unit, env)
            offset = np.full(env.n_rows, np.log(env.bin_size))
            with threadpool_limits(limits=1):
                # Started like the run's own fit: from the drift-only fit when there is one.
                start = fit_poisson(full.subset(nuisance), y, offset) if nuisance else None
                self._known[key] = fit_poisson(
                    full.subset(parse_label(self._labels[key]) + nuisance), y, offset,
                    start=start)
        return self._known[key]

    def __iter__(self):
        return iter(self._labels)

    def __len__(self):
        return len(self._labels)


# ---------------------------------------------------------------------------------------------
def _load(input_or_session, settings: RunSettings, load_options=None):
    from encodex.session import Session

    if isinstance(input_or_session, Session):
        if load_options:
            raise SettingsError("load_options apply to a file; this input is already a Session "
                                "(pass the options to encodex.load_session instead)")
        return input_or_session, "<Session object>"
    path = Path(input_or_session)
    if not path.exists():
        raise InputError(f"input file {path} does not exist; give an .nwb file or an .npz bundle")
    from encodex.session import load_session

    kw = {} if settings.bin_size is None else {"bin_size": settings.bin_size}
    return load_session(path, **kw, **dict(load_options or {})), str(path)


def _session_fingerprint(session) -> str:
    counts = session.counts
    arrays = [np.asarray(session.time), counts.data, counts.indices, counts.indptr,
              np.asarray(session.valid), np.asarray(session.environment),
              np.asarray(session.trial),
              np.frombuffer("\x00".join(session.unit_ids).encode(), dtype=np.uint8),
              np.frombuffer("\x00".join(session.environments).encode(), dtype=np.uint8)]
    for k in sorted(session.covariates):
        arrays.append(np.asarray(session.covariates[k], dtype=float))
    return data_fingerprint(arrays) + f"-{session.bin_size:g}"


def _environment_work(session, env_name: str, settings: RunSettings,
                      fingerprint: str) -> tuple[EnvironmentWork, dict]:
    from encodex.classic import spatial_edges

    k = session.environments.index(env_name)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == k))
    available = session.available_variables(env_name)
    wanted = settings.variables if settings.variables is not None else available
    variables = canonical_order(v for v in wanted if v in available)
    info = {
        "n_bins_used": int(rows.size),
        "duration_s": float(rows.size * session.bin_size),
        "variables": list(variables),
        # without --variables every variable was a candidate: say why each missing one is
        "unavailable": {v: r for v, r in session.unavailable_variables(env_name).items()
                        if settings.variables is None or v in settings.variables},
    }
    cov = {v: np.ascontiguousarray(np.asarray(session.covariates[v])[rows]) for v in
           set(variables) | ({"position"} & set(session.covariates))}
    note = ""
    fold = np.zeros(rows.size, dtype=np.int64)
    if not variables:
        note = "no requested variable is available in this environment (see run.json)"
    elif rows.size < 10 * settings.folds * settings.chunks_per_fold:
        note = (f"only {rows.size} usable bins in this environment, too few for "
                f"{settings.folds} folds")
    else:
        fold = chunked_folds(rows.size, settings.folds, settings.chunks_per_fold,
                             stream(settings.seed, env_name, None, PURPOSE_FOLDS)).fold
    ex = ey = None
    if "position" in cov and rows.size and np.ndim(cov["position"]) == 2:
        pos = cov["position"]
        if np.isfinite(pos).all(axis=1).any():
            ex, ey = spatial_edges(pos, settings.ratemap_bin_m)
    token = stable_hash([fingerprint, env_name, settings.to_dict()])
    all_kinds = dict(getattr(session, "kinds", {}) or {})
    kinds = tuple(sorted((v, all_kinds[v]) for v in set(variables) | {"position"}
                         if v in all_kinds))
    clock = _drift_clock(session, k, rows, settings, variables, info)
    work = EnvironmentWork(env_name, token, cov, variables, float(session.bin_size), fold,
                           settings.folds, settings.basis_sizes, kinds, ex, ey, note,
                           gram_precision=settings.gram_precision, clock=clock,
                           knots=settings.knots)
    return work, info


def _drift_clock(session, k: int, rows: np.ndarray, settings: RunSettings, variables,
                 info: dict) -> np.ndarray | None:
    """Environment clock of the usable bins for the drift term (None when it is off)."""
    from encodex.design import DRIFT_TERM, drift_basis_size

    if not settings.drift or rows.size < 2:
        return None
    if DRIFT_TERM in variables:
        raise SettingsError(f"the name '{DRIFT_TERM}' is reserved for the slow-drift term; "
                            "rename that variable (or switch drift off with --no-drift)")
    time = np.asarray(session.time, dtype=float)
    start = time[np.flatnonzero(np.asarray(session.environment) == k)[0]]
    clock = np.ascontiguousarray(time[rows] - start)
    info["drift_basis_functions"] = drift_basis_size(clock[-1] - clock[0])
    return clock


def _env_counts(session, env_name: str, unit: str, env: EnvironmentWork) -> np.ndarray:
    k = session.environments.index(env_name)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == k))
    return session.unit_counts(unit)[rows]


def _versions() -> dict:
    import importlib.metadata as md

    from encodex import __version__

    # encodex is distributed as encodex-glm; its version is read from the package itself.
    out = {"python": platform.python_version(), "encodex": __version__}
    for pkg in ("numpy", "scipy", "scikit-learn", "pandas", "joblib",
                "threadpoolctl", "dask", "distributed", "pynwb"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    return out


def _execute(tasks: list, jobs: int, cluster: str | None) -> Iterator[UnitOutcome]:
    """Yield outcomes as they finish, sequentially, with joblib's loky, or on dask."""
    if cluster is None and jobs == 1:
        for t in tasks:
            yield analyse_unit(*t)
        return
    from joblib import Parallel, delayed, parallel_config

    calls = (delayed(analyse_unit)(*t) for t in tasks)
    if cluster is None:
        # Workers exit if this process is killed outright (watch_run_process).
        with parallel_config(backend="loky", inner_max_num_threads=1,
                             initializer=watch_run_process, initargs=(os.getpid(),)):
            yield from Parallel(n_jobs=jobs, return_as="generator_unordered")(calls)
        return
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - dask is a declared dependency
        raise SettingsError("--cluster needs dask.distributed; install 'dask[distributed]'") from exc
    if cluster == "local":
        lc = LocalCluster(n_workers=jobs, threads_per_worker=1, processes=True,
                          dashboard_address=None)
        client = Client(lc)
    else:
        lc = None
        try:
            client = Client(cluster, timeout="20s")
        except OSError as exc:
            raise SettingsError(f"cannot reach the dask scheduler at {cluster} ({exc}); check "
                                "the address, e.g. tcp://host:8786, or use --cluster local") from exc
    # Workers keep freed arrays in their heap (encodex.population.allocator: with dask's own
    # malloc settings every bins-long temporary cost fresh page faults, 1.5x the CPU per cell).
    try:
        client.register_plugin(heap_settings_plugin())
        with parallel_config(backend="dask"):
            yield from Parallel(n_jobs=-1, return_as="generator_unordered")(calls)
    finally:
        client.close()
        if lc is not None:
            lc.close()


def _run_settings(jobs, settings: dict) -> RunSettings:
    """Checked settings of a run; accepts comma-separated variables and a basis-size mapping."""
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs < 1:
        raise SettingsError(f"jobs must be a positive integer (got {jobs!r}); use --jobs 1")
    if "variables" in settings and isinstance(settings["variables"], str):
        settings["variables"] = tuple(s.strip() for s in settings["variables"].split(",")
                                      if s.strip())
    if "basis_sizes" in settings and isinstance(settings["basis_sizes"], Mapping):
        settings["basis_sizes"] = tuple(settings["basis_sizes"].items())
    try:
        return RunSettings(**settings)
    except TypeError as exc:
        raise SettingsError(f"unknown setting: {exc}; see help(encodex.run_population)") from None


def _selected_units(session, units) -> list[str]:
    """Unit ids to fit, in session order: all, or those asked for (unknown ids refused)."""
    unit_ids = list(session.unit_ids)
    if units is not None:
        wanted = [str(u) for u in units]
        unknown = [u for u in wanted if u not in unit_ids]
        if unknown:
            raise SettingsError(f"unknown unit id(s) {unknown[:5]}; see session.unit_ids")
        unit_ids = [u for u in unit_ids if u in set(wanted)]
    return unit_ids


def _check_variables(session, rs: RunSettings) -> None:
    """Refuse requested variables that the session does not have."""
    if rs.variables is not None:
        known = set(VARIABLES) | set(session.covariates)
        unknown = [v for v in rs.variables if v not in known]
        if unknown:
            raise SettingsError(
                f"unknown variable(s) {unknown}; this session has "
                f"{', '.join(canonical_order(known & set(session.covariates)))}"
            )


def _check_first_step_reachable(rs: RunSettings, envs: Mapping[str, EnvironmentWork]) -> None:
    """Refuse fold and alpha settings under which no variable could ever be added."""
    # With k folds the one-sided signed-rank p-value is at least 2**-k: refuse settings under
    # which no variable could ever be added (every cell would be "none" whatever its spikes).
    m = max((len(e.variables) for e in envs.values()), default=0)
    if m:
        level = rs.alpha / m if rs.correction == "bonferroni" else rs.alpha
        reachable = (2.0 ** -rs.folds <= level if rs.correction in SIGNFLIP_TESTS
                     else 2.0 ** -rs.folds < level)
        if not reachable:
            need = int(np.floor(-np.log2(level))) + 1
            raise SettingsError(
                f"with {rs.folds} folds the smallest possible p-value is 2^-{rs.folds} = "
                f"{2.0 ** -rs.folds:.3g}, which cannot pass the first step's level {level:.3g} "
                f"(alpha {rs.alpha} over {m} variables); use --folds {need} or more"
            )


def _work_list(session, envs: Mapping[str, EnvironmentWork], unit_ids, rs: RunSettings,
               out_path: Path | None) -> tuple[dict, list]:
    """Records of cells already finished (on disk) and tasks of the others.

    Both in deterministic order (environment, then unit), so that results and resumed runs
    do not depend on how the work is scheduled.
    """
    records: dict[tuple[str, str], dict] = {}
    tasks = []
    col_rows = {name: np.flatnonzero(np.asarray(session.valid)
                                     & (np.asarray(session.environment) == k))
                for k, name in enumerate(session.environments)}
    counts = session.counts
    for name in session.environments:
        sub = counts[col_rows[name], :]
        if not hasattr(sub, "tocsc"):
            from scipy import sparse

            sub = sparse.csc_array(np.asarray(sub))
        sub = sub.tocsc()
        for unit in unit_ids:
            if out_path is not None:
                rec = read_unit_record(unit_path(out_path, name, unit))
                if rec is not None:
                    records[(name, unit)] = rec
                    continue
            # Sent to the worker by its spike bins only (SpikeColumn), not bins-long.
            y = SpikeColumn.from_csc(sub, session.unit_index(unit))
            tasks.append((envs[name], unit, y, rs))
    return records, tasks


def _progress_bar(n_total: int, n_done: int):
    """Progress bar of the cells (tqdm, on standard error), starting at those already done."""
    from tqdm import tqdm

    return tqdm(total=n_total, initial=n_done, unit="unit", desc="encodex fit",
                dynamic_ncols=True)


def _fit_cells(tasks: list, jobs: int, cluster: str | None, records: dict,
             out_path: Path | None, bar, n_total: int) -> tuple[dict, list]:
    """Fit the cells of ``tasks``, writing each one's file as soon as it is finished.

    Adds every outcome's record to ``records``; returns the chosen-model fits by
    (environment, unit) and the CPU seconds of each cell. Ctrl-C becomes
    :class:`RunInterrupted`, whose message says how many cells are saved and how to resume.
    """
    fits: dict = {}
    seconds = []
    # Cells whose file is on disk (or, without a folder, whose result is in memory): a cell
    # interrupted while its file was being written is not counted as saved.
    saved = len(records)
    try:
        with warnings.catch_warnings():
            # joblib warns about the tasks it cancels when Ctrl-C stops the run; the one line
            # below already says what happened.
            warnings.filterwarnings("ignore", message=".*still being processed by the workers",
                                    category=UserWarning)
            for outcome in _execute(tasks, jobs, cluster):
                key = (outcome.environment, outcome.unit)
                records[key] = outcome.record
                seconds.append(outcome.seconds)
                if outcome.fit is not None:
                    fits[key] = outcome.fit
                if out_path is not None:
                    write_unit_file(unit_path(out_path, *key), outcome.arrays, outcome.record)
                saved += 1
                if bar is not None:
                    bar.update(1)
    except KeyboardInterrupt:
        if bar is not None:
            bar.close()
        done = saved
        where = (f"saved in {out_path}; run the same command again to resume"
                 if out_path is not None else "lost (no output folder was given)")
        raise RunInterrupted(f"interrupted: {done} of {n_total} cells finished and {where}") \
            from None
    if bar is not None:
        bar.close()
    return fits, seconds


def _timings(t_start: float, t_compute: float, seconds: list) -> dict:
    """Wall-clock and CPU timings of a run (``run.json`` timings)."""
    return {
        "started_utc": _dt.datetime.fromtimestamp(t_start, _dt.timezone.utc).isoformat(),
        "finished_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(),
        "seconds_total": round(time.time() - t_start, 3),
        "seconds_computing": round(time.time() - t_compute, 3),
        "cpu_seconds_per_cell_median": float(np.median(seconds)) if seconds else None,
        "cpu_seconds_cells": round(float(np.sum(seconds)), 3),
    }


def _methods(rs: RunSettings) -> dict:
    """Methods statements of a run (``run.json`` methods), worded for its settings."""
    return {"folds": FOLD_STATEMENT, "smoothness": SMOOTHNESS_STATEMENTS[rs.fold_fits],
            "smoothness_criterion": CRITERION_STATEMENT,
            "drift": DRIFT_STATEMENT if rs.drift else "no drift term",
            "selection": ("forward selection from the "
                          + ("drift-only" if rs.drift else "mean-rate")
                          + " model; a variable is "
                          "kept if it improves held-out bits per spike across folds by "
                          "an " + describe_test(rs.correction, rs.alpha, rs.folds)
                          + (f"; after the first step the added variable must also raise the "
                             f"mean held-out score by at least {rs.min_step_gain:g} of the "
                             f"current model's" if rs.min_step_gain else "")
                          + ("; every subset scored (exhaustive)"
                             if rs.exhaustive else "")),
            "smallest_p": smallest_p(rs.correction, rs.folds),
            "goodness_of_fit": GOODNESS_STATEMENT}


def _session_record(session) -> dict:
    """What ``run.json`` keeps of the session: grid, units, environments and its summary."""
    return {
        "bin_size_s": float(session.bin_size),
        "n_bins": int(session.n_bins),
        "n_units": int(session.n_units),
        "environments": list(session.environments),
        "masked_bins": _plain(session.summary.get("masked_bins", {})),
        "dropped_spikes": _plain(session.summary.get("dropped_spikes", 0)),
        "summary": _plain(dict(session.summary)),
    }


def _run_record(session, rs: RunSettings, source: str, load_options, fingerprint: str,
                execution: dict, clock: tuple, env_info: dict, cells: pd.DataFrame) -> dict:
    """The record of a run (``run.json``): input, settings, versions, timings, methods.

    ``clock`` is ``(t_start, t_compute, seconds)`` for :func:`_timings`, read once the
    versions are known, so that the run's end time comes last.
    """
    return {
        "format": "encodex-fit-output/1",
        "statement": LABEL_STATEMENT,
        "input": source,
        "load_options": {k: (list(v) if isinstance(v, tuple) else v)
                         for k, v in dict(load_options or {}).items()},
        "data_fingerprint": fingerprint,
        "settings": rs.to_dict(),
        "execution": execution,
        "versions": _versions(),
        "timings": _timings(*clock),
        "methods": _methods(rs),
        "session": _session_record(session),
        "environments": env_info,
        "counts": {"cells": int(len(cells)),
                   "by_status": {str(k): int(v) for k, v in
                                 cells["status"].value_counts().sort_index().items()}},
    }


def run_population(input_or_session, out: str | Path | None = None, *, jobs: int = 1,
                   cluster: str | None = None, progress: bool = False,
                   units=None, load_options=None, overwrite: bool = False,
                   echo=None, **settings) -> PopulationResult:
    """Decide which variables each cell carries, for every unit and environment.

    Parameters
    ----------
    input_or_session : str, Path or encodex.session.Session
        An NWB file, an npz bundle, or a ready session.
    out : str or Path, optional
        Output folder (``cells.csv``, ``models.csv``, ``run.json``, ``units/``). Each finished
        unit is written at once; calling again with the same settings resumes. None keeps
        everything in memory.
    jobs : int
        Worker processes (joblib loky), or dask workers with ``cluster="local"``. Results do
        not depend on it.
    cluster : str, optional
        Address of a dask scheduler (``tcp://host:8786``) or ``"local"`` for a
        ``LocalCluster`` of ``jobs`` single-threaded worker processes. The workers' C
        allocator is set to keep freed arrays (glibc's mmap threshold 32 MiB, trim threshold
        128 MiB; :mod:`encodex.population.allocator`), which stays so for the life of a
        worker of a shared cluster.
    progress : bool
        Show a progress bar (units done, rate, time left) on standard error.
    units : iterable of str, optional
        Only these unit ids (default: all).
    load_options : mapping, optional
        Passed to :func:`encodex.session.load_session` when the input is a file: e.g.
        ``lfp="processing/ecephys/LFP/lfp"``, ``lfp_channel=0``, ``phase_band=(6, 10)``
        (rhythm phase as the variable ``phase``), ``extra={"goal_bearing": "path"}``,
        ``extra_kinds={"goal_bearing": "circular"}`` (user-defined variables). Recorded in
        ``run.json``.
    overwrite : bool
        Delete the results in ``out`` (a folder holding an encodex checkpoint) and start
        over instead of resuming or refusing.
    echo : callable, optional
        Called with the text of :func:`encodex.population.summary.session_summary` (the
        session as it will be fitted: environments, variables, objects read, masked bins)
        before fitting; e.g. ``echo=print``.
    **settings
        Fields of :class:`RunSettings`: ``variables``, ``folds`` (20), ``seed`` (0),
        ``alpha`` (0.05), ``correction`` ("signflip"), ``drift`` (True),
        ``exhaustive`` (False), ``shuffles`` (0), ``min_shift_s`` (20 s),
        ``min_spikes`` (100), ``bin_size`` (s), ``basis_sizes``, ``chunks_per_fold`` (3),
        ``fold_fits`` ("one-step"), ``gram_precision`` ("single"), ``knots`` ("quantile").

    Returns
    -------
    PopulationResult
        ``.cells``, ``.models`` (pandas DataFrames), ``.run`` (dict) and ``.fits``.

    Raises
    ------
    CheckpointMismatchError
        ``out`` holds results of other settings or another input.
    RunInterrupted
        On Ctrl-C; units finished so far are saved and the message says how to resume.

    References
    ----------
    Hardcastle, Maheswaranathan, Ganguli & Giocomo (2017), Neuron 94:375 (forward selection of
    variables by cross-validated log-likelihood of Poisson models).
    """
    rs = _run_settings(jobs, settings)
    if out is not None:  # a folder no run could write into is refused before the reading
        check_output_folder(Path(out), overwrite)
    t_start = time.time()
    session, source = _load(input_or_session, rs, load_options)
    fingerprint = _session_fingerprint(session)
    unit_ids = _selected_units(session, units)
    _check_variables(session, rs)
    envs: dict[str, EnvironmentWork] = {}
    env_info: dict[str, dict] = {}
    for name in session.environments:
        envs[name], env_info[name] = _environment_work(session, name, rs, fingerprint)
    _check_first_step_reachable(rs, envs)

    # Everything is checked: only now is anything written to the output folder.
    out_path = Path(out) if out is not None else None
    resumed = False
    if out_path is not None:
        check = {**rs.to_dict(), "units": None if units is None else unit_ids}
        resumed = open_checkpoint(out_path, check, fingerprint, overwrite=overwrite)

    # Work list in deterministic order; finished units (on disk) are skipped.
    records, tasks = _work_list(session, envs, unit_ids, rs, out_path)
    n_total = len(session.environments) * len(unit_ids)
    n_done = n_total - len(tasks)
    if echo is not None:
        echo(session_summary(session, env_info, len(tasks), n_done,
                             jobs=int(jobs), out=out_path, source=source))
    bar = _progress_bar(n_total, n_done) if progress else None
    t_compute = time.time()
    fits, seconds = _fit_cells(tasks, int(jobs), cluster, records, out_path, bar, n_total)

    cells, models = _tables(records, session.environments, unit_ids)
    execution = {"jobs": int(jobs), "cluster": cluster, "resumed": resumed,
                 "units_computed": len(tasks), "units_from_checkpoint": n_done}
    run = _run_record(session, rs, source, load_options, fingerprint, execution,
                      (t_start, t_compute, seconds), env_info, cells)
    if out_path is not None:
        _write_tables(out_path, cells, models, run)
    return PopulationResult(cells, models, run, _Fits(fits, envs, session, cells), out_path)


def _plain(obj):
    """JSON-ready copy (numpy scalars and arrays to Python)."""
    return json.loads(json.dumps(obj, default=lambda o: o.tolist() if hasattr(o, "tolist")
                                 else str(o)))


def _tables(records: dict, environments, unit_ids) -> tuple[pd.DataFrame, pd.DataFrame]:
    cell_rows, model_rows = [], []
    for env in environments:
        for unit in unit_ids:
            rec = records.get((env, unit))
            if rec is None:
                continue
            cell_rows.append(rec["cell"])
            for r in rec["models"]:
                model_rows.append({"unit": unit, "environment": env, **r})
    extra = canonical_order({k[5:] for r in cell_rows for k in r if k.startswith("gain_")}
                            - set(VARIABLES))
    cells = pd.DataFrame(cell_rows, columns=list(CELL_COLUMNS) + [f"gain_{v}" for v in extra])
    models = pd.DataFrame(model_rows, columns=list(MODEL_COLUMNS))
    for df in (cells, models):
        df["unit"] = df["unit"].astype(str)
        df["environment"] = df["environment"].astype(str)
    return cells, models


README = """encodex fit output
==================

cells.csv   one row per unit and environment:
  unit, environment, n_spikes, mean_rate_hz (spikes / usable time, Hz),
  status ("ok" = labelled; otherwise "too few spikes" (cell not labelled), "no variables"
          (nothing analysable in the environment), "too few bins", "error") and reason,
  variables (the label: variables carried, in canonical order joined by "+"; "none" when
             the cell was labelled and carries no variable; empty when not labelled),
  bits_per_spike (held-out information: log-likelihood gain of the chosen model over the
                  baseline model, base-2, all held-out bins of all folds pooled, per
                  held-out spike; 0 for "none", whose chosen model is the baseline). The
                  baseline is the drift-only model - a smooth of time on the environment's
                  clock, in every model - unless the run was made with drift off
                  (run.json settings.drift false, --no-drift), then the mean-rate model,
  p_value (one-sided p of the chosen model against the baseline model across folds, by the
           run's step test; for "none", the first step's p-value),
  gain_<variable> (held-out bits per spike that the variable adds to the chosen model, or
                   that removing it costs when it is in the model, averaged over folds -
                   the average the test works on, which weights folds equally and so can
                   differ from the pooled bits_per_spike; every model holds the drift term
                   when it is on; empty if not analysed),
  shuffle_p (empirical p of the held-out gain against circular shifts; empty when off),
  ambiguous_with (variables that a chosen variable cannot be told apart from in this
                  environment because their smooth terms overlap - concurvity of the
                  design >= 0.8, see encodex.compare.concurvity - ";"-separated; "drift"
                  when the variable follows the environment's clock, as when the animal
                  slows down over the session),
  pseudo_r2 (McFadden, 1 - LL_model / LL_mean, held-out, pooled),
  deviance_explained (1 - D_model / D_mean, held-out, pooled),
  selection_path (the forward steps, e.g. "+position(p=0.002<0.0167) > xspeed(p=0.0244>=0.025)":
                  "+" the step's best candidate was added, "x" it was rejected; p is the
                  step test's p-value across folds (run.json settings.correction:
                  "signflip", the default, an exact sign-flip test of the largest
                  candidate's pooled fold difference (each fold's clipped at 3 times the
                  candidate's median, weighted by its spikes), candidates flipped
                  together, adjusted for the step's candidates, added when p <= level =
                  alpha; "signflip-t",
                  the same with studentised means; "bonferroni",
                  one-sided Wilcoxon signed-rank p against alpha / number of candidates,
                  added when p < level; "none", Wilcoxon against alpha). The smallest
                  attainable p is run.json methods.smallest_p (Wilcoxon with k folds: 2^-k;
                  sign-flip: 2^-k up to 16 folds, all sign vectors enumerated, and 1/65536
                  above, from 65,535 random sign vectors and the observed one), so a level
                  below it can never be passed). A step whose test passed but whose mean
                  gain fell short of the effect-size floor (settings.min_step_gain times the
                  current model's mean score) reads "xheading(p=0.009<=0.05)[gain
                  0.00075<0.0078]", gain and floor in bits per spike),
  tied_with (other models with as many variables that the chosen one does not beat
             significantly across folds, ";"-separated labels),
  goodness of fit of the chosen model (the baseline model for "none") on its held-out
  predictions (encodex.compare.goodness): ks_distance (time-rescaling KS distance, with the
  discrete-time correction), ks_critical (its 95% point), ks_within_band (True/False),
  ks_intervals (rescaled intervals used), dispersion (Pearson statistic of held-out counts
  in 1 s windows, 1 under the model; > 1 over-dispersed), dispersion_p, history_ratio
  (observed / expected spike pairs within 0.05 s; > 1 bursts, < 1 refractoriness),
  history_p. A cell outside the band, or with small dispersion_p or history_p, is not
  described well by its model: its label still says which variables improved prediction,
  but its response curves and gains are approximate.
models.csv  one row per unit, environment, model (label) and fold: n_spikes_test (spikes in
  the held-out fold), loglik_test (Poisson log-likelihood of the held-out bins, natural log,
  nats, including the log y! term), bits_per_spike (held-out gain over the baseline model -
  drift-only, or mean-rate with drift off - fitted on the training folds, bits per held-out
  spike), pseudo_r2, deviance_explained.
run.json    settings, reading options, package versions, timings, masked bins, dropped
  spikes, and per environment the variables analysed and the reason each other was not.
units/<environment>/<unit>.npz   arrays (no pickles) of one cell:
  ratemap__occupancy_s, ratemap__spikes (seconds and spikes per spatial bin, rows y,
    columns x), ratemap__edges_x, ratemap__edges_y (bin edges, m);
  for each term <t> of the chosen model (any name: built-in, phase, user or nuisance term;
  with drift on the term "drift", grid in seconds on the environment's clock, is saved for
  every cell, from the drift-only model for "none"):
    <t>__grid (planar: <t>__grid_x, <t>__grid_y), in the variable's unit;
    <t>__log_modulation: natural log of the factor by which the term multiplies the rate;
      each term sums to zero over the environment's bins, so factor 1 is NOT the mean rate;
    <t>__se: its standard error (natural-log scale; 95% band = +-1.96 se);
    <t>__baseline_hz: the rate (Hz) that factor 1 stands for - the model's rate averaged
      over the bins with this term's own contribution removed - so that
      baseline_hz * exp(log_modulation) is the term's partial-dependence rate in Hz;
    1-D terms: <t>__edges (20 bins over the basis range), <t>__occupancy_s, <t>__spikes,
      <t>__predicted_spikes (the model's expected spikes) per bin;
  ratemap__predicted_spikes (the model's expected spikes per spatial bin);
  goodness__ks_uniform, goodness__ks_rescaled, goodness__ks_critical (the KS curve of the
    time-rescaling check: uniform quantiles, sorted rescaled values, the 95% band half-width);
  record__json (the unit's table rows, used to resume);
  shuffle__null_bits_per_spike (with --shuffles: held-out gain of each shifted train).
checkpoint.json  settings and input fingerprint (refuses to mix runs).

What a label means
------------------
{statement}
"""


def _write_tables(out: Path, cells: pd.DataFrame, models: pd.DataFrame, run: dict) -> None:
    atomic_write_text(out / "cells.csv", cells.to_csv(index=False, float_format="%.10g"))
    atomic_write_text(out / "models.csv", models.to_csv(index=False, float_format="%.10g"))
    atomic_write_text(out / "run.json", json.dumps(_plain(run), indent=2, allow_nan=True))
    atomic_write_text(out / "README.txt", README.format(statement=LABEL_STATEMENT))
