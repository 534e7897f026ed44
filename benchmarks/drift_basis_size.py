"""How many basis functions the slow-drift term needs (not a timed test).

The drift term (``encodex.design.drift``) has one cubic B-spline per ``spacing`` seconds of
environment plus three. Too few and a rate that wanders faster than the knots can follow is
left to the behavioural variables (false labels when behaviour also changes over the
session); too many and the term competes with slow variables and costs columns in every
model. Measured here on simulated cells (``encodex.simulate``, 30 min environments, 50 ms
bins, the animal slowing to 0.4x its speed over the session, 1-4 Hz), all labelled with the
run's defaults (sign-flip step test at alpha 0.05, 20 folds of 3 chunks, one-step fold fits),
with the drift term at several spacings and without it:

1. untuned cells whose log rate wanders (an Ornstein-Uhlenbeck process, sd 0.5, time
   constant ``tau`` = 60, 300 or 900 s) or drifts steadily (doubling every 20 min): the
   false-label rate by spacing, with Wilson 95% intervals;
2. weakly tuned cells (0.5x, the nine built-in single and two-variable types in turn, no
   drift): exact label sets by spacing.

Usage::

    nice -n 10 /work/venv/bin/python benchmarks/drift_basis_size.py --null-cells 60 \\
        --power-cells 54 --jobs 2

Prints one JSON record and markdown tables.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from functools import lru_cache

import numpy as np

SPACINGS = (150.0, 300.0, 600.0)
TAUS = (60.0, 300.0, 900.0, None)  # None: steady doubling every 20 min
DURATION_S = 1800.0
SLOWDOWN = 0.4


@lru_cache(maxsize=4)
def scenario(seed: int):
    """Covariates, clock, designs by spacing (None: no drift term) and folds of a trajectory."""
    from encodex.compare.folds import chunked_folds
    from encodex.design import DRIFT_TERM, build_design, default_bases, drift_basis
    from encodex.session import build_session
    from encodex.simulate import simulate_recording
    from encodex.variables import VARIABLES
    from labels_at_the_edges import BIN_SIZE

    rec, _ = simulate_recording(seed=seed, n_cells=1, duration_s=DURATION_S,
                                environments=("box",), slowdown=SLOWDOWN)
    s = build_session(rec, bin_size=BIN_SIZE)
    rows = np.flatnonzero(np.asarray(s.valid) & (np.asarray(s.environment) == 0))
    cov = {v: np.ascontiguousarray(np.asarray(s.covariates[v])[rows]) for v in VARIABLES}
    t = np.asarray(s.time)
    clock = t[rows] - t[np.flatnonzero(np.asarray(s.environment) == 0)[0]]
    designs = {None: build_design(cov, default_bases(cov, VARIABLES))}
    for sp in SPACINGS:
        bases = default_bases(cov, VARIABLES)
        bases[DRIFT_TERM] = drift_basis(clock, spacing_s=sp)
        designs[sp] = build_design({**cov, DRIFT_TERM: clock}, bases)
    return cov, clock, designs, chunked_folds(rows.size, 20, 3, seed), float(s.bin_size)


def run_cell(spec: dict) -> dict:
    """Simulate one cell and label it with every drift spacing (and without the term)."""
    from threadpoolctl import threadpool_limits

    from encodex.compare.cell import ModelScorer, fold_spikes
    from encodex.compare.selection import select_variables
    from encodex.design import DRIFT_TERM
    from encodex.simulate import binned_counts
    from encodex.variables import VARIABLES, label
    from labels_at_the_edges import MIN_SPIKES

    t0 = time.process_time()
    cov, clock, designs, folds, bin_size = scenario(spec["trajectory"])
    rng = np.random.default_rng(spec["seed"])
    y = binned_counts(cov, clock, bin_size, spec["truth"], rng, strength=spec["strength"],
                      mean_rate_hz=spec["rate_hz"], modulation=spec["modulation"],
                      drift_tau_s=spec["tau"])
    labels = {}
    offset = np.full(y.size, np.log(bin_size))
    with threadpool_limits(limits=1):
        for sp, design in designs.items():
            name = "off" if sp is None else f"{sp:g} s"
            if y.sum() < MIN_SPIKES:
                labels[name] = None
                continue
            scorer = ModelScorer(design, y, offset, folds,
                                 nuisance=() if sp is None else (DRIFT_TERM,))
            labels[name] = label(select_variables(
                VARIABLES, scorer, fold_weights=fold_spikes(y, folds)).chosen)
    return dict(spec, labels=labels, pipelines=list(labels), n_spikes=int(y.sum()),
                cpu_s=time.process_time() - t0)


def plan(n_null: int, n_pow: int) -> list[dict]:
    from labels_at_the_edges import TUNED_TYPES

    specs = []
    for tau in TAUS:
        point = "steady x2 / 20 min" if tau is None else f"wander tau {tau:g} s"
        for i in range(n_null):
            specs.append({"part": "null", "point": point, "tau": tau, "truth": [],
                          "strength": 0.0, "modulation": "drift"})
    for i in range(n_pow):
        specs.append({"part": "strength", "point": 0.5, "tau": None,
                      "truth": list(TUNED_TYPES[i % len(TUNED_TYPES)]), "strength": 0.5,
                      "modulation": "poisson"})
    for i, s in enumerate(specs):
        s.update(seed=30_000 + i, trajectory=200 + i % 2,
                 rate_hz=1.0 + 3.0 * ((i * 0.618034) % 1.0))
    return specs


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--null-cells", type=int, default=60, help="untuned cells per drift kind")
    p.add_argument("--power-cells", type=int, default=54, help="weakly tuned cells")
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--cells-out", default=None, help="write every cell's result (JSON lines)")
    a = p.parse_args(argv)

    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from _cells import import_worker, run_cells
    from labels_at_the_edges import summarise, table

    t0 = time.time()
    cells = run_cells(import_worker("drift_basis_size"), plan(a.null_cells, a.power_cells),
                      a.jobs, a.cells_out)
    summary = summarise(sorted(cells, key=lambda c: c["seed"]))
    print(json.dumps({"benchmark": "drift_basis_size", "n_cells": len(cells),
                      "wall_s": round(time.time() - t0, 1), **summary}))
    print(table(summary))


if __name__ == "__main__":
    main()
