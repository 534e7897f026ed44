"""What the speed levers of issue 16 would earn, measured before building them.

On the full job's design (one environment of ``--minutes`` 60 at 20 ms bins: 180,000 bins,
the five variables with the default bases, 136 constrained coefficients), single-threaded:

1. **Discretised covariates** (Wood, Li, Shaddick & Augustin 2017, JASA 112:1199; Li & Wood
   2020, Statistics and Computing 30:19). Every covariate is rounded to a grid of ``--grid``
   values (position: ``--grid`` x ``--grid`` per axis, a joint grid), the basis evaluated on
   the grid values only, and the products run over unique values:

   * ``X beta``: each term's ``B_j beta_j`` on its grid values, then one gather per term;
   * ``X' r``: one weighted histogram (``bincount``) per term, then ``B_j' h``;
   * ``X' W X``: diagonal blocks from one weighted histogram per term; each off-diagonal
     block ``(j, l)`` from a weighted histogram over the unique *pairs* of grid values of the
     two terms, computed once (Li & Wood 2020, sec. 3), then a small dense product.

   Reported: the number of unique values and pairs, the time of each product against the
   exact sparse design (``Design.linear_predictor``, ``transpose_dot``, ``weighted_gram``)
   and the largest difference the rounding makes to ``X beta``.
2. **Several cells per pass.** ``X' W_c X`` for ``--cells`` cells in one pass over the
   Gram plan's compact rows (each chunk read once, weighted and multiplied for every cell)
   against one ``weighted_gram`` call per cell.
3. **Line-search evaluations.** In the forward selection of ``--cells`` simulated cells:
   objective evaluations per line search, and the share of the cells' time spent in them.

Output: ONE line of JSON on stdout, then a readable table.

Usage::

    .venv/bin/python benchmarks/bench_levers.py            # 60 min, about 2 min
    .venv/bin/python benchmarks/bench_levers.py --quick    # 10 min of data
"""

from __future__ import annotations

import argparse
import datetime as _dt
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import _peers  # noqa: E402  (benchmark helper next to this file)
from bench_population import make_session  # noqa: E402


def median_ms(fn, repeats: int) -> float:
    fn()
    out = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return 1e3 * statistics.median(out)


