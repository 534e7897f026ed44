"""Recovery and calibration of the model comparison at full size (not a timed test).

Simulates a population of single- and two-variable cells (``encodex.simulate``: position,
heading, speed, distance, time and pairs, 30 min per environment, 1-4 Hz) plus extra untuned
cells (homogeneous Poisson at 1-4 Hz on the same behaviour), runs ``run_population`` with the
default settings (10 folds, alpha 0.05, 20 ms bins) and prints one JSON line and a table:

- exact-set recovery on tuned cells (target >= 90%),
- sensitivity per variable (target >= 90%),
- false-label rate on untuned cells (target <= 5%).

Usage::

    .venv/bin/python benchmarks/recovery_full.py [--cells 80] [--untuned 60] [--duration 1800]
        [--bin-size 0.02] [--jobs 2] [--seed 0] [--fold-fits refit|one-step]
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import scipy.sparse as sp


def add_untuned_units(session, n: int, seed: int, rates=(1.0, 4.0)):
    """Session with ``n`` extra untuned units (homogeneous Poisson counts at 1-4 Hz)."""
    rng = np.random.default_rng(seed)
    r = rng.uniform(*rates, n)
    counts = rng.poisson(np.outer(np.full(session.n_bins, session.bin_size), r))
    extra = sp.csc_array(counts.astype(session.counts.dtype))
    ids = tuple(f"u{i:03d}" for i in range(n))
    return session.replace(counts=sp.csc_array(sp.hstack([session.counts, extra])),
                           unit_ids=tuple(session.unit_ids) + ids)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=80)
    p.add_argument("--untuned", type=int, default=60)
    p.add_argument("--duration", type=float, default=1800.0)
    p.add_argument("--bin-size", type=float, default=0.02)
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--fold-fits", choices=("refit", "one-step"), default=None,
                   help="how fold models are fitted (default: the run's default)")
    p.add_argument("--out", default=None, help="optional output folder of the run")
    a = p.parse_args(argv)

    import pandas as pd

    from encodex.population import run_population
    from encodex.population.recovery import recovery_summary
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, truth = simulate_recording(seed=a.seed, n_cells=a.cells, duration_s=a.duration,
                                    environments=("box",))
    session = build_session(rec, bin_size=a.bin_size)
    if a.untuned:
        session = add_untuned_units(session, a.untuned, a.seed + 1)
        extra = pd.DataFrame({"unit": session.unit_ids[a.cells:], "environment": "box",
                              "variables": "none", "silent": False})
        truth = pd.concat([truth, extra], ignore_index=True)
    t0 = time.time()
    mode = {} if a.fold_fits is None else {"fold_fits": a.fold_fits}
    result = run_population(session, a.out, jobs=a.jobs, progress=True, **mode)
    wall = time.time() - t0
    s = recovery_summary(result.cells, truth)
    record = {
        "benchmark": "recovery_full",
        "cells": a.cells, "untuned_extra": a.untuned, "duration_s": a.duration,
        "bin_size_s": a.bin_size, "jobs": a.jobs, "seed": a.seed,
        "fold_fits": result.run["settings"].get("fold_fits"),
        "wall_s": round(wall, 1),
        "cpu_s_per_cell_median": result.run["timings"]["cpu_seconds_per_cell_median"],
        **{k: v for k, v in s.items() if k != "mistakes"},
        "mistakes": s["mistakes"],
        "targets": {"exact": ">= 0.90", "sensitivity": ">= 0.90 each",
                    "false_label_rate": "<= 0.05"},
    }
    print(json.dumps(record))
    print()
    print(f"| measure | value | target |")
    print(f"|---|---|---|")
    print(f"| exact set, {s['n_tuned']} tuned cells | {s['exact']:.3f} | >= 0.90 |")
    for v, x in s["sensitivity"].items():
        print(f"| sensitivity {v} ({s['n_carriers'][v]} cells) | {x:.3f} | >= 0.90 |")
    print(f"| false labels, {s['n_untuned']} untuned cells | {s['false_label_rate']:.3f} "
          f"| <= 0.05 |")
    print(f"| wall time (s), {a.jobs} jobs | {wall:.0f} | |")
    for m in s["mistakes"]:
        print(f"  mistake: {m['unit']} truth={m['truth']} label={m['label']}")


if __name__ == "__main__":
    main()
