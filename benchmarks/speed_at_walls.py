"""Speed cells that seem to carry position: the speed estimate at the walls (not a timed test).

Ground truth: the full job's recording (``encodex.simulate.simulate_recording``, one
environment, 60 min, 50 Hz tracking with 1 mm jitter, no dropouts). Its pure speed cells fire
at ``exp(slope * min(v, 0.4) / 0.4)`` of the animal's true speed ``v``, which the simulator
samples every 10 ms; the same seed redraws the same path, so each 20 ms bin's expected count
is the exact integral of the generating rate over the bin. Each cell is redrawn ``--draws``
times (fresh Poisson counts from that expectation) and analysed with the defaults of a run
(``encodex.population.work.analyse_unit``), with speed made in three ways:

- ``one-stage``: the velocity smoothed over 0.2 s, then its norm (encodex before two-stage
  speed: ``velocity_smoothing_s=0.2, speed_smoothing_s=0``);
- ``two-stage``: the velocity smoothed over 0.1 s, its norm over 0.2 s (the default);
- ``true``: the true speed, bin means of the simulator's samples (what no session has; the
  floor of what a speed estimate can do).

Reported: per way, the share of redrawn speed cells labelled with position (Wilson 95%
interval) and the relative error of the bins' speed against the truth by distance to the
nearest wall. Everything else is identical between the ways (cells, draws, folds, design
other than the speed column).

Usage::

    nice -n 10 .venv/bin/python benchmarks/speed_at_walls.py --draws 2 --jobs 2   # ~8 min

Prints one JSON record, then markdown tables.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

import numpy as np

WAYS = {"one-stage": dict(velocity_smoothing_s=0.2, speed_smoothing_s=0.0),
        "two-stage": {}, "true": {}}
WALL_BANDS = ((0.0, 0.02), (0.02, 0.05), (0.05, 0.1), (0.2, 0.5))


@dataclasses.dataclass(frozen=True)
class _Setup:
    seed: int
    minutes: float


_CACHE: dict = {}


def _recording(setup: _Setup):
    """Recording, truth, the simulator's behaviour and each bin's true speed (cached)."""
    if setup not in _CACHE:
        from encodex.simulate import _simulate_behaviour, simulate_recording

        dur = setup.minutes * 60.0
        rec, truth = simulate_recording(seed=setup.seed, n_cells=300, duration_s=dur,
                                        environments=("room_a",), dropouts=False)
        # the behaviour is the first draw of the simulation's stream (same seed, same path)
        beh = _simulate_behaviour(np.random.default_rng(setup.seed), dur, ("room_a",), 1.0,
                                  30.0, (20.0, 60.0))
        _CACHE[setup] = (rec, truth, beh)
    return _CACHE[setup]


def _bin_of_sample(beh, n_bins):
    """20 ms bin of each 10 ms sample: bin k holds samples 2k and 2k + 1 (bins start at 0)."""
    return np.clip(np.round(beh.t / 0.01).astype(int) // 2, 0, n_bins - 1)


def _session(setup: _Setup, way: str):
    key = (setup, way)
    if key not in _CACHE:
        from encodex.session import build_session

        rec, _, beh = _recording(setup)
        s = build_session(rec, bin_size=0.02, **WAYS[way])
        if way == "true":
            idx = _bin_of_sample(beh, s.n_bins)
            true = np.bincount(idx, beh.speed, s.n_bins) / np.bincount(idx, None, s.n_bins)
            s = dataclasses.replace(s, covariates={**s.covariates, "speed": true})
        _CACHE[key] = s
    return _CACHE[key]


def _work(setup: _Setup, way: str):
    key = ("work", setup, way)
    if key not in _CACHE:
        from encodex.population.run import _environment_work
        from encodex.population.settings import RunSettings
        from encodex.population.work import environment_design

        s = _session(setup, way)
        # a token of its own per way: workers cache designs by token
        env, _ = _environment_work(s, "room_a", RunSettings(), f"speed-at-walls-{way}")
        environment_design(env)
        rows = np.flatnonzero(np.asarray(s.valid) & (np.asarray(s.environment) == 0))
        _CACHE[key] = (env, rows)
    return _CACHE[key]


def _expected_counts(setup: _Setup, unit: str, rows: np.ndarray) -> np.ndarray:
    """Exact expected count of each analysed bin under the simulator's rate of ``unit``."""
    from encodex.simulate import _log_modulation

    rec, truth, beh = _recording(setup)
    row = truth.set_index("unit").loc[unit]
    inside = np.flatnonzero(beh.env == 0)
    g = np.exp(_log_modulation(("speed",), {"speed_slope": row["speed_slope"]}, beh, inside))
    rate = row["mean_rate_hz"] * g / g.mean()  # as the simulator normalises it
    n_bins = int(rows.max()) + 2
    idx = _bin_of_sample(beh, n_bins)[inside]
    return np.bincount(idx, rate * 0.01, n_bins)[rows]