# --- 1. discretised covariates --------------------------------------------------------------
def grid_index(values: np.ndarray, m: int):
    """Round ``values`` (n,) or (n, 2) to ``m`` points per axis; (index per row, grid values)."""
    v = np.asarray(values, dtype=float)
    v2 = v.reshape(len(v), -1)
    lo, hi = v2.min(axis=0), v2.max(axis=0)
    step = np.where(hi > lo, (hi - lo) / (m - 1), 1.0)
    k = np.rint((v2 - lo) / step).astype(np.int64)
    key = k[:, 0] if v2.shape[1] == 1 else k[:, 0] * m + k[:, 1]
    uniq, inv = np.unique(key, return_inverse=True)
    if v2.shape[1] == 1:
        grid = lo[0] + uniq * step[0]
    else:
        grid = np.column_stack([lo[0] + (uniq // m) * step[0], lo[1] + (uniq % m) * step[1]])
    return inv.astype(np.intp), grid


class Discretised:
    """The design on rounded covariates: per-term grid tables and per-row grid indices."""

    def __init__(self, design, covariates: dict, m: int):
        self.design = design
        self.idx, self.tables = [], []
        for t in design.terms:
            inv, grid = grid_index(covariates[t.name], m)
            blk = t.basis.evaluate(grid)
            self.idx.append(inv)
            self.tables.append(blk.toarray())             # (unique values, n_beta of term)
        self.slices = [design.beta_slices[t.name] for t in design.terms]
        # Unique pairs of grid values of every pair of terms, found once (inverse per row).
        self.pairs = {}
        for a in range(len(self.idx)):
            for b in range(a + 1, len(self.idx)):
                key = self.idx[a] * len(self.tables[b]) + self.idx[b]
                uniq, inv = np.unique(key, return_inverse=True)
                self.pairs[(a, b)] = (uniq // len(self.tables[b]), uniq % len(self.tables[b]),
                                      inv.astype(np.intp))

    def linear_predictor(self, theta):
        beta = self.design.beta(theta)
        eta = np.full(self.design.n_rows, beta[0])
        for k, tab, sl in zip(self.idx, self.tables, self.slices):
            eta += (tab @ beta[sl])[k]
        return eta

    def transpose_dot(self, r):
        out = np.empty(self.design.n_beta)
        out[0] = r.sum()
        for k, tab, sl in zip(self.idx, self.tables, self.slices):
            out[sl] = tab.T @ np.bincount(k, weights=r, minlength=len(tab))
        return self.design.Z.T @ out

    def weighted_gram(self, w):
        p = self.design.n_beta
        g = np.zeros((p, p))
        g[0, 0] = w.sum()
        hist = [np.bincount(k, weights=w, minlength=len(tab))
                for k, tab in zip(self.idx, self.tables)]
        for h, tab, sl in zip(hist, self.tables, self.slices):
            g[0, sl] = g[sl, 0] = tab.T @ h
            g[sl, sl] = tab.T @ (h[:, None] * tab)
        for (a, b), (ua, ub, inv) in self.pairs.items():
            h = np.bincount(inv, weights=w, minlength=len(ua))
            blk = self.tables[a][ua].T @ (h[:, None] * self.tables[b][ub])
            g[self.slices[a], self.slices[b]] = blk
            g[self.slices[b], self.slices[a]] = blk.T
        return self.design.Z.T @ g @ self.design.Z


def discretisation(design, covariates, m: int, repeats: int, rng) -> dict:
    disc = Discretised(design, covariates, m)
    theta = rng.normal(0.0, 0.3, design.n_theta)
    w = np.exp(rng.normal(-3.0, 0.5, design.n_rows))
    r = w - rng.poisson(w)
    out = {"grid": m, "unique_values": {t.name: len(tab) for t, tab in
                                        zip(design.terms, disc.tables)},
           "unique_pairs": {f"{design.terms[a].name}x{design.terms[b].name}": len(v[0])
                            for (a, b), v in disc.pairs.items()},
           "n_rows": design.n_rows}
    pieces = {"X beta": (lambda: design.linear_predictor(theta),
                         lambda: disc.linear_predictor(theta)),
              "X' r": (lambda: design.transpose_dot(r), lambda: disc.transpose_dot(r)),
              "X' W X": (lambda: design.weighted_gram(w), lambda: disc.weighted_gram(w))}
    out["ms"] = {}
    for name, (exact, rounded) in pieces.items():
        te, td = median_ms(exact, repeats), median_ms(rounded, repeats)
        out["ms"][name] = {"exact": te, "discretised": td, "exact_over_discretised": te / td}
    out["max_abs_eta_difference"] = float(np.max(np.abs(design.linear_predictor(theta)
                                                        - disc.linear_predictor(theta))))
    return out


# --- 2. several cells per pass ----------------------------------------------------------------
def cells_per_pass(design, n_cells: int, repeats: int, rng) -> dict:
    from encodex.design.design import GRAM_CHUNK_ROWS

    ws = [np.exp(rng.normal(-3.0, 0.5, design.n_rows)) for _ in range(n_cells)]
    plan = design._gram_plan(None)
    runs, width, _ = plan.layout_for(design)
    sws = np.sqrt(np.stack(ws))[:, plan.order]
    X = plan.columns_by_row

    def one_pass():
        outs = np.zeros((n_cells, design.n_beta, design.n_beta))
        buf = np.empty((width, GRAM_CHUNK_ROWS))
        for r0, r1, gid, cols in runs:
            gs = np.zeros((n_cells, width, width))
            for start in range(r0, r1, GRAM_CHUNK_ROWS):
                stop = min(start + GRAM_CHUNK_ROWS, r1)
                chunk = X[:, start:stop]                  # read once for every cell
                c = buf[:, :stop - start]
                for i in range(n_cells):
                    np.multiply(chunk, sws[i, start:stop], out=c)
                    gs[i] += c @ c.T
            ix = np.ix_(cols, cols)
            for i in range(n_cells):
                outs[i][ix] += gs[i]
        return [design.Z.T @ o @ design.Z for o in outs]

    got = one_pass()
    ref = [design.weighted_gram(w) for w in ws]
    err = max(float(np.max(np.abs(a - b)) / np.max(np.abs(b))) for a, b in zip(got, ref))
    t_sep = median_ms(lambda: [design.weighted_gram(w) for w in ws], repeats)
    t_one = median_ms(one_pass, repeats)
    return {"cells": n_cells, "ms_separate": t_sep, "ms_one_pass": t_one,
            "separate_over_one_pass": t_sep / t_one, "max_rel_difference": err}


# --- 3. line-search evaluations ----------------------------------------------------------------
def line_search_counts(session, n_cells: int) -> dict:
    from encodex.fit import solver as solver_mod
    from encodex.population.run import _env_counts, _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit, environment_design

    cls = solver_mod.PenalisedPoissonNewton
    counts = {"searches": 0, "evaluations": 0, "seconds": 0.0}
    original = cls.line_search

    def counted_objective(self, theta, eta=None, _orig=cls.objective):
        counts["evaluations"] += 1
        return _orig(self, theta, eta)

    def counted_search(self, *a, **k):
        counts["searches"] += 1
        t0 = time.perf_counter()
        self.objective = counted_objective.__get__(self)
        try:
            return original(self, *a, **k)
        finally:
            del self.objective
            counts["seconds"] += time.perf_counter() - t0

    rs = RunSettings()
    env, _ = _environment_work(session, session.environments[0], rs, "levers")
    environment_design(env)
    total = 0.0
    cls.line_search = counted_search
    try:
        for unit in session.unit_ids[:n_cells]:
            y = _env_counts(session, env.name, unit, env)
            t0 = time.perf_counter()
            analyse_unit(env, unit, y, rs)
            total += time.perf_counter() - t0
    finally:
        cls.line_search = original
    return {"cells": n_cells, "line_searches": counts["searches"],
            "objective_evaluations": counts["evaluations"],
            "evaluations_per_search": counts["evaluations"] / max(counts["searches"], 1),
            "share_of_cell_time": counts["seconds"] / total, "cells_seconds": total}


# --- 4. single-precision X'WX (``gram_precision``, a lever of our own) ------------------------
def single_precision(session, n_cells: int) -> dict:
    """Whole cells with ``gram_precision="double"`` and ``"single"``, interleaved."""
    from encodex.population.run import _env_counts, _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import analyse_unit, environment_design

    settings = {p: RunSettings(gram_precision=p) for p in ("double", "single")}
    envs = {p: _environment_work(session, session.environments[0], rs, "levers")[0]
            for p, rs in settings.items()}
    designs = {p: environment_design(env) for p, env in envs.items()}
    w = np.exp(np.random.default_rng(0).normal(-3.0, 0.5, designs["double"].n_rows))
    g64, g32 = designs["double"].weighted_gram(w), designs["single"].weighted_gram(w)
    gram_err = float(np.max(np.abs(g32 - g64)) / np.max(np.abs(g64)))
    t64 = median_ms(lambda: designs["double"].weighted_gram(w), 5)
    t32 = median_ms(lambda: designs["single"].weighted_gram(w), 5)
    cells = []
    for unit in session.unit_ids[:n_cells]:
        res = {}
        for p in ("double", "single"):
            y = _env_counts(session, envs[p].name, unit, envs[p])
            t0 = time.process_time()
            oc = analyse_unit(envs[p], unit, y, settings[p])
            res[p] = (time.process_time() - t0, oc)
        (c64, o64), (c32, o32) = res["double"], res["single"]
        r64, r32 = o64.record["cell"], o32.record["cell"]
        row = {"unit": unit, "label_double": r64["variables"], "label_single": r32["variables"],
               "cpu_double": c64, "cpu_single": c32,
               "bits_per_spike_diff": abs(float(r64["bits_per_spike"])
                                          - float(r32["bits_per_spike"])),
               "p_value_double": float(r64["p_value"]), "p_value_single": float(r32["p_value"])}
        if o64.fit is not None and o32.fit is not None:
            th64, th32 = o64.fit.theta, o32.fit.theta
            row["theta_max_rel_diff"] = float(np.max(np.abs(th32 - th64)) / np.max(np.abs(th64)))
            row["log_lambda_max_diff"] = float(np.max(np.abs(np.log(o32.fit.lambdas)
                                                             - np.log(o64.fit.lambdas))))
        cells.append(row)
    cpu64 = sum(c["cpu_double"] for c in cells)
    cpu32 = sum(c["cpu_single"] for c in cells)
    return {"gram_ms_double": t64, "gram_ms_single": t32, "gram_ratio": t64 / t32,
            "gram_max_rel_error": gram_err, "cells": cells,
            "cpu_ratio_double_over_single": cpu64 / cpu32,
            "labels_identical": all(c["label_double"] == c["label_single"] for c in cells)}


def run(args) -> dict:
    from threadpoolctl import threadpool_limits

    from encodex.population.run import _environment_work
    from encodex.population.settings import RunSettings
    from encodex.population.work import environment_design

    session, _ = make_session(args.cells, args.minutes * 60.0, args.seed)
    # The exact (float64) X'WX is the reference of every lever.
    env, _ = _environment_work(session, session.environments[0],
                               RunSettings(gram_precision="double"), "levers")
    design = environment_design(env)
    rng = np.random.default_rng(args.seed)
    with threadpool_limits(limits=1):
        disc = {m: discretisation(design, env.covariates, m, args.repeats, rng)
                for m in args.grid}
        multi = cells_per_pass(design, args.cells, args.repeats, rng)
        ls = line_search_counts(session, args.cells)
        single = single_precision(session, args.cells) if args.single else None
    return {"benchmark": "levers",
            "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "machine": _peers.machine(), "minutes": args.minutes, "n_rows": design.n_rows,
            "n_theta": design.n_theta, "discretisation": disc, "cells_per_pass": multi,
            "line_search": ls, "single_precision_gram": single}


def table(r: dict) -> str:
    m = r["machine"]
    L = [f"levers, {r['date_utc']}, {m['nproc']} CPUs, load {m['loadavg_1min']:.2f}; "
         f"{r['n_rows']} bins, {r['n_theta']} coefficients, one thread", "",
         "1. discretised covariates (ms per product, median)", "",
         "| grid | product | exact | discretised | exact / discretised |", "|---|---|---|---|---|"]
    for g, d in r["discretisation"].items():
        for name, t in d["ms"].items():
            L.append(f"| {g} | {name} | {t['exact']:.2f} | {t['discretised']:.2f} | "
                     f"{t['exact_over_discretised']:.2f} |")
    for g, d in r["discretisation"].items():
        L.append(f"grid {g}: unique values {d['unique_values']}; unique pairs "
                 f"{d['unique_pairs']} (of {d['n_rows']} bins); max |X beta| change "
                 f"{d['max_abs_eta_difference']:.2g}")
    c = r["cells_per_pass"]
    L += ["", f"2. X'WX of {c['cells']} cells: separate {c['ms_separate']:.1f} ms, one pass "
          f"{c['ms_one_pass']:.1f} ms (ratio {c['separate_over_one_pass']:.2f}; max rel. "
          f"difference {c['max_rel_difference']:.1g})"]
    s = r["line_search"]
    L += ["", f"3. line search over {s['cells']} cells: {s['line_searches']} searches, "
          f"{s['objective_evaluations']} objective evaluations "
          f"({s['evaluations_per_search']:.2f} per search), {s['share_of_cell_time']:.1%} of the "
          f"cells' {s['cells_seconds']:.1f} s"]
    f = r["single_precision_gram"]
    if f is not None:
        L += ["", f"4. single-precision X'WX: {f['gram_ms_double']:.1f} ms -> "
              f"{f['gram_ms_single']:.1f} ms ({f['gram_ratio']:.2f}x; max rel. error "
              f"{f['gram_max_rel_error']:.1g}); whole cells CPU double/single "
              f"{f['cpu_ratio_double_over_single']:.2f}; labels identical "
              f"{f['labels_identical']}", "",
              "| unit | label (double) | label (single) | CPU s double | single | "
              "bits/spike diff | p double | p single | theta max rel diff | log lambda diff |",
              "|---|---|---|---|---|---|---|---|---|---|"]
        for c in f["cells"]:
            L.append(f"| {c['unit']} | {c['label_double']} | {c['label_single']} | "
                     f"{c['cpu_double']:.2f} | {c['cpu_single']:.2f} | "
                     f"{c['bits_per_spike_diff']:.1g} | {c['p_value_double']:.3g} | "
                     f"{c['p_value_single']:.3g} | {c.get('theta_max_rel_diff', float('nan')):.1g} "
                     f"| {c.get('log_lambda_max_diff', float('nan')):.1g} |")
    return "\n".join(L)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--minutes", type=float, default=60.0, help="session length (default 60)")
    ap.add_argument("--cells", type=int, default=4, help="cells (default 4)")
    ap.add_argument("--grid", type=int, nargs="+", default=[100, 300],
                    help="grid points per axis (default 100 300)")
    ap.add_argument("--repeats", type=int, default=7, help="timed repeats (default 7)")
    ap.add_argument("--seed", type=int, default=1, help="simulation seed (default 1)")
    ap.add_argument("--single", action="store_true",
                    help="also compare whole cells with gram_precision single and double")
    ap.add_argument("--quick", action="store_true", help="10 min of data, 3 repeats")
    args = ap.parse_args(argv)
    if args.quick:
        args.minutes, args.repeats = 10.0, 3
    return _peers.emit(run(args), table)


if __name__ == "__main__":
    raise SystemExit(main())
