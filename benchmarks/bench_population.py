"""Population benchmark (issue 6): a whole lab's population, how fast, how big, against whom.

The realistic job of issue 6 is 300 units x 60 min in one environment at 20 ms bins
(180,000 bins), the five variables with the default bases (planar position 10 x 10, heading
12, speed 8, distance 10, time 10 functions), forward selection, 10 folds of 3 contiguous
chunks, smoothness by LAML, ``jobs=2``. That job takes far longer than this script may run,
so the script measures smaller versions of it and extrapolates:

1. **Scaling.** ``encodex.run_population(session, out=tmp, jobs=2, fold_fits=mode)`` on
   simulated single-environment sessions (``encodex.simulate.simulate_recording``, no tracking
   dropouts) at several numbers of units (at a fixed duration) and several durations (at a
   fixed number of units), for ``fold_fits="refit"`` and ``"one-step"``. A least-squares line
   ``wall = a + b * units * bins`` per mode predicts the full job; the residuals and the
   per-unit-bin cost of each size show whether the cost is linear in units and bins. Peak
   resident memory of all processes (the main process and every worker, summed) is sampled
   in a thread every 0.1 s with psutil; a line ``peak = c + d * bins`` (memory does not grow
   with units: each worker holds one unit at a time and the design once) predicts the full
   job's peak.
2. **Peer.** On a small job, a straightforward pipeline from general-purpose libraries: glum
   fits every model and every fold from scratch on the dense constrained design, at FIXED
   smoothing parameters (those of encodex's all-bins LAML fit of the same model, because
   glum does not select them; that selection is timed apart and not charged to the peer),
   scored on the same folds with the same held-out bits per spike, and the same forward
   selection rule (``encodex.compare.selection.select_variables`` with the peer's scoring
   callback). Both sides use one process with one BLAS thread (encodex ``jobs=1``), so the
   ratio is per core. Labels are shown side by side.
3. **Dask.** The same medium job with ``cluster="local"`` (a LocalCluster of 2 single-threaded
   workers, started inside the call and counted) against ``jobs=2``, back to back: throughput
   ratio and whether ``cells.csv`` is byte-identical.

Finally one unit is profiled with cProfile (share of its time in the engine's pieces).

The machine is shared: the one-minute load average is recorded at the start and end of
every timed run; ratios measured back to back are more trustworthy than absolute seconds.

Output: ONE line of JSON on stdout, then a readable table.

Usage::

    .venv/bin/python benchmarks/bench_population.py            # about 15 min on 2 cores
    .venv/bin/python benchmarks/bench_population.py --quick    # smoke run, about 2 min
"""

from __future__ import annotations

import argparse
import cProfile
import datetime as _dt
import os
import platform
import pstats
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import _peers  # noqa: E402  (benchmark helper next to this file)

#: The full job of issue 6.
FULL_UNITS = 300
FULL_BINS = 180_000
#: Targets (issue 16; issue 6 in the comments).
TARGET_WALL_S = 180.0        # issue 16 (600 s in issue 6)
TARGET_MEMORY_MB = 2048.0     # issue 16 (4096 MB in issue 6)
TARGET_PEER_SPEEDUP = 40.0   # issue 16 (was 20 in issue 6)
TARGET_DASK_WITHIN = 0.15

BIN_SIZE = 0.02
JOBS = 2
MODES = ("refit", "one-step")


# --------------------------------------------------------------------------------------------
machine = _peers.machine


def versions() -> dict:
    from importlib.metadata import version

    out = {}
    for pkg in ("encodex", "numpy", "scipy", "glum", "joblib", "dask", "distributed", "psutil"):
        try:
            out[pkg] = version(pkg)
        except Exception:  # noqa: BLE001 - a missing package is reported as None
            out[pkg] = None
    return out


