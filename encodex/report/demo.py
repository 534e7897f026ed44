"""The whole job on the built-in simulated scenario, from Python or ``encodex demo``.

simulate -> NWB -> fit -> table -> compare -> report, each step timed and printed.
"""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd

from encodex.errors import SettingsError
from encodex.population.checkpoint import own_folder

__all__ = ["demo", "DEMO_ENVIRONMENTS"]

#: The two environments of the demo session (one recorded after the other).
DEMO_ENVIRONMENTS = ("room_a", "room_b")
#: File marking a folder as written by the demo (and holding what it simulated).
DEMO_MARKER = ".encodex-demo.json"


def _fit(nwb: Path, out: Path, jobs: int, seed: int, echo) -> None:
    """Fit every cell as ``encodex fit NWB --out OUT --jobs JOBS --seed SEED`` does.

    Default settings throughout (one all-bins fit per model and one Newton step per fold),
    which lets the demo simulate sessions long enough for most cells to be recognised within
    a few minutes.
    """
    from encodex.population import run_population

    echo(f"  (same as: encodex fit {nwb} --out {out} --jobs {jobs} --seed {seed})")
    run_population(nwb, out=out, jobs=jobs, seed=seed, progress=True, echo=echo)


def recovery_summary(cells: pd.DataFrame, truth: pd.DataFrame) -> pd.DataFrame:
    """Per environment, how many classified cells got exactly their simulated label.

    Parameters
    ----------
    cells : DataFrame
        ``cells.csv`` of the fit.
    truth : DataFrame
        Ground truth of :func:`encodex.simulate.simulate_recording` (``unit, environment,
        variables``).

    Returns
    -------
    DataFrame
        ``environment, classified, exact, percent_exact``.
    """
    t = truth[["unit", "environment", "variables"]].astype(str)
    m = cells[cells["status"] == "ok"].astype({"unit": str, "environment": str}).merge(
        t, on=["unit", "environment"], suffixes=("", "_true"))
    rows = []
    for env, g in m.groupby("environment", sort=False):
        exact = int((g["variables"] == g["variables_true"]).sum())
        rows.append({"environment": env, "classified": len(g), "exact": exact,
                     "percent_exact": 100.0 * exact / len(g) if len(g) else float("nan")})
    return pd.DataFrame(rows, columns=["environment", "classified", "exact", "percent_exact"])


def _goodness(run, fit_dir: Path, echo) -> Path | None:
    """Goodness-of-fit table, one line per environment, and the KS plot of the best cell."""
    import matplotlib.pyplot as plt

    from encodex.report.figures import save_figure
    from encodex.report.goodness import ALL_LABELS, fit_summary, write_fit_summary
    from encodex.report.goodness_figures import ks_figure
    from encodex.report.load import file_name_part

    summary = fit_summary(run.cells)
    write_fit_summary(summary, fit_dir / "tables")
    for r in summary[summary["label"] == ALL_LABELS].itertuples(index=False):
        echo(f"  goodness of fit, {r.environment}: {r.n_within_band} of {r.n_checked} "
             f"classified cells inside the 95% KS band of time rescaling")
    ok = run.cells[(run.cells["status"] == "ok") & (run.cells["variables"] != "none")]
    if ok.empty:
        return None
    best = ok.loc[pd.to_numeric(ok["bits_per_spike"], errors="coerce").idxmax()]
    unit, env = str(best["unit"]), str(best["environment"])
    fig = ks_figure(run.unit_arrays(env, unit) or {}, best,
                    title=f"unit {unit} in {env}, label '{best['variables']}'")
    stem = fit_dir / "figures" / f"ks_{file_name_part(env)}_{file_name_part(unit)}"
    save_figure(fig, stem)
    plt.close(fig)
    echo(f"  KS plot of unit {unit} in {env}: {stem}.png")
    return stem.with_name(stem.name + ".png")


def write_demo_tables(run, fit_dir: Path, echo):
    """A demo's tables and methods paragraph (tables/ of the fit folder); echoes the
    per-variable table and returns the tables."""
    from encodex.report.methods import methods_markdown, methods_paragraph
    from encodex.report.tables import display_frame, make_tables, to_markdown, write_tables

    tables = make_tables(run)
    write_tables(tables, fit_dir / "tables")
    (fit_dir / "tables" / "methods.md").write_text(methods_markdown(run.run))
    (fit_dir / "tables" / "methods.txt").write_text(methods_paragraph(run.run))
    echo(to_markdown(display_frame(tables.variables, tables.level)))
    return tables


