"""Bytes a population run moves between the client and its workers, and the cluster on paper.

Measured (pickled sizes, the way joblib and dask ship arguments and results) on a simulated
single-environment session of ``--units`` units x ``--minutes``:

* per worker, once: the environment's work description (``EnvironmentWork``: covariates on
  the usable bins and the folds), from which each worker builds its design once
  (``encodex.population.work.environment_design``, cached per worker);
* per unit, to the worker: the spike counts as sent (``SpikeColumn``: the bins with spikes)
  and, for comparison, as a bins-long int64 array;
* per unit, back: the outcome (table rows, response curves, occupancy map, chosen fit).

Then, on paper, a 2,000-unit x 2 h session (``--paper-units``, ``--paper-minutes``) on
``--paper-workers`` 64 workers: per-worker bytes scale with the bins, per-unit bytes with the
bins (counts) or not at all (curves, fit); each worker's resident memory is stated from
the design's arrays at that size.

Output: ONE line of JSON on stdout, then a readable table.

Usage::

    .venv/bin/python benchmarks/bench_transfer.py                # 6 units x 60 min
    .venv/bin/python benchmarks/bench_transfer.py --quick        # 3 units x 10 min
"""

from __future__ import annotations

import argparse
import datetime as _dt
import pickle
import statistics
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import _peers  # noqa: E402  (benchmark helper next to this file)
from bench_population import make_session  # noqa: E402


def size(obj) -> int:
    return len(pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL))


def design_bytes(design) -> dict:
    """Bytes of the arrays a worker keeps per environment design (blocks, CSR, Gram plans)."""
    blocks = sum(t.block.values.nbytes + t.block.columns.nbytes for t in design.terms)
    csr = sum(m.data.nbytes + m.indices.nbytes + m.indptr.nbytes
              for m in design.__dict__.get("_term_csr", {}).values())
    plans = sum(p.columns_by_row.nbytes + p.order.nbytes
                for p in design.__dict__.get("_gram_plans", {}).values())
    return {"blocks": blocks, "csr": csr, "gram_plans": plans,
            "n_plans": len(design.__dict__.get("_gram_plans", {}))}


def run(args) -> dict:
    from scipy import sparse

    from encodex.population.run import _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import SpikeColumn, analyse_unit, environment_design

    session, _ = make_session(args.units, args.minutes * 60.0, args.seed)
    rs = RunSettings()
    name = session.environments[0]
    env, _ = _environment_work(session, name, rs, "transfer")
    k = session.environments.index(name)
    rows = np.flatnonzero(np.asarray(session.valid) & (np.asarray(session.environment) == k))
    counts = sparse.csc_array(session.counts)[rows, :].tocsc()
    per_unit = []
    for unit in session.unit_ids:
        col = SpikeColumn.from_csc(counts, session.unit_index(unit))
        y = col.toarray()
        oc = analyse_unit(env, unit, col, rs)
        per_unit.append({"unit": unit, "label": oc.record["cell"]["variables"],
                         "spike_bins": int(col.bins.size), "spikes": int(y.sum()),
                         "counts_sent": size(col), "counts_int64": size(y),
                         "outcome": size(oc), "fit": size(oc.fit), "arrays": size(oc.arrays),
                         "record": size(oc.record)})
    design = environment_design(env)
    n = env.n_rows
    worker_once = size(env)
    mem = design_bytes(design)
    # --- on paper: scale with the bins -----------------------------------------------------
    scale = args.paper_minutes / args.minutes
    n_paper = int(round(n * scale))
    # Means over the measured units (a population mixes silent and richly tuned cells).
    rate_bins = statistics.fmean(u["spike_bins"] / n for u in per_unit)
    sent_per_spike_bin = statistics.fmean(
        (u["counts_sent"] - 200) / max(u["spike_bins"], 1) for u in per_unit)
    back = statistics.fmean(u["outcome"] for u in per_unit)
    paper_in = rate_bins * n_paper * sent_per_spike_bin + 200
    paper_once = worker_once * scale
    paper_total = (args.paper_workers * paper_once
                   + args.paper_units * (paper_in + back))
    return {
        "benchmark": "transfer",
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "machine": _peers.machine(), "units": args.units, "minutes": args.minutes,
        "n_bins": n, "worker_once_bytes": worker_once, "per_unit": per_unit,
        "design_arrays_bytes": mem,
        "paper": {"units": args.paper_units, "minutes": args.paper_minutes,
                  "workers": args.paper_workers, "n_bins": n_paper,
                  "spike_bin_fraction": rate_bins,
                  "worker_once_bytes": paper_once,
                  "per_unit_in_bytes": paper_in,
                  "per_unit_in_bytes_int64": 8.0 * n_paper,
                  "per_unit_back_bytes": back,
                  "per_unit_total_bytes": paper_in + back + args.paper_workers * paper_once
                  / args.paper_units,
                  "total_bytes": paper_total,
                  "worker_design_arrays_bytes": sum(v for k_, v in mem.items()
                                                    if k_ != "n_plans") * scale},
    }


def table(r: dict) -> str:
    mb = 1e-6
    L = [f"bytes moved, {r['date_utc']}; {r['units']} units x {r['minutes']:g} min "
         f"({r['n_bins']} bins)", "",
         f"per worker, once: environment (covariates + folds) {r['worker_once_bytes'] * mb:.2f} MB; "
         "design arrays kept by the worker: " + ", ".join(
             f"{k} {v * mb:.0f} MB" for k, v in r["design_arrays_bytes"].items()
             if k != "n_plans") + f" ({r['design_arrays_bytes']['n_plans']} Gram plans)", "",
         "| unit | label | spike bins | counts sent KB | as int64 KB | outcome back KB | "
         "of which fit KB |", "|---|---|---|---|---|---|---|"]
    for u in r["per_unit"]:
        L.append(f"| {u['unit']} | {u['label']} | {u['spike_bins']} | {u['counts_sent'] / 1e3:.0f} "
                 f"| {u['counts_int64'] / 1e3:.0f} | {u['outcome'] / 1e3:.0f} | "
                 f"{u['fit'] / 1e3:.0f} |")
    p = r["paper"]
    L += ["", f"on paper: {p['units']} units x {p['minutes']:g} min ({p['n_bins']} bins) on "
          f"{p['workers']} workers: once per worker {p['worker_once_bytes'] * mb:.0f} MB; per unit "
          f"{p['per_unit_in_bytes'] * mb:.2f} MB in (int64 would be "
          f"{p['per_unit_in_bytes_int64'] * mb:.2f} MB) + {p['per_unit_back_bytes'] * mb:.2f} MB "
          f"back; with the per-worker part shared out, {p['per_unit_total_bytes'] * mb:.2f} MB "
          f"per unit, {p['total_bytes'] * 1e-9:.1f} GB in all; design arrays per worker "
          f"{p['worker_design_arrays_bytes'] * mb:.0f} MB"]
    return "\n".join(L)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--units", type=int, default=6, help="units measured (default 6)")
    ap.add_argument("--minutes", type=float, default=60.0, help="session length (default 60)")
    ap.add_argument("--paper-units", type=int, default=2000)
    ap.add_argument("--paper-minutes", type=float, default=120.0)
    ap.add_argument("--paper-workers", type=int, default=64)
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--quick", action="store_true", help="3 units x 10 min")
    args = ap.parse_args(argv)
    if args.quick:
        args.units, args.minutes = 3, 10.0
    return _peers.emit(run(args), table)


if __name__ == "__main__":
    raise SystemExit(main())
