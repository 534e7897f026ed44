"""A lever measured, not built: later forward steps at fixed smoothing instead of LAML.

Issue 16 lists "reuse of the parent model's lambdas along the forward path" among the levers
for the 3-minute job. This script measures its whole-cell effect without changing encodex:
every candidate model with two or more variables is fitted on all bins with its smoothing
parameters fixed (each term's from the parent model's fit when the parent holds it, the new
term's from its one-variable fit of the first step) instead of selected by LAML; the fold
steps, scores and the selection rule are unchanged. Models of the first step (and the
drift-only baseline) still select smoothness by LAML.

The same simulated cells (``encodex.simulate``, one environment, 20 ms bins, all five
variables, the run defaults) are labelled both ways, cell by cell in turn (order alternating,
so that load on this shared machine hits both alike). Reported: CPU seconds per cell (process
time, one BLAS thread), labels against the simulated truth, and held-out information.

What it would cost is not measured here: a chosen model with two or more variables would be
reported at smoothing it did not select, and smoothing fixed from a parent misjudges a term
whose shape changes when a correlated variable enters (position and distance on a track);
a default change would need the labels study (``labels_at_the_edges.py``).

Usage::

    /work/venv/bin/python benchmarks/lever_fixed_smoothing.py [--cells 10] [--minutes 60]

The labels study with the lever (benchmarks/RESULTS.md) ran with this hook as
``sitecustomize.py`` in a folder on ``PYTHONPATH``, so that the study's worker processes
apply it too, and ``ENCODEX_LEVER=fixed`` in the environment::

    import os
    if os.environ.get("ENCODEX_LEVER") == "fixed":
        import sys
        sys.path.insert(0, "<clone>/benchmarks")
        import lever_fixed_smoothing
        lever_fixed_smoothing.fixed_later_steps().__enter__()
"""

from __future__ import annotations

import argparse
import contextlib
import time

import numpy as np

import _peers
from _cells import box_environment


def _term_lambdas(fit, name: str):
    """Smoothing parameters of term ``name`` in ``fit`` (None when it does not hold it)."""
    k = 0
    for t in fit.terms:
        m = len(t.basis.penalties())
        if t.name == name:
            return fit.lambdas[k:k + m]
        k += m
    return None


def _fixed_lambdas(sub, fits) -> np.ndarray:
    """Each term's smoothing parameters from the first of ``fits`` that holds it."""
    out = []
    for t in sub.terms:
        lam = next(lam for lam in (_term_lambdas(f, t.name) for f in fits) if lam is not None)
        out.extend(lam)
    return np.asarray(out, dtype=float)


@contextlib.contextmanager
def fixed_later_steps():
    """Within the block, candidates with >= 2 variables are fitted at fixed smoothing."""
    import encodex.compare.cell as cell
    import encodex.fit as fit

    real_cv, real_fit = cell.cross_validate, fit.fit_poisson

    def cross_validate(design, model, y, offset, folds, fit_options=None,
                       fold_fits="one-step", start=None, full_fits=None, baselines=None,
                       nuisance=(), predictions=None):
        if len(model) < 2 or full_fits is None:
            return real_cv(design, model, y, offset, folds, fit_options, fold_fits, start,
                           full_fits, baselines, nuisance, predictions)
        sub = design.subset(tuple(model) + tuple(nuisance))
        fits = tuple(start or ()) + tuple(full_fits[(v,)] for v in model if (v,) in full_fits)
        lam = _fixed_lambdas(sub, fits)

        def fit_poisson(d, yy, off, lambdas=None, rows=None, start=None, options=None):
            if d is sub and lambdas is None and rows is None:  # the all-bins fit
                return real_fit(d, yy, off, lambdas=lam, start=fits, options=options)
            return real_fit(d, yy, off, lambdas=lambdas, rows=rows, start=start,
                            options=options)

        fit.fit_poisson = fit_poisson
        try:
            return real_cv(design, model, y, offset, folds, fit_options, fold_fits, start,
                           full_fits, baselines, nuisance, predictions)
        finally:
            fit.fit_poisson = real_fit

    cell.cross_validate = cross_validate
    try:
        yield
    finally:
        cell.cross_validate = real_cv


def run(cells: int, minutes: float, seed: int) -> dict:
    from threadpoolctl import threadpool_limits

    from encodex.population.work import analyse_unit

    session, truth, rows, env, rs = box_environment(cells, minutes, seed)
    true = dict(zip(truth["unit"], truth["variables"]))
    out = {"cells": cells, "minutes": minutes, "seed": seed, "per_cell": []}

    def label(unit, y, fixed: bool):
        with fixed_later_steps() if fixed else contextlib.nullcontext():
            t0 = time.process_time()
            rec = analyse_unit(env, unit, y, rs).record["cell"]
            return time.process_time() - t0, rec["variables"], rec["bits_per_spike"]

    with threadpool_limits(1):
        for i, unit in enumerate(session.unit_ids):
            y = session.unit_counts(unit)[rows]
            order = (False, True) if i % 2 == 0 else (True, False)
            res = {fixed: label(unit, y, fixed) for fixed in order}
            out["per_cell"].append({
                "unit": unit, "truth": true[unit],
                "laml": {"cpu_s": res[False][0], "label": res[False][1],
                         "bits_per_spike": res[False][2]},
                "fixed": {"cpu_s": res[True][0], "label": res[True][1],
                          "bits_per_spike": res[True][2]}})
    for mode in ("laml", "fixed"):
        out[f"cpu_s_{mode}"] = sum(c[mode]["cpu_s"] for c in out["per_cell"])
        out[f"exact_{mode}"] = sum(c[mode]["label"] == c["truth"] for c in out["per_cell"])
    out["cpu_ratio_fixed_over_laml"] = out["cpu_s_fixed"] / out["cpu_s_laml"]
    out["labels_differ"] = sum(c["laml"]["label"] != c["fixed"]["label"]
                               for c in out["per_cell"])
    return out


def table(res: dict) -> str:
    lines = [f"later forward steps at fixed smoothing ({res['cells']} cells x "
             f"{res['minutes']:g} min, seed {res['seed']})", "",
             "| unit | truth | LAML label | CPU s | fixed label | CPU s | bits/spike LAML / fixed |",
             "|---|---|---|---|---|---|---|"]
    for c in res["per_cell"]:
        a, b = c["laml"], c["fixed"]
        lines.append(f"| {c['unit']} | {c['truth']} | {a['label']} | {a['cpu_s']:.2f} | "
                     f"{b['label']} | {b['cpu_s']:.2f} | {a['bits_per_spike']:.5f} / "
                     f"{b['bits_per_spike']:.5f} |")
    lines += ["", f"CPU: LAML {res['cpu_s_laml']:.1f} s, fixed {res['cpu_s_fixed']:.1f} s, "
              f"ratio {res['cpu_ratio_fixed_over_laml']:.3f}; exact labels "
              f"{res['exact_laml']} / {res['exact_fixed']} of {res['cells']}; labels differ "
              f"in {res['labels_differ']} cells"]
    return "\n".join(lines)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cells", type=int, default=10)
    p.add_argument("--minutes", type=float, default=60.0)
    p.add_argument("--seed", type=int, default=1)
    a = p.parse_args(argv)
    res = {"benchmark": "lever_fixed_smoothing", "machine": _peers.machine(),
           **run(a.cells, a.minutes, a.seed)}
    return _peers.emit(res, table)


if __name__ == "__main__":
    raise SystemExit(main())