def analyse(setup: _Setup, unit: str, draw: int, way: str) -> dict:
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit

    env, rows = _work(setup, way)
    lam = _expected_counts(setup, unit, rows)
    y = np.random.default_rng([setup.seed, int(unit[1:]), draw]).poisson(lam)
    cell = analyse_unit(env, unit, y, RunSettings()).record["cell"]
    return {"unit": unit, "draw": draw, "way": way, "label": cell["variables"],
            "path": cell["selection_path"], "spikes": int(y.sum())}


def wall_errors(setup: _Setup) -> dict:
    """Relative error of each way's speed by distance to the nearest wall (moving bins)."""
    _, _, beh = _recording(setup)
    out = {}
    for way in ("one-stage", "two-stage"):
        s = _session(setup, way)
        idx = _bin_of_sample(beh, s.n_bins)
        true = np.bincount(idx, beh.speed, s.n_bins) / np.bincount(idx, None, s.n_bins)
        pos = np.asarray(s.covariates["position"])
        speed = np.asarray(s.covariates["speed"])
        wall = np.min(np.column_stack([pos, 1.0 - pos]), axis=1)
        ok = np.asarray(s.valid) & (true > 0.05) & np.isfinite(speed)
        out[way] = {f"{lo:g}-{hi:g} m": float(speed[m].sum() / true[m].sum() - 1.0)
                    for lo, hi in WALL_BANDS
                    for m in [ok & (wall >= lo) & (wall < hi)]}
    return out


def _wilson(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (Wilson 1927, JASA 22:209)."""
    if n == 0:
        return (0.0, 1.0)
    p = k / n
    d = 1 + z * z / n
    c = (p + z * z / (2 * n)) / d
    h = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / d
    return (max(0.0, c - h), min(1.0, c + h))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--minutes", type=float, default=60.0, help="session length (default 60)")
    ap.add_argument("--draws", type=int, default=2, help="redraws per speed cell (default 2)")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    args = ap.parse_args(argv)
    from joblib import Parallel, delayed

    setup = _Setup(args.seed, args.minutes)
    t0 = time.perf_counter()
    _, truth, _ = _recording(setup)
    units = sorted(truth.loc[truth["variables"] == "speed", "unit"])
    # way by way: a worker keeps two designs (encodex.population.work), one per way in turn
    tasks = [(setup, u, d, w) for w in WAYS for u in units for d in range(args.draws)]
    # by reference, so that each worker keeps its cache of recordings, sessions and designs
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import speed_at_walls as me

    rows = Parallel(n_jobs=args.jobs, batch_size=1)(delayed(me.analyse)(*t) for t in tasks)
    summary = {}
    for way in WAYS:
        mine = [r for r in rows if r["way"] == way]
        k = sum("position" in r["label"].split("+") for r in mine)
        exact = sum(r["label"] == "speed" for r in mine)
        summary[way] = {"analysed": len(mine), "with_position": k, "exact": exact,
                        "share_with_position": k / len(mine),
                        "wilson95": _wilson(k, len(mine))}
    record = {"benchmark": "speed_at_walls", "seed": args.seed, "minutes": args.minutes,
              "speed_cells": len(units), "draws": args.draws, "summary": summary,
              "wall_relative_error": wall_errors(setup), "cells": rows,
              "seconds": time.perf_counter() - t0}
    print(json.dumps(record))
    print()
    print(f"{len(units)} pure speed cells x {args.draws} redraws, seed {args.seed}, "
          f"{args.minutes:g} min, {record['seconds']:.0f} s")
    print()
    print("| speed | analysed | labelled speed exactly | with position (95% interval) |")
    print("|---|---|---|---|")
    for way, s in summary.items():
        lo, hi = s["wilson95"]
        print(f"| {way} | {s['analysed']} | {s['exact']} | {s['with_position']} = "
              f"{s['share_with_position']:.3f} [{lo:.3f}, {hi:.3f}] |")
    print()
    bands = list(next(iter(record["wall_relative_error"].values())))
    print("| speed | " + " | ".join(f"wall {b}" for b in bands) + " |")
    print("|---|" + "---|" * len(bands))
    for way, errs in record["wall_relative_error"].items():
        print(f"| {way} | " + " | ".join(f"{errs[b]:+.3f}" for b in bands) + " |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
