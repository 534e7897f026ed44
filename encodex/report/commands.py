"""The ``table``, ``compare``, ``report`` and ``demo`` subcommands of the command line.

``encodex/cli.py`` calls :func:`register_report_commands` with its argparse subparsers. Every
subcommand sets ``func`` to a handler ``handler(args) -> int`` (exit code); errors are raised
as :class:`encodex.errors.EncodexError`, which the command line turns into a one-line message
and exit code 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from encodex.report.options import (RESULTS, add_jobs_option, add_results_argument, positive_number,
                                    resolve_jobs, whole_number)

__all__ = ["register_report_commands", "run_table", "run_compare", "run_report", "run_demo"]


def _out(msg: str = "") -> None:
    print(msg, file=sys.stdout, flush=True)


def _fraction(text: str) -> float:
    """argparse type: a number strictly between 0 and 1 (a level or a rate)."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1, got {text!r}") \
            from None
    if not 0 < v < 1:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1, got {v:g}")
    return v


def _renamed(new: str):
    """argparse type of a retired option: refuse it, naming the option that replaced it."""
    def parse(text: str):
        raise argparse.ArgumentTypeError(f"renamed {new} (it sets a false discovery rate)")
    return parse


def _headless() -> None:
    """Draw into files only (the Agg backend), whatever display the shell has."""
    import matplotlib

    matplotlib.use("Agg")


def run_table(args) -> int:
    """``encodex table DIR``: write label/variable/exclusion tables and the methods paragraph."""
    import pandas as pd

    from encodex.errors import OutputError
    from encodex.report.load import load_run
    from encodex.report.methods import methods_markdown, methods_paragraph
    from encodex.report.tables import display_frame, make_tables, to_markdown, write_tables

    run = load_run(args.dir)
    tables = make_tables(run, level=args.level)
    out = Path(args.out) if args.out else run.path / "tables"
    written = write_tables(tables, out)
    from encodex.report.goodness import ALL_LABELS, fit_summary, write_fit_summary

    fit = fit_summary(run.cells, level=args.level)
    written += write_fit_summary(fit, out)
    try:
        (out / "methods.md").write_text(methods_markdown(run.run, level=args.level))
        (out / "methods.txt").write_text(methods_paragraph(run.run, level=args.level))
    except OSError as exc:
        raise OutputError(f"cannot write the methods paragraph in {out} ({exc.strerror})")
    with pd.option_context("display.width", 200):
        _out(to_markdown(display_frame(tables.variables, tables.level)))
    _out(tables.caveat)
    for r in fit[fit["label"] == ALL_LABELS].itertuples(index=False):
        _out(f"Goodness of fit, {r.environment}: {r.n_within_band} of {r.n_checked} classified "
             f"cells inside the 95% KS band ({r.percent_within_band:.0f}%; table_goodness.md)")
    _out(f"\nwrote {len(written) + 2} files in {out} (CSV, Markdown, LaTeX tables; methods.md)")
    return 0


