"""Label recovery on track and virtual-corridor sessions, and the ambiguity flags.

Simulates (``encodex.simulate_track``) a circular track, a virtual corridor with two gain
blocks and an open arena (``encodex.simulate``, one environment): separable designs; and a
shuttle track with traversal trials and a one-gain corridor: confounded designs. Runs
``run_population`` with the default settings and prints one JSON line and a table:

- exact labels on every cell of the separable designs (target >= 95%),
- direction dependence recovered among the cells that have it (target >= 90%),
- on confounded designs, the share of cells whose label holds a confounded variable that
  carry an ``ambiguous_with`` flag (target >= 90%), and the cells labelled with only the wrong
  member of a confounded pair and no flag (target 0),
- untuned cells labelled, on the track designs (target <= 5%).

Usage::

    python benchmarks/track_recovery.py [--quick] [--cells 40] [--duration 900] [--seeds 1 2]
        [--jobs 2] [--scenarios circular gain_corridor arena shuttle corridor]

``--quick``: 16 cells, 300 s, one seed (about a minute per scenario on a busy 2-core machine).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _peers import emit, machine  # noqa: E402

SEPARABLE = ("circular", "gain_corridor", "arena")
#: Confounded designs: (one side, other side, variables whose presence in a label makes the
#: label involve the confound). On the shuttle, distance is a function of position and
#: direction together, not of position alone: a label "position" does not involve it.
CONFOUNDED = {"shuttle": ({"distance"}, {"position", "direction"}, {"distance", "direction"}),
              "corridor": ({"distance"}, {"position"}, {"distance", "position"})}


def simulate(scenario: str, seed: int, cells: int, duration: float):
    from encodex.session import build_session

    if scenario == "arena":
        from encodex.simulate import simulate_recording

        rec, truth = simulate_recording(seed=seed, n_cells=cells, duration_s=duration,
                                        environments=("arena",))
        truth = truth[~truth["silent"]]
    else:
        from encodex.simulate_track import simulate_track_recording

        rec, truth = simulate_track_recording(scenario, seed=seed, n_cells=cells,
                                              duration_s=duration)
    return build_session(rec), truth


def score(scenario: str, cells: pd.DataFrame, truth: pd.DataFrame) -> dict:
    c = cells.merge(truth[["unit", "variables"]], on="unit", suffixes=("", "_true"))
    c = c[c["status"] == "ok"]
    label = c["variables"].fillna("").replace("", "none")
    true = c["variables_true"]
    flag = c["ambiguous_with"].fillna("").astype(str) != ""
    sets = label.map(lambda s: set() if s == "none" else set(s.split("+")))
    tsets = true.map(lambda s: set() if s == "none" else set(s.split("+")))
    out = {"scenario": scenario, "n_cells": int(len(c)),
           "exact": float(np.mean(label == true)),
           "n_untuned": int(np.sum(true == "none")),
           "untuned_labelled": float(np.mean(label[true == "none"] != "none"))
           if np.any(true == "none") else float("nan")}
    has_dir = tsets.map(lambda s: "direction" in s)
    out["n_direction"] = int(has_dir.sum())
    for u, lab, tru, fl in zip(c["unit"], label, true, c["ambiguous_with"].fillna("")):
        if lab != tru:
            print(f"  {scenario} {u}: true {tru}, label {lab}, flags {fl!r}", file=sys.stderr)
    out["direction_recovered"] = (float(np.mean([("direction" in s) for s in sets[has_dir]]))
                                  if has_dir.any() else float("nan"))
    if scenario in CONFOUNDED:
        a, b, members = CONFOUNDED[scenario]
        involved = sets.map(lambda s: bool(s & members))
        out["n_involved"] = int(involved.sum())
        out["involved_flagged"] = float(np.mean(flag[involved])) if involved.any() else np.nan
        # the wrong member only: truth holds one side, the label only the other, no flag
        wrong = [(t & a and s & b and not s & a) or (t & b and s & a and not s & b)
                 for s, t in zip(sets, tsets)]
        out["wrong_member_unflagged"] = int(np.sum(np.array(wrong, dtype=bool) & ~flag))
        out["exact_or_flagged"] = float(np.mean((label == true) | flag))
    return out


def run(args) -> dict:
    import encodex

    rows, t0 = [], time.time()
    for seed in args.seeds:
        for scenario in args.scenarios:
            session, truth = simulate(scenario, seed, args.cells, args.duration)
            t = time.time()
            res = encodex.run_population(session, jobs=args.jobs)
            r = score(scenario, res.cells, truth)
            r.update(seed=seed, seconds=round(time.time() - t, 1))
            rows.append(r)
            print(r, file=sys.stderr, flush=True)
    df = pd.DataFrame(rows)
    summary = {}
    for scenario, g in df.groupby("scenario"):
        w = g["n_cells"]
        s = {"cells": int(w.sum()), "exact": float(np.average(g["exact"], weights=w))}
        nu = g["n_untuned"]
        if nu.sum():
            s["untuned_labelled"] = float(np.nansum(g["untuned_labelled"] * nu) / nu.sum())
        nd = g["n_direction"]
        if nd.sum():
            s["direction_recovered"] = float(np.nansum(g["direction_recovered"] * nd) / nd.sum())
        if "n_involved" in g and g["n_involved"].notna().any():
            ni = g["n_involved"]
            s["involved_flagged"] = float(np.nansum(g["involved_flagged"] * ni) / ni.sum())
            s["wrong_member_unflagged"] = int(g["wrong_member_unflagged"].sum())
        summary[scenario] = s
    return {"benchmark": "track_recovery", "settings": {"cells": args.cells,
            "duration_s": args.duration, "seeds": list(args.seeds), "jobs": args.jobs,
            "scenarios": list(args.scenarios)},
            "machine": machine(), "seconds": round(time.time() - t0, 1),
            "per_run": rows, "summary": summary}


def table(r: dict) -> str:
    lines = ["| scenario | cells | exact | direction recovered | untuned labelled | "
             "confounded-label cells flagged | wrong member, no flag |",
             "|---|---|---|---|---|---|---|"]

    def f(v):
        return "-" if v is None or (isinstance(v, float) and np.isnan(v)) else (
            f"{100 * v:.0f}%" if isinstance(v, float) else str(v))

    for sc, s in r["summary"].items():
        lines.append(f"| {sc} | {s['cells']} | {f(s['exact'])} | "
                     f"{f(s.get('direction_recovered'))} | {f(s.get('untuned_labelled'))} | "
                     f"{f(s.get('involved_flagged'))} | {f(s.get('wrong_member_unflagged'))} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=40)
    p.add_argument("--duration", type=float, default=900.0)
    p.add_argument("--seeds", type=int, nargs="+", default=[1, 2])
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--scenarios", nargs="+", default=[*SEPARABLE, *CONFOUNDED],
                   choices=[*SEPARABLE, *CONFOUNDED])
    p.add_argument("--quick", action="store_true")
    args = p.parse_args(argv)
    if args.quick:
        args.cells, args.duration, args.seeds = 16, 300.0, [1]
    return emit(run(args), table)


if __name__ == "__main__":
    raise SystemExit(main())