def claim_demo_folder(out: Path, params: dict, echo) -> None:
    """Own a demo's folder: refuse anyone else's files before writing anything, and start
    over (not half-resume) when the simulation asked for differs (``params``)."""
    state = own_folder(out, DEMO_MARKER, params)
    if state.startswith("replaced"):
        echo(f"{out} held an earlier demo ({state[len('replaced: '):]}); it was replaced")


def demo(out, n_cells: int = 12, duration_s: float = 900.0, jobs: int = 2, seed: int = 1,
         echo=print, max_cells: int = 16) -> dict[str, Path]:
    """Run the demo: simulate a session, write NWB, fit, then tables, comparison and report.

    Parameters
    ----------
    out : str or Path
        Folder for everything (``data/``, ``fit/``, ``report.html``).
    n_cells : int
        Simulated units.
    duration_s : float
        Seconds recorded per environment.
    jobs : int
        Parallel workers of the fit and of the report's figures.
    seed : int
        Seed of the simulation and of the folds.
    echo : callable
        Where progress lines go (``print`` by default).
    max_cells : int
        Per-cell sections in the report.

    Returns
    -------
    dict
        Paths under ``"nwb"``, ``"truth"``, ``"fit"``, ``"tables"``, ``"compare"``,
        ``"report"``.
    """
    from encodex.report.environments import compare_environments, write_comparison
    from encodex.report.figures import comparison_figure, population_figure, save_figure
    from encodex.report.html import build_report
    from encodex.report.load import load_run
    from encodex.simulate import simulate_to_files

    if n_cells < 1:
        raise SettingsError(f"--cells must be at least 1; got {n_cells}")
    if jobs < 1:
        raise SettingsError(f"--jobs must be at least 1; got {jobs}")
    out = Path(out)
    claim_demo_folder(out, {"cells": int(n_cells), "duration_s": float(duration_s),
                            "seed": int(seed)}, echo)
    t0 = time.perf_counter()

    def step(msg):
        echo(f"[{time.perf_counter() - t0:6.1f} s] {msg}")

    step(f"1/6 simulating {n_cells} cells, {len(DEMO_ENVIRONMENTS)} environments x "
         f"{duration_s:g} s (invented open-box foraging scenario, seed {seed})")
    files = simulate_to_files(out / "data", seed=seed, n_cells=n_cells, duration_s=duration_s,
                              environments=DEMO_ENVIRONMENTS)
    step(f"2/6 wrote NWB file {files['nwb']} (ground truth in {files['truth'].name})")
    fit_dir = out / "fit"
    step("3/6 fitting every cell (cross-validated nested model comparison)")
    _fit(files["nwb"], fit_dir, jobs, seed, echo)
    run = load_run(fit_dir)
    step("4/6 tables")
    tables = write_demo_tables(run, fit_dir, echo)
    _goodness(run, fit_dir, echo)
    truth = pd.read_csv(files["truth"], dtype={"unit": str, "environment": str})
    rec = recovery_summary(run.cells, truth)
    for r in rec.itertuples(index=False):
        echo(f"  ground truth check, {r.environment}: {r.exact} of {r.classified} classified "
             f"cells got exactly their simulated label ({r.percent_exact:.0f}%)")
    step("5/6 comparing the two environments")
    a, b = DEMO_ENVIRONMENTS
    cmp = compare_environments(run, a, b)
    write_comparison(cmp, fit_dir / "compare")
    import matplotlib.pyplot as plt

    for fig, stem in ((comparison_figure(cmp), f"compare_{a}_vs_{b}"),
                      (population_figure(run.cells, run.alpha), "population")):
        save_figure(fig, fit_dir / "figures" / stem)
        plt.close(fig)
    echo("  " + cmp.notes[0])
    step("6/6 writing the HTML report")
    report = build_report(fit_dir, out=out / "report.html", between=(a, b),
                          max_cells=max_cells, title="encodex demo: simulated two-room session",
                          jobs=jobs)
    step("done")
    echo(tables.caveat)
    return {"nwb": files["nwb"], "truth": files["truth"], "fit": fit_dir,
            "tables": fit_dir / "tables", "compare": fit_dir / "compare", "report": report}
