"""Solver benchmark: encodex against statsmodels and glum on the same penalised Poisson fit.

One run simulates a 30-min open-field session (90,000 bins of 20 ms), builds the issue-2
design (10 x 10 planar position, 12 heading, 8 speed, 10 distance, 10 time functions;
136 constrained coefficients with the intercept), picks a simulated position+speed cell,
selects its smoothing parameters once with encodex's LAML fit, and then fits the SAME
objective at those FIXED smoothing parameters with

* encodex  ``fit_poisson(design, y, offset, lambdas=...)`` (its own sparse design), with its
  default stopping rule and with a tighter one;
* statsmodels  penalised GLM (``PenalizedMixin`` + ``L2ConstraintsPenalty``, Newton);
* glum  ``GeneralizedLinearRegressor`` (``P2`` = penalty, ``irls-ls``).

The peers get the dense constrained design ``X Z`` and the offset; how each peer's objective is
made equal to encodex's is written in ``benchmarks/_peers.py`` and verified here by
evaluating encodex's objective and its gradient at every peer's solution.

BLAS and OpenMP are limited to one thread for everyone (threadpoolctl). Times are the median
over ``--repeats`` fits (wall clock, ``time.perf_counter``). Memory: the peak of memory traced by
``tracemalloc`` during one extra fit of each solver (Python and numpy allocations made during the
fit, inputs excluded; allocations inside compiled libraries that bypass Python's allocator, such
as BLAS work space, are not seen), and the process high-water mark of resident memory
(``resource.getrusage(RUSAGE_SELF).ru_maxrss``) after the encodex part and at the end.

Output: ONE line of JSON on stdout, then a readable table and where encodex's time goes
(cProfile of one fixed-smoothing fit).

Usage::

    .venv/bin/python benchmarks/bench_solver.py            # full size (about a minute)
    .venv/bin/python benchmarks/bench_solver.py --quick    # 5 min of data, one repeat
"""

from __future__ import annotations

import argparse
import cProfile
import datetime as _dt
import os
import platform
import pstats
import resource
import statistics
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import _peers  # noqa: E402  (benchmark helper next to this file)

#: Targets of issue 2.
TARGET_AGREEMENT = 1e-6
TARGET_SPEEDUP = 5.0
TARGET_MEMORY_MB = 1024.0

#: Explicit encodex stopping rule (Newton-decrement tolerance relative to 1 + |f|); since the
#: solver rewrite it equals the default of ``encodex.fit.NewtonOptions``.
TIGHT_TOL = 1e-14


machine = _peers.machine


def versions() -> dict:
    import glum
    import scipy
    import statsmodels

    import encodex

    return {"encodex": encodex.__version__, "numpy": np.__version__,
            "scipy": scipy.__version__, "statsmodels": statsmodels.__version__,
            "glum": glum.__version__}


def maxrss_mb() -> float:
    """Process high-water mark of resident memory, MB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def timed(fn, repeats: int):
    """Run ``fn`` ``repeats`` times; return (median seconds, all seconds, last result)."""
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), times, out


def traced_peak_mb(fn) -> float:
    """Peak of tracemalloc-traced memory during one call of ``fn``, MB."""
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / 2**20


def profile_shares(fn) -> dict:
    """Share of one call's time spent in the main pieces of the encodex solver (cProfile)."""
    prof = cProfile.Profile()
    prof.enable()
    fn()
    prof.disable()
    stats = pstats.Stats(prof).stats
    # Keyed by (module file, function): the solver and the design both have a
    # ``linear_predictor`` (one calls the other), so names alone would count it twice.
    cum = {}
    for (filename, _, name), (_, _, _, ct, _) in stats.items():
        key = (Path(filename).parent.name + "/" + Path(filename).name, name)
        cum[key] = cum.get(key, 0.0) + ct
    total = cum.get(("fit/engine.py", "fit_poisson"), 0.0)
    pieces = {
        "weighted_gram (X'WX: dense chunks + BLAS dsyrk)": ("design/design.py", "weighted_gram"),
        "transpose_dot (gradient X'r)": ("design/design.py", "transpose_dot"),
        "linear_predictor (X theta, objective and line search)": ("design/design.py",
                                                                 "linear_predictor"),
        "exp and dot products of the objective": None,
        "direction (Cholesky solve)": ("fit/solver.py", "direction"),
        "posterior covariance": ("fit/engine.py", "_posterior_covariance"),
    }
    secs = {k: cum.get(v, 0.0) for k, v in pieces.items() if v is not None}
    # The solver passes eta to its objective, so this is exp(eta) and the dot products only.
    secs["exp and dot products of the objective"] = cum.get(("fit/solver.py", "objective"), 0.0)
    out = {k: round(secs[k] / total, 3) for k in pieces}
    out["profiled_seconds"] = round(total, 4)
    return out


