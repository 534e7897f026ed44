"""One cell's fit from Python against the same fit inside a worker, with the other core busy.

Problem: the solver benchmark's cell (``_peers.make_problem``: 30 min of 20 ms bins, the
five-variable design, 136 coefficients). Fits, interleaved ``--repeats`` times:

* ``python, kernel threads 1``: ``fit_poisson`` called from this process as a notebook user
  would, with BLAS left at OpenBLAS's default (one thread per core); encodex's entry points
  limit their own kernels to one thread (:mod:`encodex.threads`, the default);
* ``python, BLAS default threads``: the same call after ``set_kernel_threads(None)`` (the
  behaviour before the limit: OpenBLAS's own thread pool of every core);
* ``worker``: the same call inside a separate process that limits BLAS to one thread with
  ``threadpoolctl``, as the population workers do (timed inside the worker).

each for fixed smoothing (lambdas from one LAML fit) and for smoothness selection (LAML).
A busy loop in another process keeps one core loaded throughout (``--no-load`` to measure
a quiet machine). Reported: median wall seconds per fit and the ratio of each to the worker.

Output: ONE line of JSON on stdout, then a readable table.

Usage::

    .venv/bin/python benchmarks/bench_threads.py              # 30 min of data, 5 repeats
    .venv/bin/python benchmarks/bench_threads.py --quick      # 5 min of data, 2 repeats
"""

from __future__ import annotations

import argparse
import datetime as _dt
import multiprocessing as mp
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import _peers  # noqa: E402  (benchmark helper next to this file)

_WORKER_PROBLEM = {}


def _busy_loop() -> subprocess.Popen:
    """A process spinning one core, as other work on a shared machine would."""
    return subprocess.Popen([sys.executable, "-c", "while True:\n    pass"])


def _fit_seconds(problem, lambdas) -> float:
    from encodex.fit import fit_poisson

    t0 = time.perf_counter()
    fit_poisson(problem.design, problem.y, problem.offset, lambdas=lambdas)
    return time.perf_counter() - t0


def _worker_init(duration_s: float, seed: int) -> None:
    from threadpoolctl import threadpool_limits

    _WORKER_PROBLEM["p"] = _peers.make_problem(duration_s, seed)
    # Kept for the worker's life, as the population workers do around every cell.
    _WORKER_PROBLEM["limits"] = threadpool_limits(limits=1)


def _worker_fit(lambdas) -> float:
    return _fit_seconds(_WORKER_PROBLEM["p"], lambdas)


def run(args) -> dict:
    from threadpoolctl import threadpool_info

    from encodex.fit import fit_poisson
    from encodex.threads import set_kernel_threads

    problem = _peers.make_problem(args.duration, args.seed)
    lam = fit_poisson(problem.design, problem.y, problem.offset).lambdas
    blas_threads = sorted({i["num_threads"] for i in threadpool_info()})
    ctx = mp.get_context("spawn")
    pool = ctx.Pool(1, initializer=_worker_init, initargs=(args.duration, args.seed))
    load = None if args.no_load else _busy_loop()
    modes = {"fixed": lam, "laml": None}
    times = {(m, w): [] for m in modes for w in ("python1", "python_default", "worker")}
    try:
        pool.apply(_worker_fit, (lam,))                  # warm-up: imports and caches
        _fit_seconds(problem, lam)
        for _ in range(args.repeats):
            for m, lmb in modes.items():
                times[(m, "worker")].append(pool.apply(_worker_fit, (lmb,)))
                times[(m, "python1")].append(_fit_seconds(problem, lmb))
                previous = set_kernel_threads(None)
                try:
                    times[(m, "python_default")].append(_fit_seconds(problem, lmb))
                finally:
                    set_kernel_threads(previous)
    finally:
        if load is not None:
            load.kill()
            load.wait()
        pool.close()
        pool.join()
    med = {f"{m}_{w}": statistics.median(v) for (m, w), v in times.items()}
    ratios = {f"{m}_{w}_over_worker": med[f"{m}_{w}"] / med[f"{m}_worker"]
              for m in modes for w in ("python1", "python_default")}
    return {
        "benchmark": "threads",
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "machine": _peers.machine(),
        "n_bins": problem.n_bins, "n_theta": problem.design.n_theta, "unit": problem.unit,
        "repeats": args.repeats, "other_core_loaded": not args.no_load,
        "blas_default_threads": blas_threads,
        "seconds_median": med, "ratio_to_worker": ratios,
        "seconds_all": {f"{m}_{w}": v for (m, w), v in times.items()},
    }


def table(r: dict) -> str:
    m = r["machine"]
    med, rat = r["seconds_median"], r["ratio_to_worker"]
    lines = [
        f"one cell from Python vs in a worker, {r['date_utc']}, {m['nproc']} CPUs, load "
        f"{m['loadavg_1min']:.2f}; {r['n_bins']} bins, {r['n_theta']} coefficients; other core "
        f"{'loaded' if r['other_core_loaded'] else 'idle'}; OpenBLAS default threads "
        f"{r['blas_default_threads']}",
        "",
        "| fit | worker (1 thread) s | Python, encodex default s | ratio | "
        "Python, BLAS default threads s | ratio |",
        "|---|---|---|---|---|---|",
    ]
    for mode, name in (("fixed", "fixed smoothing"), ("laml", "LAML selection")):
        lines.append(f"| {name} | {med[mode + '_worker']:.3f} | {med[mode + '_python1']:.3f} | "
                     f"{rat[mode + '_python1_over_worker']:.2f} | "
                     f"{med[mode + '_python_default']:.3f} | "
                     f"{rat[mode + '_python_default_over_worker']:.2f} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--duration", type=float, default=1800.0, help="session length, s")
    ap.add_argument("--repeats", type=int, default=5, help="interleaved repeats (default 5)")
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--no-load", action="store_true", help="leave the other core idle")
    ap.add_argument("--quick", action="store_true", help="5 min of data, 2 repeats")
    args = ap.parse_args(argv)
    if args.quick:
        args.duration, args.repeats = 300.0, 2
    return _peers.emit(run(args), table)


if __name__ == "__main__":
    raise SystemExit(main())
