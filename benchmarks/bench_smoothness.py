"""Smoothness selection: the start phase alone against start + Newton phase, speed and accuracy.

Problem: one simulated open-field session (:func:`_peers.make_problem`'s simulator, 20 ms
bins, the solver benchmark's basis sizes), the first ``--units`` units, each fitted with four
models of the forward selection (all five variables; position+speed; heading; speed+distance+
time). Every (unit, model) is fitted with:

* ``start`` -- the start phase alone (``FitOptions(max_newton=0)``: performance iteration,
  each round's working criterion maximised by Newton steps; until 2026-12-03 the generalised
  Fellner-Schall iteration, the selection before the Newton phase existed);
* ``newton`` -- the default: the start phase, then Newton steps on log lambda with the
  exact gradient of the criterion;
* ``newton_step_tol_1e-2`` -- the default with a five times tighter step tolerance;
* ``newton_loose_start`` -- the default with a looser start (``lambda_tol=0.1``), to see whether
  fewer start rounds pay;
* a reference optimum (Newton to ``gradient_tol=1e-8``; not timed).

Accuracy against the reference: largest ``|log lambda - log lambda_ref|`` over smoothing
parameters where the criterion is curved (``-d2V/drho^2 >= 0.05`` at the reference, i.e. the
parameter is determined), largest EDF difference per term, and the criterion gap
``V_ref - V``. Speed: median seconds over interleaved repeats, summed over the same fits; the
ratio ``newton / start`` is the cost of the exact optimum.

Run::

    PYTHONPATH=$PWD python benchmarks/bench_smoothness.py            # 30 min, 8 units
    PYTHONPATH=$PWD python benchmarks/bench_smoothness.py --quick    # 10 min, 4 units

Prints one line of JSON, then a table (results in benchmarks/RESULTS.md).
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _peers  # noqa: E402  (benchmark helper next to this file)

MODELS = (("position", "heading", "speed", "distance", "time"), ("position", "speed"),
          ("heading",), ("speed", "distance", "time"))

#: Curvature of the criterion in log lambda (``-d2V/drho^2``) above which a smoothing
#: parameter counts as determined by the data.
CURVED = 0.05


def _options():
    from encodex.fit import FitOptions

    return {"start": FitOptions(max_newton=0), "newton": FitOptions(),
            "newton_step_tol_1e-2": FitOptions(step_tol=1e-2),
            "newton_loose_start": FitOptions(lambda_tol=0.1)}


def _session(duration_s: float, seed: int):
    from encodex.design import build_design, default_bases
    from encodex.session import build_session
    from encodex.simulate import simulate_recording
    from encodex.variables import VARIABLES

    rec, _ = simulate_recording(seed=seed, n_cells=20, duration_s=duration_s,
                                environments=("room_a",), dropouts=False)
    session = build_session(rec, bin_size=_peers.BIN_SIZE).restrict(0)
    cov = {v: np.asarray(session.covariates[v]) for v in VARIABLES}
    design = build_design(cov, default_bases(cov, VARIABLES, sizes=_peers.SIZES))
    return session, design


def _accuracy(fit, ref, design, y, offset) -> dict:
    from encodex.fit.smoothing import PenaltyStructure, laml_derivatives

    mu = ref.predict(design, offset=offset)
    der = laml_derivatives(ref.theta, mu, design.weighted_gram(mu), design,
                           PenaltyStructure.of(design), ref.lambdas)
    curved = -np.diag(der.hessian) >= CURVED
    dlog = np.abs(np.log(fit.lambdas) - np.log(ref.lambdas))
    return {"max_dlog_lambda_curved": float(np.max(dlog[curved], initial=0.0)),
            "max_edf_diff": float(max(abs(fit.edf[k] - ref.edf[k]) for k in ref.edf)),
            "criterion_gap": float(ref.laml - fit.laml),
            "n_curved": int(curved.sum()), "n_penalties": int(curved.size)}


def run(args) -> dict:
    from threadpoolctl import threadpool_limits

    from encodex.fit import FitOptions, fit_poisson

    duration = args.duration or (600.0 if args.quick else 1800.0)
    n_units = args.units or (4 if args.quick else 8)
    repeats = args.repeats or (1 if args.quick else 3)
    options = _options()
    reference = FitOptions(gradient_tol=1e-8, step_tol=0.0, max_newton=60)
    rows = []
    with threadpool_limits(limits=1):
        session, design = _session(duration, args.seed)
        offset = float(np.log(session.bin_size))
        for unit in session.unit_ids[:n_units]:
            y = session.unit_counts(unit).astype(float)
            for model in MODELS:
                sub = design.subset(model)
                ref = fit_poisson(sub, y, offset, options=reference)
                seconds = {k: [] for k in options}
                fits = {}
                for _ in range(repeats):
                    for name, opt in options.items():
                        t0 = time.perf_counter()
                        fits[name] = fit_poisson(sub, y, offset, options=opt)
                        seconds[name].append(time.perf_counter() - t0)
                row = {"unit": unit, "model": "+".join(model), "n_spikes": int(y.sum()),
                       "reference_converged": bool(ref.converged)}
                for name, fit in fits.items():
                    row[name] = {"seconds": statistics.median(seconds[name]),
                                 "rounds": int(fit.n_outer), "converged": bool(fit.converged),
                                 **_accuracy(fit, ref, sub, y, offset)}
                rows.append(row)
    totals = {name: sum(r[name]["seconds"] for r in rows) for name in options}
    worst = {name: {key: max(r[name][key] for r in rows)
                    for key in ("max_dlog_lambda_curved", "max_edf_diff", "criterion_gap")}
             for name in options}
    return {"benchmark": "smoothness", "duration_s": duration, "n_bins": design.n_rows,
            "units": n_units, "models": ["+".join(m) for m in MODELS], "repeats": repeats,
            "machine": _peers.machine(), "rows": rows, "total_seconds": totals,
            "ratio_to_start": {k: v / totals["start"] for k, v in totals.items()}, "worst": worst}


def table(res: dict) -> str:
    lines = [f"{res['n_bins']} bins, {res['units']} units x {len(res['models'])} models, "
             f"median of {res['repeats']} interleaved repeats, load {res['machine']['loadavg_1min']:.1f}",
             "",
             "| selection | total s | ratio to start | worst dlog lambda (curved) | worst EDF diff "
             "| worst criterion gap |",
             "|---|---|---|---|---|---|"]
    for name, total in res["total_seconds"].items():
        w = res["worst"][name]
        lines.append(f"| {name} | {total:.2f} | {res['ratio_to_start'][name]:.2f} | "
                     f"{w['max_dlog_lambda_curved']:.2g} | {w['max_edf_diff']:.2g} | "
                     f"{w['criterion_gap']:.2g} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10 min session, 4 units, 1 repeat")
    parser.add_argument("--duration", type=float, help="session length, s")
    parser.add_argument("--units", type=int, help="number of units")
    parser.add_argument("--repeats", type=int, help="timed repeats per fit")
    parser.add_argument("--seed", type=int, default=1)
    return _peers.emit(run(parser.parse_args(argv)), table)


if __name__ == "__main__":
    raise SystemExit(main())