def compare(theta, ref, A, y, offset, S, f_ref) -> dict:
    """Agreement of a solution with encodex's, and how optimal it is for encodex's objective."""
    f = _peers.objective(A, y, offset, S, theta)
    g = _peers.gradient(A, y, offset, S, theta)
    return {
        # max_i |theta_i - ref_i| / max_i |ref_i| (relative to the largest coefficient, so a
        # coefficient near zero does not make the ratio meaningless)
        "max_rel_coef_diff": float(np.max(np.abs(theta - ref)) / np.max(np.abs(ref))),
        "max_abs_log_rate_diff": float(np.max(np.abs(A @ (theta - ref)))),
        "objective": f,
        "objective_minus_encodex": f - f_ref,
        "max_abs_gradient": float(np.max(np.abs(g))),
    }


def run(args) -> dict:
    from threadpoolctl import threadpool_info, threadpool_limits

    from encodex.fit import FitOptions, NewtonOptions, fit_poisson

    # Import the peers before limiting threads so that their OpenMP runtimes are seen too.
    import glum  # noqa: F401
    import statsmodels.api  # noqa: F401

    duration = args.duration or (300.0 if args.quick else 1800.0)
    repeats = args.repeats or (1 if args.quick else 5)
    laml_repeats = 1 if args.quick else 3
    wall0 = time.perf_counter()
    load0 = os.getloadavg()[0]
    with threadpool_limits(limits=1):
        threads = sorted({(i["user_api"], i["num_threads"]) for i in threadpool_info()})
        problem = _peers.make_problem(duration, seed=args.seed,
                                      gram_precision=args.gram_precision)
        d, y, off = problem.design, problem.y, problem.offset

        # 1. Smoothing parameters from one LAML fit, then timed separately.
        t_laml, t_laml_all, laml_fit = timed(lambda: fit_poisson(d, y, off), laml_repeats)
        lam = np.asarray(laml_fit.lambdas, dtype=float)

        # 2. encodex at fixed smoothing (default and tighter stopping rule), before the peers'
        # dense design exists, so that the process high-water mark is encodex's alone.
        tight = FitOptions(newton=NewtonOptions(tol=TIGHT_TOL))
        fit_enc = fit_poisson(d, y, off, lambdas=lam)  # warm-up (cached design layout)
        mem_enc = traced_peak_mb(lambda: fit_poisson(d, y, off, lambdas=lam))
        rss_after_encodex = maxrss_mb()
        shares = profile_shares(lambda: fit_poisson(d, y, off, lambdas=lam))

        # 3. Peers on the dense constrained design.
        A = _peers.constrained_dense(d)
        S = d.penalty_matrix(lam)
        R = _peers.penalty_root(S)
        root_err = float(np.max(np.abs(R.T @ R - S)) / np.max(np.abs(S)))
        theta0 = _peers.start_theta(y, off, A.shape[1])
        X_glum = _peers.glum_design(A)
        ref = fit_enc.theta
        f_ref = _peers.objective(A, y, off, S, ref)
        solvers = {
            "encodex": lambda: fit_poisson(d, y, off, lambdas=lam),
            "encodex_tight": lambda: fit_poisson(d, y, off, lambdas=lam, options=tight),
            "statsmodels": lambda: _peers.fit_statsmodels(A, y, off, S, theta0),
            "glum": lambda: _peers.fit_glum(X_glum, y, off, S),
        }
        peers = ("statsmodels", "glum")
        for name in peers:
            solvers[name]()  # warm-up: imports and first-call caches are not timed
        # Repeats are interleaved across solvers so that a change in machine load during the
        # run affects every solver alike.
        times = {name: [] for name in solvers}
        last = {}
        for _ in range(repeats):
            for name, fn in solvers.items():
                t0 = time.perf_counter()
                last[name] = fn()
                times[name].append(time.perf_counter() - t0)
        med = {name: statistics.median(v) for name, v in times.items()}
        t_enc, t_enc_all, fit_enc = med["encodex"], times["encodex"], last["encodex"]
        t_tight, t_tight_all, fit_tight = (med["encodex_tight"], times["encodex_tight"],
                                           last["encodex_tight"])
        results, thetas = {}, {}
        for name in peers:
            theta, n_iter = last[name]
            thetas[name] = theta
            results[name] = {"seconds": med[name], "seconds_all": times[name], "n_iter": n_iter,
                             "ratio_to_encodex": med[name] / t_enc,
                             "peak_traced_mb": traced_peak_mb(solvers[name]),
                             **compare(theta, ref, A, y, off, S, f_ref)}
        enc_tight = compare(fit_tight.theta, ref, A, y, off, S, f_ref)
        # Agreement of the peers with encodex's tight solution: tells a gap due to encodex's
        # stopping rule from a different optimum.
        tight_vs_peers = {name: float(np.max(np.abs(th - fit_tight.theta))
                                      / np.max(np.abs(fit_tight.theta)))
                          for name, th in thetas.items()}

    fastest = min(results, key=lambda k: results[k]["seconds"])
    out = {
        "benchmark": "solver",
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "command": " ".join([Path(sys.executable).name, *sys.argv]),
        "quick": bool(args.quick),
        "gram_precision": args.gram_precision,
        "machine": {**machine(), "loadavg_1min_start": load0},
        "versions": versions(),
        "threads": [list(t) for t in threads],
        "problem": {"n_bins": problem.n_bins, "bin_size_s": _peers.BIN_SIZE,
                    "duration_s": problem.duration_s, "n_coef": int(d.n_theta),
                    "n_basis_columns": int(d.n_beta), "unit": problem.unit,
                    "n_spikes": int(y.sum()), "simulation_seed": problem.seed,
                    "lambdas": lam.tolist(), "penalty_root_rel_error": root_err},
        "repeats": repeats,
        "encodex": {"seconds": t_enc, "seconds_all": t_enc_all, "n_iter": fit_enc.n_iter,
                    "converged": bool(fit_enc.converged), "objective": f_ref,
                    "max_abs_gradient": float(np.max(np.abs(
                        _peers.gradient(A, y, off, S, ref)))),
                    "peak_traced_mb": mem_enc, "process_maxrss_mb": rss_after_encodex,
                    "profile_share": shares},
        "encodex_tight": {"tol": TIGHT_TOL, "seconds": t_tight, "seconds_all": t_tight_all,
                          "n_iter": fit_tight.n_iter, "ratio_to_encodex": t_tight / t_enc,
                          **enc_tight,
                          "max_rel_coef_diff_vs_peers": tight_vs_peers},
        "encodex_laml": {"seconds": t_laml, "seconds_all": t_laml_all,
                         "n_outer": laml_fit.n_outer, "n_iter": laml_fit.n_iter,
                         "converged": bool(laml_fit.converged),
                         "edf": {k: round(v, 3) for k, v in laml_fit.edf.items()}},
        "peers": results,
        "fastest_peer": fastest,
        "speedup_vs_fastest_peer": results[fastest]["seconds"] / t_enc,
        "process_maxrss_mb": maxrss_mb(),
        "targets": {
            "agreement": TARGET_AGREEMENT,
            "agreement_reached": bool(max(r["max_rel_coef_diff"] for r in results.values())
                                      <= TARGET_AGREEMENT),
            "speedup": TARGET_SPEEDUP,
            "speedup_reached": bool(results[fastest]["seconds"] / t_enc >= TARGET_SPEEDUP),
            "memory_mb": TARGET_MEMORY_MB,
            "memory_reached": bool(rss_after_encodex < TARGET_MEMORY_MB),
        },
        "total_wall_seconds": time.perf_counter() - wall0,
    }
    return out


