"""Report stage: tables for papers, environment comparison, figures, HTML report, demo.

Reads the output folder of ``encodex fit`` (see DEVELOPERS.md) and never refits anything.

Typical use from Python::

    from encodex.report import load_run, make_tables, compare_environments, build_report
    run = load_run("fit_output")
    tables = make_tables(run)            # tables.labels, tables.variables, tables.excluded
    cmp = compare_environments(run, "room_a", "room_b")
    fit = fit_summary(run.cells)         # cells inside the KS band, per environment and label
    rec = compare_recordings("day1_fit", "day2_fit", matching="match.csv")  # two folders
    build_report("fit_output")           # fit_output/report.html

Every label is a statistical statement at the run's alpha about this session's behaviour,
not proof of mechanism (see :func:`encodex.report.wording.label_caveat`).
"""

import importlib

# Names are imported on first use (PEP 562): the command line loads this package for its
# subcommands, and ``encodex fit`` should not pay for matplotlib, pandas and scipy.stats.
_WHERE = {
    "EnvironmentComparison": "environments", "compare_environments": "environments",
    "write_comparison": "environments",
    "cell_figure": "figures", "comparison_figure": "figures", "population_figure": "figures",
    "save_figure": "figures",
    "build_report": "html", "render_report": "html",
    "RunFolder": "load", "load_run": "load",
    "methods_paragraph": "methods", "register_sentence": "methods",
    "PaperTables": "tables", "make_tables": "tables", "wilson_interval": "tables",
    "write_tables": "tables",
    "label_caveat": "wording",
    "RecordingComparison": "recordings", "compare_recordings": "recordings",
    "write_recording_comparison": "recordings",
    "write_recordings_report": "recordings_html",
    "fit_summary": "goodness", "ks_figure": "goodness_figures",
}


def __getattr__(name: str):
    if name in _WHERE:
        return getattr(importlib.import_module(f"encodex.report.{_WHERE[name]}"), name)
    raise AttributeError(f"module 'encodex.report' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_WHERE))


__all__ = [
    "EnvironmentComparison",
    "PaperTables",
    "RecordingComparison",
    "RunFolder",
    "build_report",
    "cell_figure",
    "fit_summary",
    "ks_figure",
    "compare_environments",
    "compare_recordings",
    "comparison_figure",
    "label_caveat",
    "load_run",
    "make_tables",
    "methods_paragraph",
    "register_sentence",
    "population_figure",
    "render_report",
    "save_figure",
    "wilson_interval",
    "write_comparison",
    "write_recording_comparison",
    "write_recordings_report",
    "write_tables",
]