def run_compare(args) -> int:
    """``encodex compare DIR --between A B``: paired (or unpaired) comparison of labels.

    With two or more folders (``encodex compare DIR_A DIR_B [...]``) the recordings are
    compared instead (:func:`encodex.report.recordings_cli.run_compare_recordings`).
    """
    if len(args.dir) > 1:
        from encodex.report.recordings_cli import run_compare_recordings

        return run_compare_recordings(args, _out)
    from encodex.errors import SettingsError

    if not args.between:
        raise SettingsError("with one folder, --between A B names the two environments to "
                            "compare; or give two folders to compare recordings")
    for option in ("environments", "match", "names"):
        if getattr(args, option):
            raise SettingsError(f"--{option} is for comparing two or more folders; with one "
                                f"folder use --between A B")
    if args.coordinates != "own":
        raise SettingsError("--coordinates is for comparing two or more folders; one folder's "
                            "environments are compared in the recorded metres")
    args.dir = args.dir[0]
    _headless()
    import matplotlib.pyplot as plt

    from encodex.report.environments import compare_environments, summary_frame, write_comparison
    from encodex.report.figures import comparison_figure, save_figure
    from encodex.report.load import comparison_stem, load_run
    from encodex.report.tables import to_markdown

    run = load_run(args.dir)
    paired = False if args.unpaired else None
    cmp = compare_environments(run, args.between[0], args.between[1], paired=paired,
                               alpha=args.fdr)
    out = Path(args.out) if args.out else run.path / "compare"
    written = write_comparison(cmp, out)
    fig = comparison_figure(cmp)
    written += save_figure(fig, out / comparison_stem(cmp.a, cmp.b))
    plt.close(fig)
    for note in cmp.notes:
        _out(note)
    if cmp.paired:
        _out(f"\nLabel transitions (rows {cmp.a}, columns {cmp.b}):")
        _out(cmp.transitions.to_string())
    _out("")
    _out(to_markdown(summary_frame(cmp)))
    g = cmp.gains.iloc[0]
    _out(f"Held-out gains: {g['test']}, median {cmp.a} {g['median_a_bits_per_spike']:.3f}, "
         f"{cmp.b} {g['median_b_bits_per_spike']:.3f} bits/spike, p = {g['p_value']:.3g} "
         f"(BH {g['p_adjusted']:.3g})")
    if not cmp.activity.empty:
        _out(f"{len(cmp.activity)} cell(s) active in one environment and silent in the other.")
    _out(cmp.caveat)
    _out(f"\nwrote {len(written)} files in {out}")
    return 0


def run_report(args) -> int:
    """``encodex report DIR``: one self-contained HTML file, plus PNG/PDF population figures."""
    _headless()
    import matplotlib.pyplot as plt

    from encodex.report.environments import compare_environments
    from encodex.report.figures import (
        cell_figure,
        comparison_figure,
        population_figure,
        save_figure,
    )
    from encodex.report.html import build_report, cell_order, figure_workers
    from encodex.report.load import comparison_stem, file_name_part, load_run

    run = load_run(args.dir)
    jobs = resolve_jobs(args.jobs)
    n_cells = len(cell_order(run, args.max_cells)[0])
    used = figure_workers(n_cells, jobs)
    _out(f"{n_cells} per-cell figure{'s' * (n_cells != 1)} drawn by "
         + ("this process" if used == 1 else f"{used} worker processes") + " (--jobs)")
    path = build_report(args.dir, out=args.out, between=args.between,
                        max_cells=args.max_cells, jobs=jobs)
    figdir = path.parent / "figures"
    fig = population_figure(run.cells, run.alpha)
    save_figure(fig, figdir / "population")
    plt.close(fig)
    envs = run.environments
    if args.between:
        pairs = [tuple(args.between)]
    else:
        pairs = [(envs[i], envs[j]) for i in range(len(envs)) for j in range(i + 1, len(envs))]
    for a, b in pairs[:3]:
        fig = comparison_figure(compare_environments(run, a, b))
        save_figure(fig, figdir / comparison_stem(a, b))
        plt.close(fig)
    for unit, env in args.cell or []:
        fig = cell_figure(run, unit, env)
        save_figure(fig, figdir / f"cell_{file_name_part(env)}_{file_name_part(unit)}")
        plt.close(fig)
    _out(f"figures (PNG and PDF) in {figdir}")
    _out(f"report: {path.resolve()}")
    return 0


def run_demo(args) -> int:
    """``encodex demo --out DIR``: simulate -> NWB -> fit -> table -> compare -> report."""
    _headless()
    from encodex.report.demo import demo

    jobs = resolve_jobs(args.jobs)
    _out(f"{jobs} worker process{'es' * (jobs != 1)} (--jobs)")
    if getattr(args, "track", None):
        from encodex.report.track_demo import track_demo

        result = track_demo(args.out, args.track, n_cells=args.cells,
                            duration_s=args.duration, jobs=jobs, seed=args.seed, echo=_out)
    else:
        result = demo(args.out, n_cells=args.cells, duration_s=args.duration, jobs=jobs,
                      seed=args.seed, echo=_out)
    _out(f"\nreport: {result['report'].resolve()}")
    return 0