def table(res: dict) -> str:
    p = res["problem"]
    rows = [("encodex (default stop)", res["encodex"]["seconds"], 1.0, 0.0,
             res["encodex"]["max_abs_gradient"], res["encodex"]["n_iter"],
             res["encodex"]["peak_traced_mb"]),
            (f"encodex (tol={TIGHT_TOL:g})", res["encodex_tight"]["seconds"],
             res["encodex_tight"]["ratio_to_encodex"], res["encodex_tight"]["max_rel_coef_diff"],
             res["encodex_tight"]["max_abs_gradient"], res["encodex_tight"]["n_iter"], None)]
    for name, r in res["peers"].items():
        rows.append((name, r["seconds"], r["ratio_to_encodex"], r["max_rel_coef_diff"],
                     r["max_abs_gradient"], r["n_iter"], r["peak_traced_mb"]))
    lines = [
        f"{p['n_bins']} bins x {p['n_coef']} coefficients, unit {p['unit']} "
        f"({p['n_spikes']} spikes), {res['repeats']} repeat(s), 1 BLAS/OpenMP thread; "
        f"load average {res['machine']['loadavg_1min_start']:.1f} at start, "
        f"{res['machine']['loadavg_1min']:.1f} at end on {res['machine']['nproc']} CPUs",
        "",
        "| solver | s per fit (median) | peer / encodex | max rel. coef. diff vs encodex "
        "| max abs gradient of f | iterations | peak traced MB |",
        "|---|---|---|---|---|---|---|",
    ]
    for name, t, ratio, diff, grad, it, mem in rows:
        mem_s = "" if mem is None else f"{mem:.0f}"
        lines.append(f"| {name} | {t:.3f} | {ratio:.2f} | {diff:.1e} | {grad:.1e} | {it} "
                     f"| {mem_s} |")
    lam = res["encodex_laml"]
    lines += [
        f"| encodex LAML selection | {lam['seconds']:.3f} | | | | {lam['n_outer']} updates, "
        f"{lam['n_iter']} Newton | |",
        "",
        f"encodex vs fastest peer ({res['fastest_peer']}): "
        f"{res['speedup_vs_fastest_peer']:.2f}x (target {TARGET_SPEEDUP:g}x)",
        f"encodex tight vs peers: " + ", ".join(
            f"{k} {v:.1e}" for k, v in res["encodex_tight"]["max_rel_coef_diff_vs_peers"].items())
        + f" (target {TARGET_AGREEMENT:g})",
        f"process max RSS after the encodex part: {res['encodex']['process_maxrss_mb']:.0f} MB; "
        f"at the end (with the peers' dense design): {res['process_maxrss_mb']:.0f} MB "
        f"(target {TARGET_MEMORY_MB:g} MB)",
        "",
        "where encodex's fixed-smoothing fit spends its time (cProfile, share of "
        f"{res['encodex']['profile_share']['profiled_seconds']:.3f} s):",
    ]
    for k, v in res["encodex"]["profile_share"].items():
        if k != "profiled_seconds":
            lines.append(f"  {v:6.1%}  {k}")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true",
                    help="smoke run: 5 min of data (15,000 bins), one repeat")
    ap.add_argument("--repeats", type=int, default=None,
                    help="timed fits per solver (default 5, 1 with --quick)")
    ap.add_argument("--duration", type=float, default=None,
                    help="session length in seconds (default 1800, 300 with --quick)")
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--gram-precision", choices=("double", "single"), default="double",
                    help="arithmetic of encodex's X'WX (default double, the engine's default)")
    args = ap.parse_args(argv)
    if args.repeats is not None and args.repeats < 1:
        print("error: --repeats must be at least 1", file=sys.stderr)
        return 2
    if args.duration is not None and args.duration < 60:
        print("error: --duration must be at least 60 s", file=sys.stderr)
        return 2
    res = run(args)
    return _peers.emit(res, table)


if __name__ == "__main__":
    raise SystemExit(main())
