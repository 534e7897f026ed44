"""Figures of a fit run: per cell, per population, and the environment comparison.

Figures need no display (the command line draws with the Agg backend), label axes with
units, and are saved as PNG and PDF by :func:`save_figure`. Response terms are drawn as
rates in Hz (:mod:`encodex.report.cellplots`); each variable keeps one colour in every figure
and environments have colours of their own (:mod:`encodex.report.palette`).
"""

from __future__ import annotations

import base64
import io
from pathlib import Path

# The backend is left to the user (inline in Jupyter; matplotlib falls back to a file-only
# backend without a display); the command line chooses Agg (encodex.report.commands).
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.ticker import MaxNLocator  # noqa: E402

from encodex.errors import InputError, OutputError  # noqa: E402
from encodex.report.load import RunFolder  # noqa: E402
from encodex.report.palette import environment_colour  # noqa: E402

__all__ = [
    "save_figure",
    "figure_png_base64",
    "cell_figure",
    "population_figure",
    "comparison_figure",
]


plt.rcParams.update({"figure.dpi": 100, "axes.spines.top": False, "axes.spines.right": False,
                     "font.size": 9, "axes.titlesize": 10})


def save_figure(fig, stem: str | Path, formats: tuple[str, ...] = ("png", "pdf"),
                dpi: int = 150) -> list[Path]:
    """Save a figure as ``<stem>.png`` and ``<stem>.pdf`` (or the given formats).

    Returns
    -------
    list of Path
        The files written.
    """
    stem = Path(stem)
    try:
        stem.parent.mkdir(parents=True, exist_ok=True)
        out = []
        for fmt in formats:
            # not with_suffix: a stem such as "compare_room.a_vs_room.b" keeps its dots
            p = stem.parent / f"{stem.name}.{fmt}"
            fig.savefig(p, dpi=dpi, bbox_inches="tight")
            out.append(p)
    except OSError as exc:
        raise OutputError(f"cannot write figure {stem} ({exc.strerror}); check the folder")
    return out


def figure_png_base64(fig, dpi: int = 130) -> str:
    """PNG bytes of a figure, base64-encoded for embedding in HTML (tight bounding box, so
    colour-bar labels and footers are never cut)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", pad_inches=0.08)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _caveat_footer(fig, alpha: float) -> None:
    fig.text(0.0, -0.01, f"Labels are statistical statements at alpha = {alpha:g} about this "
             f"session's behaviour (held-out prediction), not proof of mechanism.",
             fontsize=7, color="0.35", ha="left", va="top")


def cell_figure(run: RunFolder, unit: str, environment: str):
    """Figure of one cell in one environment.

    Top row: every response term of the chosen model as a rate in Hz with its 95% credible
    band, observed rate per bin (dots) and time spent per bin (shaded); position as fitted
    and observed maps on one colour scale. Below, for labelled cells: the selection path
    (each step's held-out gain per fold, its p-value against the step's level) and the model
    check (observed against model rate per bin). See :mod:`encodex.report.cellplots`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from encodex.report.cellplots import draw_cell, response_terms

    cells = run.cells
    row = cells[(cells["unit"] == str(unit)) & (cells["environment"] == str(environment))]
    if row.empty:
        raise InputError(
            f"unit {unit} in environment {environment} is not in cells.csv; check the names"
        )
    row = row.iloc[0]
    arrays = run.unit_arrays(environment, unit) or {}
    if "track__edges" in arrays:  # a cell on a track: its own layout
        from encodex.report.track_figures import track_cell_figure

        return track_cell_figure(run, unit, environment, row, arrays)
    m = run.models
    m = m[(m["unit"].astype(str) == str(unit)) & (m["environment"].astype(str) ==
                                                  str(environment))]
    ok = row["status"] == "ok"
    n_top = (len(response_terms(arrays)) if ok else 0) + int("ratemap__spikes" in arrays)
    size = (max(3.5 * max(n_top, 3), 9.5), 7.4) if ok else (max(4.6 * n_top, 6.0), 3.8)
    fig = plt.figure(figsize=size, layout="constrained")
    draw_cell(fig, row, arrays, m)
    what = (f"label {row['variables']}" if ok else
            f"not labelled ({row['status']})\n{row['reason']}")
    gain = row["bits_per_spike"]
    fig.suptitle(
        f"unit {unit} in {environment}: {what}, {int(row['n_spikes'])} spikes"
        + (f", held-out information {gain:.3f} bits/spike (pooled folds)"
           if ok and np.isfinite(gain) else ""), fontsize=10)
    _caveat_footer(fig, run.alpha)
    return fig