class TreeMemory:
    """Peak of the summed resident memory of this process and all its descendants (MB).

    Sampled every ``interval`` seconds in a daemon thread (psutil); a process that appears
    and ends between two samples is missed, so the peak is a lower bound at that resolution.
    """

    def __init__(self, interval: float = 0.1):
        import psutil

        self._psutil = psutil
        self._me = psutil.Process()
        self.interval = interval
        self.peak_mb = 0.0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _sample(self) -> float:
        total = 0
        procs = [self._me]
        try:
            procs += self._me.children(recursive=True)
        except self._psutil.Error:
            pass
        for p in procs:
            try:
                total += p.memory_info().rss
            except self._psutil.Error:
                pass
        return total / 2**20

    def _run(self):
        while not self._stop.is_set():
            self.peak_mb = max(self.peak_mb, self._sample())
            self._stop.wait(self.interval)

    def __enter__(self):
        self.peak_mb = self._sample()
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak_mb = max(self.peak_mb, self._sample())


def make_session(n_units: int, duration_s: float, seed: int):
    """Single-environment simulated session, every 20 ms bin usable."""
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, truth = simulate_recording(seed=seed, n_cells=n_units, duration_s=duration_s,
                                    environments=("room_a",), dropouts=False)
    return build_session(rec, bin_size=BIN_SIZE), truth


def timed_run(session, out_dir: Path, mode: str, jobs: int = JOBS, cluster=None) -> dict:
    """One population run with wall time, load and peak memory of the process tree."""
    import encodex

    load0 = os.getloadavg()[0]
    with TreeMemory() as mem:
        t0 = time.perf_counter()
        res = encodex.run_population(session, out=out_dir, jobs=jobs, cluster=cluster,
                                     fold_fits=mode)
        wall = time.perf_counter() - t0
    cells = res.cells
    return {
        "wall_s": wall,
        "cpu_s_cells": float(res.run["timings"]["cpu_seconds_cells"]),
        "peak_rss_mb": mem.peak_mb,
        "load_start": load0, "load_end": os.getloadavg()[0],
        "labels": dict(zip(cells["unit"], cells["variables"])),
        "status": dict(zip(cells["unit"], cells["status"])),
    }


