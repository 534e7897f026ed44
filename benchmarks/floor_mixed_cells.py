"""What the effect-size floor costs on mixed cells with a weak second variable (not timed).

The floor of forward steps after the first (``min_step_gain``, :mod:`encodex.compare.selection`)
removes variables that add only a sliver of held-out information. A cell that carries a
second variable much more weakly than its first is exactly such a case. Simulated here
(``encodex.simulate.binned_counts`` with ``strengths``): two-variable cells (position+speed,
heading+speed, position+heading, speed+time in turn) whose second variable modulates the log
rate ``--second`` times as deeply as the first (built-in strength 1), 1-4 Hz, 30 and 60 min
environments (the trajectories of ``labels_at_the_edges.py``, 50 ms bins, 20 folds, drift
term, sign-flip test), labelled with the floor at 0, 1% and 2% on the same fits.

Usage::

    nice -n 10 .venv/bin/python benchmarks/floor_mixed_cells.py --cells 24 --jobs 2

Prints one JSON record and a table: exact label sets and cells with an extra variable, per
length and floor, and the share of the current model's information the second variable added.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

FLOORS = (0.0, 0.01, 0.02)
PAIRS = (("position", "speed"), ("heading", "speed"), ("position", "heading"), ("speed", "time"))


def run_cell(spec: dict) -> dict:
    from threadpoolctl import threadpool_limits

    from encodex.compare.cell import ModelScorer, fold_spikes
    from encodex.compare.selection import select_variables
    from encodex.design import DRIFT_TERM
    from encodex.simulate import binned_counts
    from encodex.variables import VARIABLES, label
    from labels_at_the_edges import scenario

    t0 = time.process_time()
    cov, clock, design, folds, _, bin_size = scenario(spec["duration_s"], None,
                                                      spec["trajectory"])
    first, second = spec["truth"]
    y = binned_counts(cov, clock, bin_size, spec["truth"], np.random.default_rng(spec["seed"]),
                      mean_rate_hz=spec["rate_hz"], strengths={second: spec["second"]})
    offset = np.full(y.size, np.log(bin_size))
    labels, share = {}, None
    with threadpool_limits(limits=1):
        scorer = ModelScorer(design, y, offset, folds[20], nuisance=(DRIFT_TERM,))
        for floor in FLOORS:
            sel = select_variables(VARIABLES, scorer, min_step_gain=floor,
                                   fold_weights=fold_spikes(y, folds[20]))
            labels[f"{floor:g}"] = label(sel.chosen)
            if floor == 0.0 and len(sel.steps) > 1 and sel.steps[0].mean_improvement > 0:
                share = sel.steps[1].mean_improvement / sel.steps[0].mean_improvement
    return dict(spec, labels=labels, second_share=share, cpu_s=time.process_time() - t0)


def plan(n: int, second: float) -> list[dict]:
    specs = []
    for duration in (1800.0, 3600.0):
        for i in range(n):
            specs.append({"duration_s": duration, "trajectory": 100 + i % 2,
                          "truth": list(PAIRS[i % len(PAIRS)]), "second": second,
                          "rate_hz": 1.0 + 3.0 * ((i * 0.618034) % 1.0),
                          "seed": 400_000 + len(specs)})
    return specs


def summarise(cells: list[dict]) -> dict:
    from encodex.report.tables import wilson_interval
    from encodex.variables import parse_label

    out = {}
    for minutes in sorted({c["duration_s"] / 60 for c in cells}):
        cs = [c for c in cells if c["duration_s"] / 60 == minutes]
        row = {}
        for floor in FLOORS:
            key = f"{floor:g}"
            got = [set(parse_label(c["labels"][key])) for c in cs]
            exact = sum(g == set(c["truth"]) for g, c in zip(got, cs))
            extra = sum(bool(g - set(c["truth"])) for g, c in zip(got, cs))
            lo, hi = wilson_interval(exact, len(cs))
            row[key] = {"exact": exact, "extra": extra, "n": len(cs),
                        "ci95": [round(lo, 3), round(hi, 3)]}
        shares = [c["second_share"] for c in cs if c["second_share"] is not None]
        row["second_share_quartiles"] = [round(float(q), 4) for q in
                                         np.percentile(shares, [0, 25, 50, 75, 100])]
        out[f"{minutes:g}"] = row
    return out


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=24, help="cells per length")
    p.add_argument("--second", type=float, default=0.25,
                   help="strength of the second variable relative to the first")
    p.add_argument("--jobs", type=int, default=2)
    a = p.parse_args(argv)

    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from _cells import import_worker, run_cells

    t0 = time.time()
    cells = run_cells(import_worker("floor_mixed_cells"), plan(a.cells, a.second), a.jobs)
    summary = summarise(cells)
    print(json.dumps({"benchmark": "floor_mixed_cells", "second": a.second,
                      "cells": len(cells), "wall_s": round(time.time() - t0, 1),
                      "cpu_s": round(sum(c["cpu_s"] for c in cells), 1), **summary}))
    print("| minutes | floor | exact sets | with an extra variable |\n|---|---|---|---|")
    for minutes, row in summary.items():
        for floor in FLOORS:
            r = row[f"{floor:g}"]
            print(f"| {minutes} | {floor:g} | {r['exact']}/{r['n']} [{r['ci95'][0]}, "
                  f"{r['ci95'][1]}] | {r['extra']}/{r['n']} |")
    for minutes, row in summary.items():
        print(f"second variable's share of the first's information, {minutes} min "
              f"(min, quartiles, max): {row['second_share_quartiles']}")


if __name__ == "__main__":
    main()
