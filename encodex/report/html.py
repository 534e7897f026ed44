"""One self-contained HTML report of a fit run.

The file embeds its figures as base64 PNG and its style sheet inline; it loads no script and
no remote resource, so a collaborator can open it offline from an e-mail attachment.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
from itertools import combinations
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from encodex.errors import OutputError, SettingsError
from encodex.report.environments import compare_environments, summary_frame
from encodex.report.figures import (
    cell_figure,
    comparison_figure,
    figure_png_base64,
    population_figure,
)
from encodex.report.load import RunFolder, load_run, setting
from encodex.report.methods import methods_paragraph, methods_references
from encodex.report.tables import (
    cells_display,
    display_frame,
    excluded_display,
    make_tables,
    not_analysed_display,
)
from encodex.report.wording import AMBIGUITY_SENTENCE, label_caveat

__all__ = ["build_report", "render_report"]

_CSS = """
body{font-family:-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;margin:0;color:#1d232a;
background:#f6f7f9;line-height:1.45}
header{background:#1f5f8b;color:#fff;padding:18px 32px}
header h1{margin:0;font-size:1.5em} header p{margin:4px 0 0;opacity:.9}
nav{background:#fff;border-bottom:1px solid #dde1e6;padding:8px 32px;position:sticky;top:0}
nav a{margin-right:16px;color:#1f5f8b;text-decoration:none;font-weight:600}
main{padding:8px 32px 48px;max-width:1200px}
section{background:#fff;border:1px solid #dde1e6;border-radius:6px;padding:12px 20px;
margin:18px 0}
h2{color:#1f5f8b;border-bottom:1px solid #e3e7ec;padding-bottom:4px}
.caveat{background:#fff6e5;border-left:4px solid #d9822b;padding:8px 14px;margin:12px 0}
table.data{border-collapse:collapse;font-size:.88em;margin:8px 0 14px}
table.data th{background:#eef2f6;text-align:left}
table.data th,table.data td{border:1px solid #d5dbe2;padding:3px 8px}
table.data tr:nth-child(even) td{background:#fafbfc}
.scroll{overflow-x:auto;max-width:100%}
img.fig{max-width:100%;height:auto;border:1px solid #eef0f3;margin:6px 0}
.cell{border-top:1px dashed #cfd6de;padding-top:8px;margin-top:14px}
pre{background:#f1f3f5;padding:10px;overflow-x:auto;font-size:.85em}
.small{font-size:.85em;color:#4a5560}
"""


def _table(df: pd.DataFrame, caption: str = "") -> str:
    if df is None or df.empty:
        return "<p class='small'>(none)</p>"
    body = df.to_html(index=False, classes="data", border=0, na_rep="", escape=True,
                      float_format=lambda x: f"{x:.4g}")
    cap = f"<p class='small'>{html.escape(caption)}</p>" if caption else ""
    return cap + f"<div class='scroll'>{body}</div>"


def _img(fig, alt: str) -> str:
    data = figure_png_base64(fig)
    plt.close(fig)
    return f"<img class='fig' alt='{html.escape(alt)}' src='data:image/png;base64,{data}'>"


def _bin_size(run: dict):
    b = setting(run, "bin_size")
    if b is None and isinstance(run.get("session"), dict):
        b = run["session"].get("bin_size_s")
    return "?" if b is None else f"{b:g}"


def _transition_frame(t: pd.DataFrame, a: str, b: str) -> pd.DataFrame:
    """Transition counts as a flat table whose first column names the A label."""
    flat = t.copy()
    flat.columns = [str(c) for c in flat.columns]
    flat.insert(0, f"{a} \\ {b}", [str(i) for i in flat.index])
    return flat.reset_index(drop=True)


def _pairs(envs: tuple[str, ...], between) -> list[tuple[str, str]]:
    if between:
        a, b = between
        for e in (a, b):
            if e not in envs:
                raise SettingsError(
                    f"environment {e!r} is not in cells.csv; choose from {', '.join(envs)}")
        return [(a, b)]
    return list(combinations(envs, 2))[:3]


def cell_order(run: RunFolder, max_cells: int) -> tuple[list[tuple[str, str]], int]:
    """(unit, environment) pairs the report shows a figure of, and how many it leaves out."""
    c = run.cells.copy()
    c["_ok"] = c["status"] == "ok"
    c["_tuned"] = c["_ok"] & (c["variables"] != "none")
    c["_gain"] = pd.to_numeric(c["bits_per_spike"], errors="coerce").fillna(-np.inf)
    # tuned cells by decreasing held-out gain first, then untuned, then excluded
    c = c.sort_values(["_tuned", "_ok", "_gain"], ascending=[False, False, False])
    pairs = list(zip(c["unit"].astype(str), c["environment"].astype(str)))
    return pairs[:max_cells], max(0, len(pairs) - max_cells)


def _goodness_section(cells: pd.DataFrame) -> list[str]:
    """The "Goodness of fit" section: summary per environment and label, figure, caveat."""
    from encodex.report.goodness import display_fit_summary, fit_caveat, fit_summary
    from encodex.report.goodness_figures import ks_population_figure

    summary = fit_summary(cells)
    head = ["<section id='fit'><h2>Goodness of fit</h2>"]
    if summary.empty:
        return head + ["<p>This folder has no goodness-of-fit columns (written before they "
                       "existed); re-run <code>encodex fit</code> to add them.</p></section>"]
    return head + [
        "<p>Each chosen model (for 'none', the baseline model: drift-only, or mean-rate "
        "with drift off) is checked on its held-out predictions: time-rescaling KS test with the discrete-time correction, dispersion "
        "of counts in 1 s windows, and spike pairs within 0.05 s (bursts above 1, "
        "refractoriness below 1). If every model described its spike train, about 95% of "
        "cells would lie inside the band.</p>",
        f"<div class='caveat'>{html.escape(fit_caveat())}</div>",
        _table(display_fit_summary(summary), "Classified cells inside the 95% KS band with "
               "95% Wilson intervals; over-dispersion and history structure counted at "
               "p < 0.05 (two-sided)."),
        _img(ks_population_figure(summary), "cells inside the KS band"),
        "</section>"]


def render_report(run: RunFolder, between=None, max_cells: int = 30,
                  title: str | None = None, jobs: int = 1) -> str:
    """The report of a fit run as one HTML string (figures embedded).

    Parameters
    ----------
    run : RunFolder
        The fit output.
    between : (str, str), optional
        Environments to compare; default every pair (at most three pairs).
    max_cells : int
        Per-cell sections to include (tuned cells by decreasing held-out gain first).
    title : str, optional
        Report title.
    jobs : int
        Worker processes drawing the per-cell figures (the slow part: about a second of
        matplotlib layout and rendering each); the report is the same byte for byte
        whatever the number.
    """
    if max_cells < 0:
        raise SettingsError(f"max_cells must be >= 0; got {max_cells}")
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs < 1:
        raise SettingsError(f"jobs must be a positive integer (got {jobs!r}); use --jobs 1")
    chosen, omitted = cell_order(run, max_cells)
    # With workers the cell figures are drawn while this process builds the other sections.
    cell_sections = _cell_sections(run, chosen, jobs)
    tables = make_tables(run)
    alpha = run.alpha
    caveat = label_caveat(alpha)
    envs = run.environments
    title = title or f"encodex report: {run.path.name}"
    cells = run.cells
    n_units = cells["unit"].nunique()
    summary_rows = []
    for env in envs:
        sub = cells[cells["environment"] == env]
        ok = sub[sub["status"] == "ok"]
        tuned = ok[ok["variables"] != "none"]
        summary_rows.append({
            "environment": env, "units": len(sub), "labelled": len(ok),
            "carry at least one variable": len(tuned),
            "labelled none": len(ok) - len(tuned),
            "not labelled": int((sub["status"] != "ok").sum()),
            # "none" cells have the mean-rate model (0 by construction): not in the median
            "median held-out information of cells carrying a variable (bits/spike)":
                float(np.nanmedian(pd.to_numeric(tuned["bits_per_spike"], errors="coerce")))
                if len(tuned) else np.nan,
        })
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<header><h1>{html.escape(title)}</h1><p>Run folder {html.escape(str(run.path))} - "
        f"report written {_dt.datetime.now().strftime('%Y-%m-%d %H:%M')}</p></header>",
        "<nav><a href='#summary'>Summary</a><a href='#tables'>Tables</a>"
        "<a href='#population'>Population</a><a href='#fit'>Fit</a>"
        "<a href='#compare'>Environments</a>"
        "<a href='#cells'>Cells</a><a href='#methods'>Methods</a>"
        "<a href='#settings'>Settings</a></nav><main>",
        f"<div class='caveat' id='caveat'><b>How to read the labels.</b> "
        f"{html.escape(caveat)} {html.escape(AMBIGUITY_SENTENCE)}</div>",
        "<section id='summary'><h2>Summary</h2>",
        f"<p>{n_units} units in {len(envs)} environment(s): "
        f"{html.escape(', '.join(envs))}. Significance level alpha = {alpha:g}; "
        f"{setting(run.run, 'folds', '?')}-fold cross-validation; time bins of "
        f"{_bin_size(run.run)} s.</p>",
        _table(pd.DataFrame(summary_rows)), "</section>",
        "<section id='tables'><h2>Tables</h2>",
        "<h3>Cells per label</h3>",
        _table(display_frame(tables.labels), "Percent of labelled cells with 95% Wilson "
               "score intervals; held-out information of the chosen model (all held-out "
               "bins pooled), blank for 'none'."),
        "<h3>Cells per variable (a cell can carry several)</h3>",
        _table(display_frame(tables.variables), "Only variables analysed in the "
               "environment; gain of the variable averaged over folds."),
        "<h3>Variables not analysed</h3>", _table(not_analysed_display(tables.not_analysed)),
        "<h3>Cells not labelled</h3>", _table(excluded_display(tables.excluded)),
        "<h3>Every cell: model beside classic measures</h3>",
        _table(cells_display(tables.cells), "Held-out information of the chosen model and "
               "Skaggs spatial information (bias-corrected and plug-in) in bits/spike; peak "
               "and mean rate of the unsmoothed occupancy-normalised map (Hz). Blank: not "
               "labelled (see Status) or not available."),
        f"<p class='small'>{html.escape(caveat)}</p></section>",
        "<section id='population'><h2>Population</h2>",
        _img(population_figure(cells, alpha), "percent of labelled cells per label"),
        "</section>",
        *_goodness_section(cells),
        "<section id='compare'><h2>Comparing environments</h2>",
    ]
    pairs = _pairs(envs, between)
    if not pairs:
        parts.append("<p>Only one environment: nothing to compare.</p>")
    for a, b in pairs:
        cmp = compare_environments(run, a, b)
        parts += [f"<h3>{html.escape(a)} vs {html.escape(b)}</h3>"]
        parts += [f"<p>{html.escape(n)}</p>" for n in cmp.notes]
        parts.append(_img(comparison_figure(cmp), f"{a} vs {b}"))
        if cmp.paired:
            parts += ["<h4>Label transitions (rows: " + html.escape(a) + ", columns: "
                      + html.escape(b) + ")</h4>",
                      _table(_transition_frame(cmp.transitions, a, b))]
        parts += ["<h4>Per variable</h4>", _table(summary_frame(cmp)),
                  "<h4>Held-out gains</h4>", _table(cmp.gains),
                  "<h4>Active in one environment, silent in the other</h4>",
                  _table(cmp.activity)]
        if not cmp.stability.empty:
            st = (cmp.stability.groupby("variable")["correlation"]
                  .agg(cells="count", median="median").reset_index())
            parts += ["<h4>Stability of tuning (correlation of fitted responses)</h4>",
                      _table(st), _table(cmp.stability)]
    parts.append("</section>")
    parts.append("<section id='cells'><h2>Cells</h2>")
    parts.append(f"<p class='small'>{html.escape(caveat)}</p>")
    if chosen:
        parts.append("<p>" + " ".join(
            f"<a href='#cell-{html.escape(e)}-{html.escape(u)}'>{html.escape(u)} "
            f"({html.escape(e)})</a>" for u, e in chosen) + "</p>")
    parts += [part for share in cell_sections for part in share]
    if omitted:
        parts.append(f"<p class='small'>{omitted} further cell/environment pairs are not shown "
                     f"(raise --max-cells to include them); every cell is in cells.csv.</p>")
    parts.append("</section>")
    parts += [
        "<section id='methods'><h2>Methods</h2>",
        f"<p>{html.escape(methods_paragraph(run.run, with_references=False))}</p>",
        "<h3>References</h3><ul>",
        *[f"<li>{html.escape(r)}</li>" for r in methods_references(run.run)],
        "</ul></section>",
        "<section id='settings'><h2>Settings (run.json)</h2>",
        f"<pre>{html.escape(json.dumps(run.run, indent=2, default=str))}</pre></section>",
        "</main></body></html>",
    ]
    return "\n".join(parts)


#: Below this many cells the figures are drawn in this process: starting workers (~1-2 s,
#: matplotlib and encodex imported afresh) costs more than it saves.
PARALLEL_MIN_CELLS = 4


def figure_workers(n_cells: int, jobs: int) -> int:
    """Processes that draw ``n_cells`` cell figures when ``jobs`` are allowed (1: this one)."""
    return 1 if n_cells < PARALLEL_MIN_CELLS else max(1, min(int(jobs), n_cells))


def _cell_sections(run: RunFolder, pairs: list[tuple[str, str]], jobs: int):
    """HTML of the per-cell sections, in shares drawn by up to ``jobs`` worker processes.

    Returns an iterator over lists of sections, in the order of ``pairs``. Each worker
    draws a contiguous share of the cells with the caller's matplotlib settings (rcParams),
    so the joined sections are the ones one process draws. The workers start at once (the
    caller can build other parts meanwhile); in one process the figures are drawn as the
    iterator is read.
    """
    jobs = figure_workers(len(pairs), jobs)
    if jobs == 1:
        return ([_cell_section(run, u, e)] for u, e in pairs)
    from joblib import Parallel, delayed

    bounds = np.linspace(0, len(pairs), jobs + 1).round().astype(int)
    shares = [pairs[a:b] for a, b in zip(bounds[:-1], bounds[1:])]
    rc = _portable_rc()
    return Parallel(n_jobs=jobs, return_as="generator")(
        delayed(_draw_sections)(run, share, rc) for share in shares)


def _portable_rc() -> dict:
    """The caller's matplotlib settings that a worker can take over (not the backend)."""
    import matplotlib

    skip = {"backend", "backend_fallback", "interactive"}
    return {k: v for k, v in matplotlib.rcParams.items() if k not in skip}


def _draw_sections(run: RunFolder, pairs, rc: dict) -> list[str]:
    """In a worker: HTML sections of ``pairs`` (unit, environment), one figure each, drawn
    into memory with the Agg backend and the caller's matplotlib settings ``rc``."""
    import matplotlib

    matplotlib.use("Agg")
    with matplotlib.rc_context(rc):
        return [_cell_section(run, u, e) for u, e in pairs]


def _cell_section(run: RunFolder, unit: str, env: str) -> str:
    fig = cell_figure(run, unit, env)
    return "\n".join([f"<div class='cell' id='cell-{html.escape(env)}-{html.escape(unit)}'>",
                      f"<h3>Unit {html.escape(unit)} in {html.escape(env)}</h3>",
                      _img(fig, f"unit {unit} in {env}"), "</div>"])


def build_report(run_dir, out=None, between=None, max_cells: int = 30,
                 title: str | None = None, jobs: int = 1) -> Path:
    """Write the self-contained HTML report of a fit run.

    Parameters
    ----------
    run_dir : str or Path
        Output folder of ``encodex fit``.
    out : str or Path, optional
        HTML file to write; default ``<run_dir>/report.html``.
    between, max_cells, title, jobs
        See :func:`render_report`.

    Returns
    -------
    Path
        The HTML file.
    """
    run = load_run(run_dir)
    text = render_report(run, between=between, max_cells=max_cells, title=title, jobs=jobs)
    path = Path(out) if out is not None else run.path / "report.html"
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise OutputError(f"cannot write {path} ({exc.strerror}); choose a writable path")
    return path
