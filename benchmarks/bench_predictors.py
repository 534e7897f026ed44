"""Several linear predictors at once: sparse products per term against the Gram plan's rows.

``Design.linear_predictors`` (the fold steps of ``refit_folds``, 20 vectors per model, and the
derivatives of the smoothness criterion, one vector per penalty) once multiplied each term's
sparse block by the coefficient vectors; it now runs dense BLAS products over the compact
rows that X'WX already keeps (``Design.weighted_gram``'s plan). This script measures both on
the same simulated environment (one environment, 20 ms bins, default settings):

- per call, for four sub-designs and 20 and 7 vectors (median of repeats, CPU seconds);
- per cell, labelling the same cells through ``analyse_unit`` with each implementation in
  turn (interleaved, order alternated between two rounds), labels printed for comparison.

Prints JSON and a table.

Usage::

    nice -n 10 .venv/bin/python benchmarks/bench_predictors.py CELLS MINUTES
"""

import json
import sys
import time

import numpy as np
from threadpoolctl import threadpool_limits

from encodex.design import DRIFT_TERM
from encodex.design.design import Design
from encodex.population.run import _environment_work
from encodex.population.settings import RunSettings
from encodex.population.work import analyse_unit, environment_design
from encodex.session import build_session
from encodex.simulate import simulate_recording

PLAN_ROWS = Design.linear_predictors
MODELS = (("position", "heading", "speed", "distance", "time"), ("position", "speed"),
          ("speed",), ("heading", "time"))


def sparse_per_term(self, thetas):
    """The previous implementation: each term's sparse block times the coefficient vectors."""
    betas = np.atleast_2d(thetas) @ self.Z.T
    out = np.empty((self.n_rows, betas.shape[0]))
    out[:] = betas[:, 0]
    for t in self.terms:
        out += self._term_matrix(t) @ np.ascontiguousarray(betas[:, self.beta_slices[t.name]].T)
    return out


def cpu(f, repeats=7):
    times = []
    for _ in range(repeats):
        t0 = time.process_time()
        f()
        times.append(time.process_time() - t0)
    return float(np.median(times))


def per_call(design) -> list[dict]:
    rng = np.random.default_rng(0)
    rows = []
    for model in MODELS:
        sub = design.subset(model + (DRIFT_TERM,))
        for m in (20, 7):
            th = rng.normal(0, 0.1, (m, sub.n_theta))
            ref = sparse_per_term(sub, th)
            err = float(np.max(np.abs(PLAN_ROWS(sub, th) - ref)) / np.max(np.abs(ref)))
            a, b = cpu(lambda: sparse_per_term(sub, th)), cpu(lambda: PLAN_ROWS(sub, th))
            rows.append({"model": "+".join(model), "vectors": m, "sparse_s": round(a, 4),
                         "plan_s": round(b, 4), "ratio": round(b / a, 3),
                         "max_rel_diff": err})
    return rows


def per_cell(env, s, rows) -> dict:
    tot = {"sparse": 0.0, "plan": 0.0}
    labels = {}
    rs = RunSettings()
    for rnd in range(2):
        for u in s.unit_ids:
            y = s.unit_counts(u)[rows]
            ways = [("sparse", sparse_per_term), ("plan", PLAN_ROWS)]
            for name, fn in (ways if rnd == 0 else ways[::-1]):
                Design.linear_predictors = fn
                o = analyse_unit(env, u, y, rs)
                tot[name] += o.seconds
                labels.setdefault(str(u), {})[name] = o.record["cell"]["variables"]
    Design.linear_predictors = PLAN_ROWS
    return {"cpu_s": {k: round(v, 2) for k, v in tot.items()},
            "ratio": round(tot["plan"] / tot["sparse"], 3), "labels": labels}


def main(n: int, minutes: float) -> None:
    rec, _ = simulate_recording(seed=17, n_cells=n, duration_s=minutes * 60,
                                environments=("box",))
    s = build_session(rec, bin_size=0.02)
    rows = np.flatnonzero(np.asarray(s.valid) & (np.asarray(s.environment) == 0))
    env, _ = _environment_work(s, "box", RunSettings(), "bench-predictors")
    design = environment_design(env)
    design = design[0] if isinstance(design, tuple) else design
    with threadpool_limits(limits=1):
        calls = per_call(design)
        cells = per_cell(env, s, rows)
    print(json.dumps({"benchmark": "predictors", "cells": n, "minutes": minutes,
                      "n_bins": int(design.n_rows), "per_call": calls, "per_cell": cells}))
    print("| model (+ drift) | vectors | sparse per term (s) | plan rows (s) | ratio |")
    print("|---|---|---|---|---|")
    for r in calls:
        print(f"| {r['model']} | {r['vectors']} | {r['sparse_s']:.4f} | {r['plan_s']:.4f} "
              f"| {r['ratio']:.2f} |")
    c = cells["cpu_s"]
    print(f"\nper cell ({n} cells x 2 rounds): sparse {c['sparse'] / (2 * n):.2f} s, plan rows "
          f"{c['plan'] / (2 * n):.2f} s, ratio {cells['ratio']:.3f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4,
         float(sys.argv[2]) if len(sys.argv) > 2 else 60.0)
