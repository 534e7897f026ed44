"""Calibration and power of the goodness-of-fit checks through the whole fit (not a test).

Simulates a population with ``encodex.simulate`` (spikes drawn from an inhomogeneous Poisson
rate given behaviour, one environment) and fits it twice with ``run_population``:

1. every variable available: for cells labelled with their true variables the chosen model is
   correctly specified, so about 95% should lie inside the KS band and about 5% should show
   dispersion or history structure at p < 0.05 (the fitted rate is estimated, so a small excess
   is expected);
2. only heading and speed: cells carrying position, distance or time are then described by a
   wrong model; the share outside the band measures the power of the checks.

Prints one JSON line and a table. Usage::

    .venv/bin/python benchmarks/goodness_calibration.py [--cells 80] [--duration 1800]
        [--jobs 2] [--seed 0]
    .venv/bin/python benchmarks/goodness_calibration.py --quick   # 24 cells x 600 s
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path


sys.path.insert(0, str(Path(__file__).resolve().parent))
from _peers import emit, machine  # noqa: E402


def _rates(cells, p_level=0.05) -> dict:
    from encodex.report.goodness import within_band

    inside = within_band(cells["ks_within_band"]).dropna().astype(bool)
    return {"n": int(inside.size),
            "within_band": float(inside.mean()) if inside.size else float("nan"),
            "dispersion_rejected": float((cells["dispersion_p"] < p_level).mean()),
            "history_rejected": float((cells["history_p"] < p_level).mean()),
            "median_dispersion": float(cells["dispersion"].median()),
            "median_history_ratio": float(cells["history_ratio"].median())}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=80)
    p.add_argument("--duration", type=float, default=1800.0)
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--quick", action="store_true", help="24 cells x 600 s")
    a = p.parse_args(argv)
    if a.quick:
        a.cells, a.duration = 24, 600.0

    from encodex.population import run_population
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, truth = simulate_recording(seed=a.seed, n_cells=a.cells, duration_s=a.duration,
                                    environments=("box",), p_silent=0.0)
    session = build_session(rec, bin_size=0.02)
    t = truth.set_index("unit")["variables"]
    t0 = time.time()
    full = run_population(session, None, jobs=a.jobs, seed=a.seed).cells
    t_full = time.time() - t0
    ok = full[full["status"] == "ok"]
    right = ok[ok["variables"].to_numpy() == t.loc[ok["unit"]].to_numpy()]
    t0 = time.time()
    part = run_population(session, None, jobs=a.jobs, seed=a.seed,
                          variables=("heading", "speed")).cells
    t_part = time.time() - t0
    ok_p = part[part["status"] == "ok"]
    missing = ok_p[[bool(set(str(t.loc[u]).split("+")) & {"position", "distance", "time"})
                    for u in ok_p["unit"]]]
    res = {"benchmark": "goodness_calibration", "cells": a.cells, "duration_s": a.duration,
           "seed": a.seed, "jobs": a.jobs, "machine": machine(),
           "correct_model": _rates(right), "missing_variable": _rates(missing),
           "correct_model_by_label": {lab: _rates(g) for lab, g in right.groupby("variables")},
           "wall_s": {"all_variables": round(t_full, 1), "heading_speed": round(t_part, 1)}}

    def table(r):
        rows = ["| cells | n | inside KS band | dispersion p<0.05 | history p<0.05 | "
                "median dispersion | median pairs obs/exp |", "|---|---|---|---|---|---|---|"]
        for key, name in (("correct_model", "label = truth (model correct)"),
                          ("missing_variable", "true variable not tested (model wrong)")):
            x = r[key]
            rows.append(f"| {name} | {x['n']} | {x['within_band']:.2f} | "
                        f"{x['dispersion_rejected']:.2f} | {x['history_rejected']:.2f} | "
                        f"{x['median_dispersion']:.2f} | {x['median_history_ratio']:.2f} |")
        for lab, x in r["correct_model_by_label"].items():
            rows.append(f"| model correct, label {lab} | {x['n']} | {x['within_band']:.2f} | "
                        f"{x['dispersion_rejected']:.2f} | {x['history_rejected']:.2f} | "
                        f"{x['median_dispersion']:.2f} | {x['median_history_ratio']:.2f} |")
        return "\n".join(rows)

    return emit(res, table)


if __name__ == "__main__":
    raise SystemExit(main())