def population_figure(cells: pd.DataFrame, alpha: float | None = None, level: float = 0.95):
    """Percent of classified cells per label and environment, with Wilson intervals.

    One panel per environment; each label's bar is striped in the colours of its variables
    (:mod:`encodex.report.popplots`). With ``alpha`` given, a footnote states what a label
    means.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from encodex.report.popplots import draw_population

    fig = draw_population(cells, level)
    if alpha is not None:
        _caveat_footer(fig, alpha)
    return fig


def comparison_figure(cmp):
    """The environment comparison: label transitions (paired) and per-variable fractions.

    Parameters
    ----------
    cmp : encodex.report.environments.EnvironmentComparison

    Returns
    -------
    matplotlib.figure.Figure
    """
    paired = cmp.paired and not cmp.transitions.empty
    ncol = 2 if paired else 1
    fig, axes = plt.subplots(1, ncol, figsize=(5.2 * ncol + 1, 4.4), layout="constrained")
    axes = np.atleast_1d(axes)
    if paired:
        ax = axes[0]
        t = cmp.transitions
        im = ax.imshow(t.to_numpy(), cmap="Blues", aspect="auto")
        for (i, j), v in np.ndenumerate(t.to_numpy()):
            ax.text(j, i, str(v), ha="center", va="center", fontsize=8,
                    color="white" if v > t.to_numpy().max() / 2 else "black")
        ax.set_xticks(range(t.shape[1]))
        ax.set_xticklabels(t.columns, rotation=40, ha="right")
        ax.set_yticks(range(t.shape[0]))
        ax.set_yticklabels(t.index)
        ax.set_xlabel(f"label in {cmp.b}")
        ax.set_ylabel(f"label in {cmp.a}")
        ax.set_title(f"label transitions ({cmp.n_paired} cells in both)")
        cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
        cb.set_label("cells")
        cb.locator = MaxNLocator(integer=True)
        cb.update_ticks()
    ax = axes[-1]
    v = cmp.variables
    y = np.arange(len(v))
    for k, (env, suffix, colour, off) in enumerate(((cmp.a, "a", environment_colour(0), -0.15),
                                                    (cmp.b, "b", environment_colour(1), 0.15))):
        f = 100 * v[f"fraction_{suffix}"].to_numpy(float)
        lo = 100 * v[f"ci_low_{suffix}"].to_numpy(float)
        hi = 100 * v[f"ci_high_{suffix}"].to_numpy(float)
        # Wilson bounds at 0% or 100% differ from the estimate by rounding (~1e-16), which
        # can make an error bar length negative; matplotlib refuses those.
        err = np.clip(np.nan_to_num([f - lo, hi - f], nan=0.0), 0.0, None)
        ax.errorbar(f, y + off, xerr=err, fmt="o", color=colour, capsize=2,
                    label=env)
    for i, r in enumerate(v.itertuples(index=False)):
        if np.isfinite(r.p_adjusted):
            ax.text(101, i, f"p(BH) = {r.p_adjusted:.2g}", va="center", fontsize=7)
    ax.set_yticks(y)
    ax.set_yticklabels(v["variable"])
    ax.invert_yaxis()
    ax.set_xlim(0, 118)
    ax.set_xlabel("cells carrying the variable (% of classified, 95% Wilson CI)")
    ax.legend(frameon=False, fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.16),
              ncol=2)
    ax.set_title("paired" if cmp.paired else "unpaired (cells not matched)")
    fig.suptitle(f"{cmp.a} vs {cmp.b}", fontsize=10)
    _caveat_footer(fig, cmp.alpha)
    return fig
