"""CPU per cell of this round's two changes to the smoothness selection, on the same cells.

- ``traces by one pass``: the weight-derivative traces of the exact LAML gradient from one pass
  over the bins (``Design.row_quadratic_forms``) instead of one X'WX pass per penalty (the
  previous implementation is kept below, for this comparison only);
- ``both``: and each model's new terms warm-started from an earlier fit holding them,
  smoothing parameters included (the rule of ``encodex.compare.cell.warm_start_fits`` when
  this was measured, kept below as ``old_warm_start_fits``; the package now starts from the
  parent only, see that function).

Cells are simulated (``encodex.simulate``, one environment, 20 ms bins, default settings) and
labelled through ``analyse_unit`` by each variant in turn (interleaved). Prints the labels
and a table of CPU seconds per cell with ratios to the previous implementation.

Usage::

    nice -n 10 .venv/bin/python benchmarks/bench_cell_levers.py CELLS MINUTES
"""

import json
import sys

import numpy as np

import encodex.compare.cell as C
import encodex.fit.smoothing as S
from encodex.fit.smoothing import NEGLIGIBLE_TRACE
from encodex.population.work import analyse_unit
from _cells import box_environment


def old_traces(design, w, gram, a_inv, dtheta):
    """The previous implementation: one X'WX pass per penalty (dH is linear in the weights)."""
    eta = design.linear_predictors(dtheta)
    out = np.zeros(dtheta.shape[0])
    for k in range(dtheta.shape[0]):
        scale = float(np.max(np.abs(eta[:, k] * (w > 0)), initial=0.0))
        if scale * a_inv.shape[0] <= NEGLIGIBLE_TRACE:
            continue
        c = 0.5 / scale
        dh = (design.weighted_gram(w * (1.0 + c * eta[:, k])) - gram) / c
        out[k] = float(np.sum(a_inv * dh))
    return out


def old_warm_start_fits(model, full_fits):
    """The earlier rule: the parent, then for each new term the largest fit holding it."""
    parents = [m for m in full_fits if set(m) < set(model)]
    fits = [full_fits[max(parents, key=len)]] if parents else []
    covered = set(max(parents, key=len)) if parents else set()
    for v in model:
        holders = [m for m in full_fits if v in m]
        if v not in covered and holders:
            best = max(holders, key=lambda m: (len(set(m) & set(model)), -len(m)))
            fits.append(full_fits[best])
            covered |= set(best)
    return tuple(fits) if fits else None


NEW_TRACES = S._weight_derivative_traces
PARENT_ONLY = C.warm_start_fits
VARIANTS = {"before (trace per penalty, parent-only start)": (old_traces, PARENT_ONLY),
            "traces by one pass": (NEW_TRACES, PARENT_ONLY),
            "both": (NEW_TRACES, old_warm_start_fits)}


def main(n: int, minutes: float) -> None:
    s, _, rows, env, rs = box_environment(n, minutes, seed=17, name="x")
    tot = {k: 0.0 for k in VARIANTS}
    labels_by_unit = {}
    for u in s.unit_ids:
        y = s.unit_counts(u)[rows]
        labels = []
        for name, (fn, warm) in VARIANTS.items():
            S._weight_derivative_traces, C.warm_start_fits = fn, warm
            o = analyse_unit(env, u, y, rs)
            tot[name] += o.seconds
            labels.append(o.record["cell"]["variables"])
        labels_by_unit[u] = labels
    S._weight_derivative_traces, C.warm_start_fits = NEW_TRACES, PARENT_ONLY
    first = next(iter(tot.values()))
    print(json.dumps({"benchmark": "cell_levers", "cells": n, "minutes": minutes,
                      "cpu_s_per_cell": {k: round(v / n, 3) for k, v in tot.items()},
                      "ratio_to_before": {k: round(v / first, 3) for k, v in tot.items()},
                      "labels": labels_by_unit}))
    print("| variant | CPU s per cell | ratio to before |\n|---|---|---|")
    for k, v in tot.items():
        print(f"| {k} | {v / n:.2f} | {v / first:.3f} |")


if __name__ == "__main__":
    main(int(sys.argv[1]), float(sys.argv[2]))