def register_report_commands(subparsers) -> None:
    """Add the ``table``, ``compare``, ``report`` and ``demo`` subcommands.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        From ``parser.add_subparsers()`` in ``encodex/cli.py``.
    """
    p = subparsers.add_parser(
        "table", help="tables for papers from an `encodex fit` folder",
        description="Count cells per label and per variable in each environment with 95% "
                    "Wilson score intervals and held-out gains; write CSV, Markdown and LaTeX "
                    "(booktabs) tables and a methods paragraph.")
    add_results_argument(p)
    p.add_argument("--out", metavar="DIR", help="folder for the tables (default RESULTS/tables)")
    p.add_argument("--level", type=float, default=0.95,
                   help="confidence level of the intervals (default 0.95)")
    p.set_defaults(func=run_table)

    p = subparsers.add_parser(
        "compare", help="compare labels between two environments, or between recordings",
        description="Transition table of labels, McNemar tests per variable, Wilcoxon "
                    "signed-rank test on paired gains, Benjamini-Hochberg correction; "
                    "unpaired tests when no cell is matched. One folder: two of its "
                    "environments (--between). Two or more folders: each later folder against "
                    "the first, cells matched by --match tables (identical ids by default).")
    p.add_argument("dir", nargs="+", metavar=RESULTS,
                   help="results folder(s) written by `encodex fit ... --out RESULTS`")
    p.add_argument("--between", nargs=2, metavar=("A", "B"),
                   help="the two environments of one folder (A: rows of the transition table)")
    from encodex.report.recordings_cli import add_recording_options

    add_recording_options(p)
    p.add_argument("--unpaired", action="store_true",
                   help="treat the populations as independent even if unit ids match")
    p.add_argument("--fdr", type=_fraction, default=None, metavar="Q",
                   help="false discovery rate of the Benjamini-Hochberg correction across "
                        "the tests (default: the run's alpha)")
    p.add_argument("--alpha", type=_renamed("--fdr"), default=None, help=argparse.SUPPRESS)
    p.add_argument("--out", metavar="DIR", help="folder for the results (default RESULTS/compare; "
                                                "with several folders the first's "
                                                "compare_recordings)")
    p.set_defaults(func=run_compare)

    p = subparsers.add_parser(
        "report", help="one self-contained HTML report of an `encodex fit` folder",
        description="Write an HTML file with figures embedded (opens offline): summary, "
                    "tables, population and comparison figures, per-cell sections, methods "
                    "and settings. Population figures are also saved as PNG and PDF.")
    add_results_argument(p)
    p.add_argument("--out", metavar="FILE", help="HTML file to write (default "
                                                 "RESULTS/report.html)")
    p.add_argument("--between", nargs=2, metavar=("A", "B"),
                   help="environments to compare (default: every pair, at most three)")
    p.add_argument("--max-cells", type=whole_number(0), default=30, metavar="N",
                   help="per-cell sections in the report (default 30, tuned cells first)")
    p.add_argument("--cell", nargs=2, action="append", metavar=("UNIT", "ENV"),
                   help="also save this cell's figure as PNG and PDF (repeatable)")
    add_jobs_option(p)
    p.set_defaults(func=run_report)

    p = subparsers.add_parser(
        "demo", help="the whole job on a simulated session",
        description="Simulate a two-environment session with known ground truth, write it as "
                    "NWB, fit every cell, then write tables, the environment comparison and "
                    "the HTML report.")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="folder for everything the demo writes (new, empty, or an earlier "
                        "demo's)")
    p.add_argument("--cells", type=int, default=12, metavar="N",
                   help="simulated units (default 12)")
    p.add_argument("--duration", type=positive_number("seconds"), default=900.0,
                   metavar="SECONDS",
                   help="seconds per environment (default 900)")
    add_jobs_option(p)
    p.add_argument("--seed", type=whole_number(0), default=1, metavar="S",
                   help="seed of the simulation and folds (default 1)")
    p.add_argument("--track", choices=("shuttle", "circular", "gain_corridor", "corridor"),
                   help="a simulated track session instead: shuttle runs on a linear track, "
                        "a circular track, or a virtual corridor with two gains "
                        "(gain_corridor) or one (corridor)")
    p.set_defaults(func=run_demo)

