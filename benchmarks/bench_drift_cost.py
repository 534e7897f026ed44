"""CPU cost per cell of the current defaults against earlier ones (drift term, folds, test).

The same simulated cells (``encodex.simulate``: the built-in cell types at 1-4 Hz, one 60 min
environment, 20 ms bins, all five variables) are labelled with the defaults of a run
(``encodex.population.work.analyse_unit``) under several settings, cell by cell in turn
(interleaved, so that load on this shared machine hits every variant alike):

- ``new``: the defaults of this version (drift term, sign-flip step test, 20 folds);
- ``k10``: the same with 10 folds (the defaults before the fold count changed);
- ``nodrift``: the defaults without the drift term (``--no-drift``);
- ``double``: the defaults with X'WX in double precision (``--gram-precision double``);
- ``old``: no drift term, Wilcoxon with Bonferroni, 10 folds (the defaults before the drift
  term).

CPU seconds per cell (process time, one thread) are compared as ratios in the same run. The
whole-job time of ``bench_full_job.py`` scales by about these ratios.

Usage::

    nice -n 10 /work/venv/bin/python benchmarks/bench_drift_cost.py [--cells 6] [--minutes 60]
"""

from __future__ import annotations

import argparse
import json

import numpy as np

#: Settings compared (keyword arguments of RunSettings).
VARIANTS = {"new": {}, "k10": {"folds": 10}, "nodrift": {"drift": False},
            "double": {"gram_precision": "double"},
            "old": {"drift": False, "correction": "bonferroni", "folds": 10}}


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=6)
    p.add_argument("--minutes", type=float, default=60.0)
    p.add_argument("--variants", default=",".join(VARIANTS),
                   help=f"comma-separated, from {', '.join(VARIANTS)}; ratios to the first")
    a = p.parse_args(argv)

    from encodex.population.run import _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit, environment_design
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    names = a.variants.split(",")
    rec, truth = simulate_recording(seed=7, n_cells=a.cells, duration_s=a.minutes * 60,
                                    environments=("box",))
    session = build_session(rec, bin_size=0.02)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == 0))
    works = {}
    for name in names:
        rs = RunSettings(**VARIANTS[name])
        env, _ = _environment_work(session, "box", rs, name)
        environment_design(env)  # built once per environment in a run: not counted per cell
        works[name] = (env, rs)
    secs = {n: [] for n in names}
    labels = {n: [] for n in names}
    for unit in session.unit_ids:
        y = session.unit_counts(unit)[rows]
        for name in names:
            env, rs = works[name]
            o = analyse_unit(env, unit, y, rs)
            secs[name].append(o.seconds)
            labels[name].append(o.record["cell"]["variables"])
    out = {n: {"cpu_s_per_cell": round(float(np.mean(secs[n])), 3), "labels": labels[n]}
           for n in names}
    first = names[0]
    record = {"benchmark": "defaults_cost", "cells": a.cells, "minutes": a.minutes,
              "truth": list(truth["variables"]), **out,
              "ratios_to_" + first: {n: round(out[n]["cpu_s_per_cell"]
                                              / out[first]["cpu_s_per_cell"], 3) for n in names}}
    print(json.dumps(record))
    print(f"| settings | CPU s per cell ({a.minutes:g} min, 20 ms) | ratio to {first} |\n"
          "|---|---|---|")
    for n in names:
        print(f"| {n} | {out[n]['cpu_s_per_cell']} | "
              f"{record['ratios_to_' + first][n]} |")


if __name__ == "__main__":
    main()
