"""CPU cost of the new defaults (drift term + sign-flip step test) against the previous ones.

The same simulated cells (``encodex.simulate``: the built-in cell types at 1-4 Hz, one 60 min
environment, 20 ms bins, all five variables, 10 folds) are labelled with the defaults of a run
(``encodex.population.work.analyse_unit``) with ``drift=True, correction="signflip"`` and with
``drift=False, correction="bonferroni"``; CPU seconds per cell (process time, one thread) are
compared as a ratio in the same run. The whole-job time of ``bench_full_job.py`` scales by
about this ratio.

Usage::

    nice -n 10 /work/venv/bin/python benchmarks/bench_drift_cost.py [--cells 6] [--minutes 60]
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=6)
    p.add_argument("--minutes", type=float, default=60.0)
    a = p.parse_args(argv)

    from encodex.population.run import _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit, environment_design
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, truth = simulate_recording(seed=7, n_cells=a.cells, duration_s=a.minutes * 60,
                                    environments=("box",))
    session = build_session(rec, bin_size=0.02)
    k = 0
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == k))
    out = {}
    for name, rs in (("new", RunSettings()),
                     ("old", RunSettings(drift=False, correction="bonferroni"))):
        env, _ = _environment_work(session, "box", rs, name)
        environment_design(env)  # built once per environment in a run: not counted per cell
        secs, labels = [], []
        for unit in session.unit_ids:
            y = session.unit_counts(unit)[rows]
            o = analyse_unit(env, unit, y, rs)
            secs.append(o.seconds)
            labels.append(o.record["cell"]["variables"])
        out[name] = {"cpu_s_per_cell": round(float(np.mean(secs)), 3), "labels": labels}
    record = {"benchmark": "drift_cost", "cells": a.cells, "minutes": a.minutes,
              "truth": list(truth["variables"]), **out,
              "ratio_new_over_old": round(out["new"]["cpu_s_per_cell"]
                                          / out["old"]["cpu_s_per_cell"], 3)}
    print(json.dumps(record))
    print(f"| defaults | CPU s per cell ({a.minutes:g} min, 20 ms) |\n|---|---|")
    for n in ("new", "old"):
        print(f"| {n} | {out[n]['cpu_s_per_cell']} |")
    print(f"ratio new / old: {record['ratio_new_over_old']}")


if __name__ == "__main__":
    main()
