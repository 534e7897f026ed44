"""The whole job on a simulated track session (``encodex demo --track SCENARIO``).

simulate -> NWB -> fit -> tables -> report, each step timed and printed, as
:func:`encodex.report.demo.demo` does for the two-room arena session.
"""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd

from encodex.errors import SettingsError


def track_demo(out, scenario: str = "gain_corridor", n_cells: int = 12,
               duration_s: float = 900.0, jobs: int = 2, seed: int = 1, echo=print,
               max_cells: int = 16) -> dict[str, Path]:
    """Run the demo on a simulated track (:mod:`encodex.simulate_track` scenarios).

    Parameters
    ----------
    out : str or Path
        Folder for everything (``data/``, ``fit/``, ``report.html``).
    scenario : str
        ``shuttle``, ``circular``, ``gain_corridor`` or ``corridor``.
    n_cells, duration_s, jobs, seed, echo, max_cells
        As for :func:`encodex.report.demo.demo` (one environment of ``duration_s`` seconds).

    Returns
    -------
    dict
        Paths under ``"nwb"``, ``"truth"``, ``"fit"``, ``"tables"``, ``"report"``.
    """
    from encodex.population import run_population
    from encodex.report.demo import recovery_summary
    from encodex.report.html import build_report
    from encodex.report.load import load_run
    from encodex.simulate_track import TRACK_SCENARIOS, simulate_track_to_files

    if scenario not in TRACK_SCENARIOS:
        raise SettingsError(f"unknown track scenario {scenario!r}; use one of "
                            f"{', '.join(TRACK_SCENARIOS)}")
    if n_cells < 1 or jobs < 1:
        raise SettingsError(f"--cells and --jobs must be at least 1; got {n_cells}, {jobs}")
    out = Path(out)
    from encodex.report.demo import claim_demo_folder, write_demo_tables

    claim_demo_folder(out, {"track": scenario, "cells": int(n_cells),
                            "duration_s": float(duration_s), "seed": int(seed)}, echo)
    t0 = time.perf_counter()

    def step(msg):
        echo(f"[{time.perf_counter() - t0:6.1f} s] {msg}")

    step(f"1/4 simulating {n_cells} cells on the {scenario} track, {duration_s:g} s (seed "
         f"{seed})")
    files = simulate_track_to_files(out / "data", scenario, seed=seed, n_cells=n_cells,
                                    duration_s=duration_s)
    fit_dir = out / "fit"
    step(f"2/4 fitting every cell of {files['nwb']}")
    echo(f"  (same as: encodex fit {files['nwb']} --out {fit_dir} --jobs {jobs} --seed {seed})")
    run_population(files["nwb"], out=fit_dir, jobs=jobs, seed=seed, progress=True)
    run = load_run(fit_dir)
    step("3/4 tables")
    tables = write_demo_tables(run, fit_dir, echo)
    truth = pd.read_csv(files["truth"], dtype={"unit": str, "environment": str})
    for r in recovery_summary(run.cells, truth).itertuples(index=False):
        echo(f"  ground truth check: {r.exact} of {r.classified} classified cells got exactly "
             f"their simulated label ({r.percent_exact:.0f}%)")
    flagged = int((run.cells["ambiguous_with"].fillna("").astype(str) != "").sum())
    echo(f"  {flagged} cells carry an ambiguity flag (variables this session cannot tell "
         "apart from their label)")
    step("4/4 writing the HTML report")
    report = build_report(fit_dir, out=out / "report.html", max_cells=max_cells,
                          title=f"encodex demo: simulated {scenario} track session",
                          jobs=jobs)
    step("done")
    echo(tables.caveat)
    return {"nwb": files["nwb"], "truth": files["truth"], "fit": fit_dir,
            "tables": fit_dir / "tables", "report": report}
