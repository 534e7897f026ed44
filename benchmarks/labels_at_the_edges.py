"""Calibration and power of the labels where recordings are hard (not a timed test).

Simulated cells on simulated trajectories (``encodex.simulate``: the foraging animal, and
``binned_counts`` for cells of a chosen tuning strength, mean rate and rate modulation), scored
by three pipelines on the same cells:

- ``new``: the defaults of this version: slow-drift term in every model, sign-flip
  max-statistic step test of the clipped, spike-weighted mean improvements at alpha
  (``correction="signflip"``),
  effect-size floor of later steps (``min_step_gain`` 0.01), 20 folds of 3 chunks,
  smoothness by LAML, one-step fold fits;
- ``new_t``: the same fits and floor with the studentised sign-flip test
  (``correction="signflip-t"``, the default of the second round of this study);
- ``new_k10``: drift term and sign-flip test with 10 folds of 3 chunks and no floor (the
  defaults of the first round of this study);
- ``old``: the defaults when the study began: no drift term, one-sided Wilcoxon at alpha / m
  (Bonferroni), 10 folds of 3 chunks, same fits;
- ``reference``: a plain pipeline: no drift term, fixed smoothing (every smoothing
  parameter ``FIXED_LAMBDA``),
  10 contiguous folds, one-sided Wilcoxon at alpha without correction; each fold's model is
  one Newton step from the all-bins fit (cheaper than a refit, same smoothing).

Pipelines named ``<fits>_<test>`` share the fits of ``<fits>`` and differ only by the test
(``new_bonferroni``, ``old_signflip``, ``old_none``: one ``ModelScorer`` per cell, folds and
design; offered by ``--pipelines``). Parts:

1. null kinds (untuned cells): Poisson (15 min), bursty / doubly stochastic (15 min), slow
   drift (rate x2 per 20 min) while the animal slows down (speed falling to 0.4x over 30 min),
   short environments (5 min); 1-4 Hz. False-label rate with Wilson 95% intervals.
2. power: exact-set recovery of single- and two-variable cells against tuning strength
   (0.25-1x, 30 min, 1-4 Hz), environment length (5-60 min, 0.5x, 1-4 Hz) and mean rate
   (0.1-5 Hz, 30 min, 0.5x). Cells with fewer than 100 spikes are not labelled (as in a run)
   and count as misses.
3. extras: tuned cells (1x) at 30 and 60 min, the new default with ``one-step`` and with
   ``refit`` fold fits (``--refit-cells`` of them): share of cells whose label holds a
   variable they do not carry.

Usage::

    nice -n 10 /work/venv/bin/python benchmarks/labels_at_the_edges.py --quick --jobs 2
    nice -n 10 /work/venv/bin/python benchmarks/labels_at_the_edges.py --jobs 2   # full size

Prints one JSON record and markdown tables; ``--figure PATH`` draws the power curves.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from functools import lru_cache

import numpy as np

from encodex.population.settings import RunSettings

#: Smoothing parameter of every penalty in the reference pipeline (fixed, not selected): a
#: middle value of those LAML selects on simulated cells (3 for position, 23 for speed,
#: 1e3-4e3 for heading and time, measured on one 30 min cell).
FIXED_LAMBDA = 10.0
ALPHA = 0.05
MIN_SPIKES = 100
TUNED_TYPES = (("position",), ("heading",), ("speed",), ("distance",), ("time",),
               ("position", "heading"), ("position", "speed"), ("heading", "speed"),
               ("speed", "time"))


#: Arithmetic of X'WX in every pipeline's design: the default of population runs, unless the
#: environment variable ENCODEX_STUDY_GRAM_PRECISION says "single" or "double" (read by the
#: workers too; the fifth run was made in double, before single became the default).
GRAM_PRECISION = os.environ.get("ENCODEX_STUDY_GRAM_PRECISION", RunSettings().gram_precision)

#: Time bin of the study, s (the run's default is 0.02; 0.05 s makes the study 2.5x cheaper
#: and changes neither the smooths at these time scales nor the step test).
BIN_SIZE = 0.05


@lru_cache(maxsize=10)
def scenario(duration_s: float, slowdown: float | None, seed: int):
    """Binned covariates, clock, design (five variables + drift) and folds of a trajectory."""
    from encodex.compare.folds import chunked_folds
    from encodex.design import DRIFT_TERM, build_design, default_bases, drift_basis
    from encodex.session import build_session
    from encodex.simulate import simulate_recording
    from encodex.variables import VARIABLES

    rec, _ = simulate_recording(seed=seed, n_cells=1, duration_s=duration_s,
                                environments=("box",), slowdown=slowdown)
    s = build_session(rec, bin_size=BIN_SIZE)
    rows = np.flatnonzero(np.asarray(s.valid) & (np.asarray(s.environment) == 0))
    cov = {v: np.ascontiguousarray(np.asarray(s.covariates[v])[rows]) for v in VARIABLES}
    t = np.asarray(s.time)
    clock = t[rows] - t[np.flatnonzero(np.asarray(s.environment) == 0)[0]]
    bases = default_bases(cov, VARIABLES)
    bases[DRIFT_TERM] = drift_basis(clock)
    # the arithmetic of X'WX that runs use by default (RunSettings; single since the fifth run)
    design = build_design({**cov, DRIFT_TERM: clock}, bases, gram_precision=GRAM_PRECISION)
    folds = {k: chunked_folds(rows.size, k, 3, seed) for k in (10, 20)}
    contiguous = chunked_folds(rows.size, 10, 1, seed)
    return cov, clock, design, folds, contiguous, float(s.bin_size)


class FixedSmoothingScorer:
    """Per-fold held-out bits per spike at fixed smoothing (the reference pipeline)."""

    def __init__(self, design, y, offset, folds):
        from encodex.compare.cell import mean_rate_baselines

        self.design, self.y, self.offset, self.folds = design, y, offset, folds
        self.baselines = mean_rate_baselines(y, offset, folds)
        self.cache = {}

    def __call__(self, model):
        from encodex.compare.scores import heldout_score
        from encodex.fit import fit_poisson, refit_folds

        model = tuple(model)
        if model in self.cache:
            return self.cache[model]
        if not model:
            out = np.zeros(self.folds.k)
        else:
            sub = self.design.subset(model)
            lam = np.full(sub.n_penalties, FIXED_LAMBDA)
            full = fit_poisson(sub, self.y, self.offset, lambdas=lam)
            _, preds = refit_folds(sub, self.y, self.offset, full, self.folds.fold,
                                   self.folds.k, heldout=True)
            out = np.array([heldout_score(self.y[te], mu, mu0).bits_per_spike
                            for (_, te), mu, mu0 in zip(self.folds.splits(), preds,
                                                        self.baselines)])
        self.cache[model] = out
        return out


def run_cell(spec: dict) -> dict:
    """Simulate one cell and label it by every pipeline of ``spec["pipelines"]``."""
    from threadpoolctl import threadpool_limits

    from encodex.compare.cell import ModelScorer, fold_spikes
    from encodex.compare.selection import MIN_STEP_GAIN, select_variables
    from encodex.design import DRIFT_TERM
    from encodex.simulate import binned_counts
    from encodex.variables import VARIABLES, label

    t0 = time.process_time()
    cov, clock, design, folds, contiguous, bin_size = scenario(
        spec["duration_s"], spec["slowdown"], spec["trajectory"])
    rng = np.random.default_rng(spec["seed"])
    y = binned_counts(cov, clock, bin_size, spec["truth"], rng, strength=spec["strength"],
                      mean_rate_hz=spec["rate_hz"], modulation=spec["modulation"])
    out = dict(spec, n_spikes=int(y.sum()))
    if y.sum() < MIN_SPIKES:
        out["labels"] = {p: None for p in spec["pipelines"]}
        out["cpu_s"] = time.process_time() - t0
        return out
    offset = np.full(y.size, np.log(bin_size))
    labels = {}
    with threadpool_limits(limits=1):
        scorers = {}
        for p in spec["pipelines"]:
            if p.startswith("new"):
                fits = "refit" if p.endswith("refit") else "one-step"
                k = 10 if p == "new_k10" else 20
                key = ("drift", fits, k)
                if key not in scorers:
                    scorers[key] = ModelScorer(design, y, offset, folds[k], fold_fits=fits,
                                               nuisance=(DRIFT_TERM,))
                rule = {"new_bonferroni": "bonferroni", "new_t": "signflip-t"}.get(p, "signflip")
            elif p.startswith("old"):
                key = ("plain", "one-step")
                if key not in scorers:
                    scorers[key] = ModelScorer(design, y, offset, folds[10])
                rule = {"old": "bonferroni", "old_signflip": "signflip-t",
                        "old_none": "none"}[p]
            else:
                key = ("reference",)
                if key not in scorers:
                    scorers[key] = FixedSmoothingScorer(design, y, offset, contiguous)
                rule = "none"
            # The effect-size floor is part of the new defaults only (new, new_refit).
            floor = MIN_STEP_GAIN if p in ("new", "new_refit", "new_t") else 0.0
            sel = select_variables(VARIABLES, scorers[key], alpha=ALPHA, correction=rule,
                                   min_step_gain=floor,
                                   fold_weights=fold_spikes(y, scorers[key].folds))
            labels[p] = label(sel.chosen)
    out["labels"] = labels
    out["cpu_s"] = time.process_time() - t0
    return out


PIPELINES = ("new", "new_t", "new_k10", "old", "reference")


def plan(quick: bool, n_null=None, n_pow=None, n_extra=None, n_null_all=None,
         pipelines=PIPELINES, n_refit=None) -> list[dict]:
    """Every cell of the study, in a fixed order (seeds from the position in the list)."""
    n_null = n_null or (40 if quick else 250)
    n_pow = n_pow or (18 if quick else 54)
    n_extra = n_extra or (18 if quick else 100)
    n_refit = n_extra if n_refit is None else min(n_refit, n_extra)
    main = list(pipelines)
    # Test variants that share the new default's fits ride along on its own cells.
    shared = [p for p in main if p in ("new_t", "new_bonferroni")]
    specs = []

    def add(part, n, duration, slowdown, truth_fn, strength, rate_fn, modulation, pipelines,
            point):
        for i in range(n):
            specs.append({"part": part, "point": point, "duration_s": duration,
                          "slowdown": slowdown, "trajectory": 100 + i % 2,
                          "truth": truth_fn(i), "strength": strength, "rate_hz": rate_fn(i),
                          "modulation": modulation, "pipelines": pipelines})

    def untuned(i):
        return ()

    def tuned(i):
        return TUNED_TYPES[i % len(TUNED_TYPES)]

    def rate_1_4(i):
        return 1.0 + 3.0 * ((i * 0.618034) % 1.0)

    # Null kinds: the first n_null_all cells of each kind go through every pipeline, the
    # others through the new default only (its Bonferroni variant shares its fits).
    n_all = min(n_null, n_null_all or n_null)
    for kind, dur, slow, mod in (("poisson", 900.0, None, "poisson"),
                                 ("bursty", 900.0, None, "bursty"),
                                 ("drift+slowing", 1800.0, 0.4, "drift"),
                                 ("short 5 min", 300.0, None, "poisson")):
        add("null", n_all, dur, slow, untuned, 0.0, rate_1_4, mod, main, kind)
        add("null", n_null - n_all, dur, slow, lambda i, n=n_all: (), 0.0,
            lambda i, n=n_all: rate_1_4(i + n), mod, ["new"] + shared, kind)
    for g in (0.25, 0.5, 0.75, 1.0):
        add("strength", n_pow, 1800.0, None, tuned, g, rate_1_4, "poisson", main, g)
    for d in (300.0, 900.0, 3600.0):  # 30 min is the strength axis' 0.5 point
        add("length", n_pow, d, None, tuned, 0.5, rate_1_4, "poisson", main, d / 60)
    for r in (0.1, 0.3, 1.0, 5.0):
        add("rate", n_pow, 1800.0, None, tuned, 0.5, lambda i, r=r: r, "poisson", main, r)
    for d in (1800.0, 3600.0):
        # The first n_refit cells of each length also through refit fold fits (slow).
        add("extras", n_refit, d, None, tuned, 1.0, rate_1_4, "poisson",
            ["new", "new_refit"] + shared, d / 60)
        add("extras", n_extra - n_refit, d, None, lambda i, n=n_refit: tuned(i + n), 1.0,
            lambda i, n=n_refit: rate_1_4(i + n), "poisson", ["new"] + shared, d / 60)
    for i, s in enumerate(specs):
        s["seed"] = 10_000 + i
        s["truth"] = list(s["truth"])
        s["rank"] = i - next(j for j, t in enumerate(specs)
                             if (t["part"], t["point"]) == (s["part"], s["point"]))
    return specs


def paired(cells: list[dict], a: str = "new", b: str = "reference") -> str:
    """Pipeline ``a`` against ``b`` on the same tuned cells, point by point (markdown).

    For each power point: cells exact with ``a`` only, with ``b`` only, and the exact
    two-sided McNemar p-value (binomial test on the discordant cells; McNemar 1947,
    Psychometrika 12:153), so that "at least the reference" is read with its uncertainty.
    """
    from scipy.stats import binomtest

    from encodex.variables import parse_label

    def exact(c, p):
        lab = c["labels"].get(p)
        return lab is not None and set(parse_label(lab)) == set(c["truth"])

    lines = [f"| axis | point | exact with {a} only | exact with {b} only | McNemar p |",
             "|---|---|---|---|---|"]
    groups: dict = {}
    for c in cells:
        if c["part"] in ("strength", "length", "rate") and a in c["labels"] \
                and b in c["labels"]:
            groups.setdefault((c["part"], float(c["point"])), []).append(c)
    for (part, point), cs in sorted(groups.items()):
        only_a = sum(exact(c, a) and not exact(c, b) for c in cs)
        only_b = sum(exact(c, b) and not exact(c, a) for c in cs)
        n = only_a + only_b
        pv = binomtest(only_a, n, 0.5).pvalue if n else 1.0
        lines.append(f"| {part} | {point:g} | {only_a} | {only_b} | {pv:.3g} |")
    return "\n".join(lines)


def summarise(cells: list[dict]) -> dict:
    from encodex.report.tables import wilson_interval
    from encodex.variables import parse_label

    def rate(hits, n):
        lo, hi = wilson_interval(hits, n) if n else (np.nan, np.nan)
        return {"k": int(hits), "n": int(n), "rate": hits / n if n else np.nan,
                "ci95": [round(lo, 4), round(hi, 4)]}

    out = {"null": {}, "strength": {}, "length": {}, "rate": {}, "extras": {}}
    groups: dict = {}
    for c in cells:
        groups.setdefault((c["part"], c["point"]), []).append(c)
    # The 0.5x point at 30 min serves the length and rate axes too.
    for (part, point), cs in sorted(groups.items(), key=lambda kv: (kv[0][0], str(kv[0][1]))):
        res = {}
        for p in dict.fromkeys(q for c in cs for q in c["pipelines"]):
            with_p = [c for c in cs if p in c["labels"]]
            labs = [c["labels"][p] for c in with_p]
            truth = [set(c["truth"]) for c in with_p]
            got = [None if lab is None else set(parse_label(lab)) for lab in labs]
            if part == "null":
                res[p] = rate(sum(bool(g) for g in got if g is not None),
                              sum(g is not None for g in got))
            elif part == "extras":
                res[p] = rate(sum(g is not None and bool(g - t) for g, t in zip(got, truth)),
                              len(with_p))
            else:
                res[p] = rate(sum(g == t for g, t in zip(got, truth)), len(with_p))
        out[part][str(point)] = res
    if "0.5" in out["strength"]:
        out["length"]["30.0"] = out["strength"]["0.5"]
    out["cpu_s_total"] = round(sum(c["cpu_s"] for c in cells), 1)
    return out


def table(summary: dict) -> str:
    lines = []
    heads = {"null": "false-label rate (untuned cells)", "strength": "exact sets vs strength "
             "(30 min, 1-4 Hz)", "length": "exact sets vs minutes (0.5x, 1-4 Hz)",
             "rate": "exact sets vs mean rate Hz (30 min, 0.5x)",
             "extras": "tuned cells (1x) gaining a variable, by minutes"}
    for part, head in heads.items():
        res = summary.get(part) or {}
        if not res:
            continue
        pipes = list(dict.fromkeys(q for r in res.values() for q in r))
        lines.append(f"\n{head}\n")
        lines.append("| point | " + " | ".join(pipes) + " |")
        lines.append("|---" * (len(pipes) + 1) + "|")
        key = (lambda s: float(s)) if part != "null" else (lambda s: s)
        for point in sorted(res, key=key):
            r = res[point]
            lines.append(f"| {point} | " + " | ".join(
                f"{r[p]['k']}/{r[p]['n']} = {r[p]['rate']:.3f} [{r[p]['ci95'][0]:.3f}, "
                f"{r[p]['ci95'][1]:.3f}]" if p in r else "" for p in pipes) + " |")
    return "\n".join(lines)


def figure(summary: dict, path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 4, figsize=(15, 3.6))
    styles = {"new": ("C0", "drift + sign-flip + 1% floor, 20 folds (new default)"),
              "new_k10": ("C3", "drift + sign-flip, 10 folds"),
              "old": ("C1", "Wilcoxon + Bonferroni, 10 folds (earlier default)"),
              "reference": ("C2", "fixed smoothing, uncorrected (reference)")}
    for ax, part, xlabel in zip(axes[:3], ("strength", "length", "rate"),
                                ("tuning strength (x built-in cells)", "environment (min)",
                                 "mean rate (Hz)")):
        res = summary.get(part, {})
        xs = sorted(res, key=float)
        for p, (col, name) in styles.items():
            if not xs or any(p not in res[x] for x in xs):
                continue
            y = [res[x][p]["rate"] for x in xs]
            lo = [res[x][p]["ci95"][0] for x in xs]
            hi = [res[x][p]["ci95"][1] for x in xs]
            fx = [float(x) for x in xs]
            ax.plot(fx, y, "o-", color=col, label=name)
            ax.fill_between(fx, lo, hi, color=col, alpha=0.15)
        ax.set_xlabel(xlabel)
        ax.set_ylim(0, 1.02)
        ax.set_ylabel("exact label sets")
        if part == "rate":
            ax.set_xscale("log")
    axes[0].legend(fontsize=7, loc="lower right")
    ax = axes[3]
    res = summary.get("null", {})
    kinds = list(res)
    for j, (p, (col, name)) in enumerate(styles.items()):
        if not kinds or any(p not in res[k] for k in kinds):
            continue
        r = [res[k][p]["rate"] for k in kinds]
        err = np.array([[res[k][p]["rate"] - res[k][p]["ci95"][0],
                         res[k][p]["ci95"][1] - res[k][p]["rate"]] for k in kinds]).T
        ax.errorbar(np.arange(len(kinds)) + 0.2 * (j - 1), r, yerr=err, fmt="o", color=col)
    ax.axhline(ALPHA, color="k", lw=0.8, ls="--")
    ax.set_xticks(range(len(kinds)), kinds, rotation=20, fontsize=8)
    ax.set_ylabel("false labels (untuned cells)")
    fig.suptitle("Labels at the edges: simulated cells, 95% Wilson intervals", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="scaled-down sizes (minutes)")
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--null-cells", type=int, default=None, help="untuned cells per null kind")
    p.add_argument("--null-cells-all", type=int, default=None,
                   help="of which this many through every pipeline (others: new default)")
    p.add_argument("--power-cells", type=int, default=None, help="tuned cells per power point")
    p.add_argument("--extra-cells", type=int, default=None,
                   help="tuned cells per length for the extras of one-step and refit")
    p.add_argument("--refit-cells", type=int, default=None,
                   help="of the extras cells per length, this many also with refit fold fits")
    p.add_argument("--pipelines", default=",".join(PIPELINES),
                   help="comma-separated pipelines of the null and power parts")
    p.add_argument("--parts", default="null,strength,length,rate,extras",
                   help="comma-separated parts to run")
    p.add_argument("--cells-out", default=None,
                   help="write every cell's result as it finishes (JSON lines)")
    p.add_argument("--summarise", nargs="+", default=None, metavar="CELLS_JSONL",
                   help="only summarise cells written by earlier runs")
    p.add_argument("--figure", default=None, help="PNG of the power curves and null rates")
    a = p.parse_args(argv)

    import sys

    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from _cells import import_worker, run_cells

    t0 = time.time()
    if a.summarise:
        cells = [json.loads(line) for f in a.summarise for line in open(f) if line.strip()]
    else:
        parts = set(a.parts.split(","))
        specs = [s for s in plan(a.quick, a.null_cells, a.power_cells, a.extra_cells,
                                 a.null_cells_all, tuple(a.pipelines.split(",")),
                                 a.refit_cells)
                 if s["part"] in parts]
        # Round robin over the points of the study, so that a run cut short still covers all
        # of them (results are streamed to --cells-out).
        order = sorted(range(len(specs)), key=lambda i: (specs[i]["rank"], i))
        cells = run_cells(import_worker("labels_at_the_edges"), [specs[i] for i in order],
                          a.jobs, a.cells_out, batch_size=4)
    cells = sorted(cells, key=lambda c: c["seed"])
    summary = summarise(cells)
    record = {"benchmark": "labels_at_the_edges", "quick": a.quick, "n_cells": len(cells),
              "sizes": {f"{c['part']}:{c['point']}": sum(1 for d in cells if d["part"] ==
                                                          c["part"] and d["point"] == c["point"])
                        for c in cells},
              "jobs": a.jobs, "wall_s": round(time.time() - t0, 1), **summary}
    print(json.dumps(record))
    print(table(summary))
    print("\nsame tuned cells, new default against the reference pipeline\n")
    print(paired(cells))
    if a.figure:
        figure(summary, a.figure)


if __name__ == "__main__":
    main()
