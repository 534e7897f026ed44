"""Report stage: tables for papers, environment comparison, figures, HTML report, demo.

Reads the output folder of ``encodex fit`` (see DEVELOPERS.md) and never refits anything.

Typical use from Python::

    from encodex.report import load_run, make_tables, compare_environments, build_report
    run = load_run("fit_output")
    tables = make_tables(run)            # tables.labels, tables.variables, tables.excluded
    cmp = compare_environments(run, "room_a", "room_b")
    build_report("fit_output")           # fit_output/report.html

Every label is a statistical statement at the run's alpha about this session's behaviour,
not proof of mechanism (see :func:`encodex.report.wording.label_caveat`).
"""

from encodex.report.environments import (
    EnvironmentComparison,
    compare_environments,
    write_comparison,
)
from encodex.report.figures import cell_figure, comparison_figure, population_figure, save_figure
from encodex.report.html import build_report, render_report
from encodex.report.load import RunFolder, load_run
from encodex.report.methods import methods_paragraph
from encodex.report.tables import PaperTables, make_tables, wilson_interval, write_tables
from encodex.report.wording import label_caveat

__all__ = [
    "EnvironmentComparison",
    "PaperTables",
    "RunFolder",
    "build_report",
    "cell_figure",
    "compare_environments",
    "comparison_figure",
    "label_caveat",
    "load_run",
    "make_tables",
    "methods_paragraph",
    "population_figure",
    "render_report",
    "save_figure",
    "wilson_interval",
    "write_comparison",
    "write_tables",
]