def linfit(x, y) -> dict:
    """Least squares y = a + b x with the largest relative residual."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    A = np.column_stack([np.ones_like(x), x])
    (a, b), *_ = np.linalg.lstsq(A, y, rcond=None)
    fitted = a + b * x
    ss_res = float(np.sum((y - fitted) ** 2))
    ss_tot = float(np.sum((y - y.mean()) ** 2)) or 1.0
    return {"a": float(a), "b": float(b), "r2": 1 - ss_res / ss_tot,
            "max_rel_residual": float(np.max(np.abs(y - fitted) / y))}


# --------------------------------------------------------------------------------------------
def scaling(args, tmp: Path) -> dict:
    sizes = args.sizes
    sessions = {}
    rows = []
    # Untimed warm-up: joblib's loky workers are started once and reused by later calls; the
    # start-up (a few seconds) would otherwise land on whichever size runs first.
    warm, _ = make_session(2, 60.0, args.seed)
    timed_run(warm, tmp / "warmup", "one-step")
    for (u, minutes) in sizes:
        if (u, minutes) not in sessions:
            sessions[(u, minutes)] = make_session(u, minutes * 60.0, args.seed)[0]
        s = sessions[(u, minutes)]
        for mode in MODES:
            r = timed_run(s, tmp / f"scale_{u}_{minutes}_{mode}", mode)
            r.update(units=u, minutes=minutes, n_bins=int(s.n_bins), mode=mode,
                     unit_bins=u * int(s.n_bins))
            r["us_per_unit_bin"] = 1e6 * r["wall_s"] / r["unit_bins"]
            rows.append(r)
            print(f"# scaling {mode:8s} {u:3d} units x {minutes:5.1f} min: {r['wall_s']:.1f} s, "
                  f"peak {r['peak_rss_mb']:.0f} MB, load {r['load_start']:.1f}", file=sys.stderr,
                  flush=True)
    out = {"runs": rows, "models": {}}
    for mode in MODES:
        rs = [r for r in rows if r["mode"] == mode]
        fit = linfit([r["unit_bins"] for r in rs], [r["wall_s"] for r in rs])
        cpu = linfit([r["unit_bins"] for r in rs], [r["cpu_s_cells"] for r in rs])
        pred = fit["a"] + fit["b"] * FULL_UNITS * FULL_BINS
        # CPU seconds of the cells (process time of the workers) do not count time lost to
        # other work on a shared machine: divided by the 2 jobs it is the wall time on an
        # otherwise idle machine, if the workers never wait.
        pred_cpu = (cpu["b"] * FULL_UNITS * FULL_BINS) / JOBS
        # Memory: per duration at the fixed unit count (a worker holds one unit at a time).
        u_fix = args.memory_units
        ms = [r for r in rs if r["units"] == u_fix]
        mem = linfit([r["n_bins"] for r in ms], [r["peak_rss_mb"] for r in ms]) \
            if len({r["n_bins"] for r in ms}) >= 2 else None
        mem_pred = (mem["a"] + mem["b"] * FULL_BINS) if mem else None
        out["models"][mode] = {
            "wall_fit": fit, "cpu_fit": cpu,
            "predicted_full_wall_s": pred,
            "predicted_full_wall_s_from_cpu": pred_cpu,
            "target_wall_reached": bool(pred <= TARGET_WALL_S),
            "memory_fit_vs_bins": mem,
            "predicted_full_peak_rss_mb": mem_pred,
            "target_memory_reached": None if mem_pred is None else bool(mem_pred < TARGET_MEMORY_MB),
        }
    return out


# --------------------------------------------------------------------------------------------
def peer(args) -> dict:
    """encodex (jobs=1) against glum fitting every model and fold from scratch."""
    from threadpoolctl import threadpool_limits

    import encodex
    from encodex.compare.folds import Folds
    from encodex.compare.scores import heldout_score, mean_rate_counts
    from encodex.compare.selection import select_variables
    from encodex.fit import fit_poisson
    from encodex.population.run import _env_counts, _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import environment_design

    import glum  # noqa: F401  (imported before the thread limit so its OpenMP is seen)

    session, truth = make_session(args.peer_units, args.peer_minutes * 60.0, args.seed)
    out = {"units": args.peer_units, "minutes": args.peer_minutes, "n_bins": int(session.n_bins),
           "truth": dict(zip(truth["unit"], truth["variables"]))}
    enc = {}
    for mode in MODES:
        load0 = os.getloadavg()[0]
        t0 = time.perf_counter()
        res = encodex.run_population(session, jobs=1, fold_fits=mode)
        enc[mode] = {"wall_s": time.perf_counter() - t0, "load_start": load0,
                     "labels": dict(zip(res.cells["unit"], res.cells["variables"]))}
    out["encodex"] = enc

    rs = RunSettings()
    name = session.environments[0]
    env, _ = _environment_work(session, name, rs, "bench")
    design = environment_design(env)
    folds = Folds(env.fold, env.k)
    splits = folds.splits()
    offset = float(np.log(env.bin_size))
    off = np.full(env.n_rows, offset)
    libraries = tuple(args.peer_libraries)
    fitters = {"glum": lambda A, X, y, S: _peers.fit_glum(X, y, offset, S)[0],
               "numpy": lambda A, X, y, S: _peers.fit_numpy(
                   A, y, offset, S, _peers.start_theta(y, offset, A.shape[1]))[0]}
    labels = {lib: {} for lib in libraries}
    t_peer = {lib: 0.0 for lib in libraries}
    n_fits = {lib: 0 for lib in libraries}
    t_lam = 0.0
    with threadpool_limits(limits=1):
        for unit in session.unit_ids:
            y = _env_counts(session, name, unit, env).astype(float)
            if y.sum() < rs.min_spikes:
                for lib in libraries:
                    labels[lib][unit] = ""
                continue
            lams = {}

            def lambdas(model, y=y, lams=lams):
                nonlocal t_lam
                if model not in lams:
                    t0 = time.perf_counter()
                    lams[model] = np.asarray(fit_poisson(design.subset(model), y, off).lambdas,
                                             float)  # encodex's LAML, charged to no one
                    t_lam += time.perf_counter() - t0
                return lams[model]

            for lib in libraries:
                def score(model, y=y, lib=lib):
                    if not model:
                        return np.zeros(folds.k)
                    lam = lambdas(model)
                    sub = design.subset(model)
                    t1 = time.perf_counter()
                    # The straightforward pipeline: dense constrained design, one fit per fold.
                    A = _peers.constrained_dense(sub)
                    S = sub.penalty_matrix(lam)
                    bps = np.empty(folds.k)
                    for k, (train, test) in enumerate(splits):
                        At = A[train]
                        X = _peers.glum_design(At) if lib == "glum" else None
                        theta = fitters[lib](At, X, y[train], S)
                        mu = np.exp(offset + A[test] @ theta)
                        mu0 = mean_rate_counts(y[train], off[train], off[test])
                        bps[k] = heldout_score(y[test], mu, mu0).bits_per_spike
                        n_fits[lib] += 1
                    t_peer[lib] += time.perf_counter() - t1
                    return bps

                sel = select_variables(env.variables, score, alpha=rs.alpha,
                                       correction=rs.correction)
                labels[lib][unit] = sel.label
    out["peers"] = {lib: {"seconds_fits": t_peer[lib], "n_fold_fits": n_fits[lib],
                          "labels": labels[lib]} for lib in libraries}
    out["seconds_lambda_selection"] = t_lam
    out["comparison"] = {}
    for lib in libraries:
        for mode in MODES:
            same = all(enc[mode]["labels"][u] == labels[lib][u] for u in labels[lib])
            ratio = t_peer[lib] / enc[mode]["wall_s"]
            out["comparison"][f"{lib}/{mode}"] = {
                "labels_match": bool(same),
                "speedup_vs_peer_fits": ratio,
                "speedup_vs_peer_with_lambdas": (t_peer[lib] + t_lam) / enc[mode]["wall_s"],
                "target_speedup_reached": bool(ratio >= TARGET_PEER_SPEEDUP),
            }
    return out


# --------------------------------------------------------------------------------------------
def dask_vs_jobs(args, tmp: Path) -> dict:
    session, _ = make_session(args.dask_units, args.dask_minutes * 60.0, args.seed)
    mode = "one-step"
    # Fixed cost of each way of running (LocalCluster start and stop, loky reuse): the same
    # tiny job (1 unit x 1 min) both ways, so that a steady-state ratio can be given too.
    tiny, _ = make_session(1, 60.0, args.seed)
    t_a = timed_run(tiny, tmp / "tiny_jobs", mode, jobs=JOBS)["wall_s"]
    a = timed_run(session, tmp / "dask_jobs", mode, jobs=JOBS)
    ca = (tmp / "dask_jobs" / "cells.csv").read_bytes()
    out = {"units": args.dask_units, "minutes": args.dask_minutes,
           "n_bins": int(session.n_bins), "mode": mode, "jobs2": a,
           "fixed_cost_s": {"jobs2": t_a}, "local": {}}
    for w in args.dask_workers:
        t_b = timed_run(tiny, tmp / f"tiny_dask{w}", mode, jobs=w, cluster="local")["wall_s"]
        b = timed_run(session, tmp / f"dask_local{w}", mode, jobs=w, cluster="local")
        cb = (tmp / f"dask_local{w}" / "cells.csv").read_bytes()
        out["local"][str(w)] = {
            **b, "fixed_cost_s": t_b,
            # throughput(dask) / throughput(jobs=2)
            "throughput_ratio_over_jobs2": a["wall_s"] / b["wall_s"],
            "throughput_ratio_without_fixed_cost": (a["wall_s"] - t_a) / (b["wall_s"] - t_b),
            "cells_csv_identical": ca == cb,
        }
    if "1" in out["local"] and "2" in out["local"]:
        one, two = out["local"]["1"], out["local"]["2"]
        out["scaling_2_over_1_workers"] = one["wall_s"] / two["wall_s"]
        out["scaling_2_over_1_without_fixed_cost"] = ((one["wall_s"] - one["fixed_cost_s"])
                                                      / (two["wall_s"] - two["fixed_cost_s"]))
    if str(JOBS) in out["local"]:
        r = out["local"][str(JOBS)]["throughput_ratio_over_jobs2"]
        out["target_within_reached"] = bool(r >= 1 - TARGET_DASK_WITHIN)
    return out


# --------------------------------------------------------------------------------------------
PIECES = {
    "weighted_gram (X'WX)": ("design/design.py", "weighted_gram"),
    "transpose_dot (X'r)": ("design/design.py", "transpose_dot"),
    "transpose_dot_groups (per-fold X'r)": ("design/design.py", "transpose_dot_groups"),
    "linear_predictor (X theta)": ("design/design.py", "linear_predictor"),
    "objective (exp, dot products)": ("fit/solver.py", "objective"),
    "direction (Cholesky solve)": ("fit/solver.py", "direction"),
    "fellner_schall_update": ("fit/smoothing.py", "fellner_schall_update"),
    "laml criterion": ("fit/smoothing.py", "laml"),
    "posterior covariance (inverse)": ("fit/engine.py", "_posterior_covariance"),
    "design.subset": ("design/design.py", "subset"),
    "concurvity flags (ambiguous_pairs)": ("compare/concurvity.py", "ambiguous_pairs"),
    "response curves": ("population/work.py", "_responses"),
    "scores (heldout_score)": ("compare/scores.py", "heldout_score"),
}


def profile_unit(args) -> dict:
    from encodex.population.run import _env_counts, _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit, environment_design

    session, truth = make_session(args.profile_units, args.profile_minutes * 60.0, args.seed)
    # A unit tuned to two variables walks the longest forward path.
    two = truth.loc[truth["variables"].str.contains(r"\+"), "unit"]
    unit = str(two.iloc[0]) if len(two) else str(truth["unit"].iloc[0])
    out = {"unit": unit, "truth": str(truth.set_index("unit").loc[unit, "variables"]),
           "minutes": args.profile_minutes}
    for mode in MODES:
        rs = RunSettings(fold_fits=mode)
        env, _ = _environment_work(session, session.environments[0], rs, "profile")
        environment_design(env)  # built once per worker in a run: not profiled
        y = _env_counts(session, env.name, unit, env)
        prof = cProfile.Profile()
        prof.enable()
        oc = analyse_unit(env, unit, y, rs)
        prof.disable()
        cum = {}
        for (filename, _, name), (_, _, _, ct, _) in pstats.Stats(prof).stats.items():
            key = (Path(filename).parent.name + "/" + Path(filename).name, name)
            cum[key] = cum.get(key, 0.0) + ct
        total = cum.get(("population/work.py", "analyse_unit"), 0.0)
        share = {k: round(cum.get(v, 0.0) / total, 3) for k, v in PIECES.items()}
        out[mode] = {"seconds": round(total, 3), "label": oc.record["cell"]["variables"],
                     "n_models": len({r["model"] for r in oc.record["models"]}),
                     "share": share}
    return out


# --------------------------------------------------------------------------------------------
def run(args) -> dict:
    wall0 = time.perf_counter()
    load0 = os.getloadavg()
    parts = {}
    with tempfile.TemporaryDirectory(prefix="encodex-bench-pop-") as d:
        tmp = Path(d)
        if "scaling" in args.only:
            parts["scaling"] = scaling(args, tmp)
        if "peer" in args.only:
            print("# peer ...", file=sys.stderr, flush=True)
            parts["peer"] = peer(args)
        if "dask" in args.only:
            print("# dask ...", file=sys.stderr, flush=True)
            parts["dask"] = dask_vs_jobs(args, tmp)
    if "profile" in args.only:
        print("# profile ...", file=sys.stderr, flush=True)
        parts["profile"] = profile_unit(args)
    return {
        "benchmark": "population",
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "command": " ".join([Path(sys.executable).name, *sys.argv]),
        "quick": bool(args.quick),
        "machine": {**machine(), "loadavg_start": list(load0),
                    "loadavg_end": list(os.getloadavg())},
        "versions": versions(),
        "full_job": {"units": FULL_UNITS, "n_bins": FULL_BINS, "jobs": JOBS},
        "targets": {"wall_s": TARGET_WALL_S, "memory_mb": TARGET_MEMORY_MB,
                    "peer_speedup": TARGET_PEER_SPEEDUP, "dask_within": TARGET_DASK_WITHIN},
        **parts,
        "total_wall_seconds": time.perf_counter() - wall0,
    }


def table(res: dict) -> str:
    m = res["machine"]
    L = [f"population benchmark, {res['date_utc']}, {m['nproc']} CPUs ({m['cpu']}); load "
         f"average {m['loadavg_start'][0]:.2f} at start, {m['loadavg_end'][0]:.2f} at end; "
         f"total {res['total_wall_seconds']:.0f} s"]
    for part, fmt in (("scaling", _table_scaling), ("peer", _table_peer), ("dask", _table_dask),
                      ("profile", _table_profile)):
        if part in res:
            L += ["", *fmt(res[part])]
    return "\n".join(L)


def _table_scaling(sc: dict) -> list:
    L = ["1. scaling (jobs=2, 10 folds, forward selection, LAML, 5 variables)", "",
         "| mode | units | min | bins | wall s | worker CPU s | us per unit-bin | peak RSS MB "
         "| load |", "|---|---|---|---|---|---|---|---|---|"]
    for r in sc["runs"]:
        L.append(f"| {r['mode']} | {r['units']} | {r['minutes']:g} | {r['n_bins']} | "
                 f"{r['wall_s']:.1f} | {r['cpu_s_cells']:.1f} | {r['us_per_unit_bin']:.2f} | "
                 f"{r['peak_rss_mb']:.0f} | {r['load_start']:.1f} |")
    L.append("")
    for mode, p in sc["models"].items():
        f = p["wall_fit"]
        mem = p["predicted_full_peak_rss_mb"]
        L.append(f"{mode}: wall = {f['a']:.1f} s + {f['b'] * 1e6:.3f} us x unit-bins "
                 f"(R2 {f['r2']:.3f}, largest residual {f['max_rel_residual']:.0%}); full job "
                 f"{FULL_UNITS} units x {FULL_BINS} bins: {p['predicted_full_wall_s'] / 60:.0f} min "
                 f"(from worker CPU / 2: {p['predicted_full_wall_s_from_cpu'] / 60:.0f} min); "
                 f"3-min target {'MET' if p['target_wall_reached'] else 'NOT MET'}; peak memory "
                 + ("n/a" if mem is None else f"{mem:.0f} MB, 2-GB target "
                    f"{'MET' if p['target_memory_reached'] else 'NOT MET'}"))
    return L


def _table_peer(pe: dict) -> list:
    L = [f"2. peer ({pe['units']} units x {pe['minutes']:g} min, {pe['n_bins']} bins, one "
          "process, one BLAS thread)", "",
          "| unit | truth | " + " | ".join(f"{lib} pipeline" for lib in pe["peers"])
          + " | encodex refit | encodex one-step |",
          "|---|---|" + "---|" * len(pe["peers"]) + "---|---|"]
    for u in pe["truth"]:
        L.append(f"| {u} | {pe['truth'][u]} | "
                 + " | ".join(p["labels"].get(u, "") for p in pe["peers"].values())
                 + f" | {pe['encodex']['refit']['labels'][u]} "
                 f"| {pe['encodex']['one-step']['labels'][u]} |")
    L.append("")
    for lib, p in pe["peers"].items():
        L.append(f"{lib}: {p['seconds_fits']:.1f} s for {p['n_fold_fits']} fold fits")
    L.append(f"(+ {pe['seconds_lambda_selection']:.1f} s of encodex LAML to get the peers' "
             "smoothing parameters, not charged)")
    for key, c in pe["comparison"].items():
        lib, mode = key.split("/")
        L.append(f"{lib} vs encodex {mode}: {pe['encodex'][mode]['wall_s']:.1f} s; peer/encodex "
                 f"{c['speedup_vs_peer_fits']:.1f}x (target {TARGET_PEER_SPEEDUP:g}x: "
                 f"{'MET' if c['target_speedup_reached'] else 'NOT MET'}); labels match: "
                 f"{c['labels_match']}")
    return L


def _table_dask(da: dict) -> list:
    L = [f"3. dask LocalCluster vs jobs=2 ({da['units']} units x {da['minutes']:g} min, "
         f"{da['mode']}); jobs=2: {da['jobs2']['wall_s']:.1f} s, peak RSS "
         f"{da['jobs2']['peak_rss_mb']:.0f} MB, fixed cost {da['fixed_cost_s']['jobs2']:.1f} s", "",
         "| dask workers | wall s | fixed cost s | throughput / jobs=2 | without fixed cost "
         "| peak RSS MB | cells.csv identical |", "|---|---|---|---|---|---|---|"]
    for w, b in da["local"].items():
        L.append(f"| {w} | {b['wall_s']:.1f} | {b['fixed_cost_s']:.1f} | "
                 f"{b['throughput_ratio_over_jobs2']:.2f} | "
                 f"{b['throughput_ratio_without_fixed_cost']:.2f} | {b['peak_rss_mb']:.0f} | "
                 f"{b['cells_csv_identical']} |")
    if "scaling_2_over_1_workers" in da:
        L.append(f"throughput of 2 dask workers / 1 worker: {da['scaling_2_over_1_workers']:.2f} "
                 f"({da['scaling_2_over_1_without_fixed_cost']:.2f} without the fixed cost)")
    return L


def _table_profile(pr: dict) -> list:
    L = [f"4. profile of one unit ({pr['unit']}, truth {pr['truth']}, {pr['minutes']:g} min), "
          "share of the unit's time (cumulative, pieces nest: direction inside solver etc.)", ""]
    L.append("| piece | " + " | ".join(MODES) + " |")
    L.append("|---|" + "---|" * len(MODES))
    for k in PIECES:
        L.append(f"| {k} | " + " | ".join(f"{pr[mo]['share'][k]:.1%}" for mo in MODES) + " |")
    L.append("| unit seconds (label, models) | " + " | ".join(
        f"{pr[mo]['seconds']:.1f} ({pr[mo]['label']}, {pr[mo]['n_models']})" for mo in MODES) + " |")
    return L


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="smoke run (about 2 minutes)")
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--peers", dest="peer_libraries", nargs="+", choices=("numpy", "glum"),
                    default=["numpy", "glum"], help="peer pipelines to run (default both)")
    ap.add_argument("--only", nargs="+", choices=("scaling", "peer", "dask", "profile"),
                    default=["scaling", "peer", "dask", "profile"],
                    help="parts to run (default all)")
    ap.add_argument("--dask-workers", type=int, nargs="+", default=[JOBS],
                    help="LocalCluster sizes to measure against jobs=2 (default 2)")
    ap.add_argument("--dask-size", type=float, nargs=2, metavar=("UNITS", "MINUTES"),
                    help="size of the dask job (default 20 units x 60 min; --quick 2 x 2)")
    ap.add_argument("--peer-size", type=float, nargs=2, metavar=("UNITS", "MINUTES"),
                    help="size of the peer comparison (default 4 units x 5 min; --quick 1 x 2)")
    args = ap.parse_args(argv)
    if args.quick:
        args.sizes = [(1, 2.0), (2, 2.0), (2, 1.0), (2, 4.0)]
        args.memory_units = 2
        args.peer_units, args.peer_minutes = 1, 2.0
        args.dask_units, args.dask_minutes = 2, 2.0
        args.profile_units, args.profile_minutes = 8, 2.0
    else:
        # units x minutes; the 10-unit column spans durations (bins), the 60-min row spans
        # units (the full job's duration).
        args.sizes = [(5, 60.0), (10, 60.0), (20, 60.0), (10, 15.0), (10, 30.0)]
        args.memory_units = 10
        args.peer_units, args.peer_minutes = 4, 5.0
        args.dask_units, args.dask_minutes = 20, 60.0
        args.profile_units, args.profile_minutes = 20, 60.0
    if args.peer_size:
        args.peer_units, args.peer_minutes = int(args.peer_size[0]), float(args.peer_size[1])
    if args.dask_size:
        args.dask_units, args.dask_minutes = int(args.dask_size[0]), float(args.dask_size[1])
    res = run(args)
    return _peers.emit(res, table)


if __name__ == "__main__":
    raise SystemExit(main())
