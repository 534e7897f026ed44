"""Figures of the goodness-of-fit checks: the KS plot of time rescaling, per cell and pooled.

The KS plot (Brown, Barbieri, Ventura, Kass & Frank 2002, Neural Computation 14:325) draws
the sorted rescaled intervals ``z`` against the uniform quantiles ``(k - 1/2) / n``; a model
that describes the spike train keeps the curve inside the 95% band around the diagonal. The
curve comes from the unit npz (``goodness__ks_uniform``, ``goodness__ks_rescaled``,
``goodness__ks_critical``) written by ``encodex fit``.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from encodex.report.goodness import within_band

__all__ = ["ks_panel", "ks_figure", "ks_population_figure"]

_INSIDE, _OUTSIDE = "#1f5f8b", "#b33939"


def _num(row, key) -> float:
    try:
        return float(row.get(key, np.nan))
    except (TypeError, ValueError):
        return float("nan")


def ks_panel(ax, arrays: dict, row=None) -> bool:
    """Draw one cell's KS plot into ``ax``; returns False when the folder holds no curve.

    Parameters
    ----------
    ax : matplotlib Axes
    arrays : dict
        The unit's npz arrays.
    row : mapping, optional
        The cell's ``cells.csv`` row (KS distance, dispersion, history ratio for the legend).
    """
    u, z = arrays.get("goodness__ks_uniform"), arrays.get("goodness__ks_rescaled")
    if u is None or z is None or np.size(u) == 0:
        ax.text(0.5, 0.5, "no KS curve saved\n(too few spikes, or a folder written\n"
                "before goodness-of-fit checks)", ha="center", va="center",
                transform=ax.transAxes, fontsize=8)
        ax.set_axis_off()
        return False
    u, z = np.asarray(u, float), np.asarray(z, float)
    crit = float(np.asarray(arrays.get("goodness__ks_critical", np.nan)))
    inside = bool(np.max(np.abs(z - u)) <= crit) if np.isfinite(crit) else False
    if row is not None and "ks_within_band" in row:
        flag = within_band(pd.Series([row["ks_within_band"]])).iloc[0]
        inside = bool(flag) if pd.notna(flag) else inside
    grid = np.array([0.0, 1.0])
    ax.plot(grid, grid, color="0.3", lw=0.9)
    if np.isfinite(crit):
        ax.fill_between(grid, grid - crit, grid + crit, color="0.85", lw=0,
                        label=f"95% band (+-{crit:.3f})")
    ax.plot(u, z, color=_INSIDE if inside else _OUTSIDE, lw=1.6,
            label="inside the band" if inside else "outside the band")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_aspect("equal")
    ax.set_xlabel("uniform quantile")
    ax.set_ylabel("rescaled interval quantile z")
    text = []
    if row is not None:
        d, n = _num(row, "ks_distance"), _num(row, "ks_intervals")
        if np.isfinite(d):
            text.append(f"KS {d:.3f} ({int(n)} intervals)" if np.isfinite(n) else f"KS {d:.3f}")
        disp, hist = _num(row, "dispersion"), _num(row, "history_ratio")
        if np.isfinite(disp):
            text.append(f"dispersion {disp:.2f} (p {_num(row, 'dispersion_p'):.2g})")
        if np.isfinite(hist):
            text.append(f"pairs obs/exp {hist:.2f} (p {_num(row, 'history_p'):.2g})")
    if text:
        ax.text(0.03, 0.97, "\n".join(text), transform=ax.transAxes, va="top", fontsize=7)
    ax.legend(frameon=False, fontsize=7, loc="lower right")
    ax.set_title("goodness of fit: time rescaling (held out)")
    return True


def ks_figure(arrays: dict, row=None, title: str = ""):
    """A figure with one cell's KS plot (see :func:`ks_panel`)."""
    fig, ax = plt.subplots(figsize=(3.8, 3.8), layout="constrained")
    ks_panel(ax, arrays, row)
    if title:
        fig.suptitle(title, fontsize=9)
    return fig


def ks_population_figure(summary: pd.DataFrame):
    """Percent of classified cells inside the KS band per environment and label (95% CI).

    Parameters
    ----------
    summary : DataFrame
        :func:`encodex.report.goodness.fit_summary`.
    """
    if summary.empty:
        fig, ax = plt.subplots(figsize=(5, 1.6))
        ax.text(0.5, 0.5, "no goodness-of-fit columns in cells.csv", ha="center", va="center")
        ax.set_axis_off()
        return fig
    envs = list(pd.unique(summary["environment"]))
    labels = list(pd.unique(summary["label"]))
    fig, ax = plt.subplots(figsize=(6.4, 0.45 * len(labels) + 1.6), layout="constrained")
    colours = ("#1f5f8b", "#d9822b", "#3f8f4f", "#8c3b8f")
    step = 0.7 / max(len(envs), 1)
    for j, env in enumerate(envs):
        s = summary[summary["environment"] == env].set_index("label").reindex(labels)
        y = np.arange(len(labels)) - 0.35 + step * (j + 0.5)
        f = s["percent_within_band"].to_numpy(float)
        err = np.clip(np.nan_to_num([f - s["ci_low_percent"].to_numpy(float),
                                     s["ci_high_percent"].to_numpy(float) - f]), 0, None)
        ax.errorbar(f, y, xerr=err, fmt="o", color=colours[j % len(colours)], capsize=2,
                    label=env)
    ax.axvline(95, color="0.4", ls=":", lw=0.9, label="95%: expected if every model fits")
    ax.set_yticks(range(len(labels)))
    ax.set_yticklabels(labels)
    ax.invert_yaxis()
    ax.set_xlim(0, 105)
    ax.set_xlabel("classified cells inside the 95% KS band (%, 95% Wilson CI)")
    ax.legend(frameon=False, fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.18),
              ncol=len(envs) + 1)
    ax.set_title("goodness of fit of the chosen models (time rescaling, held out)")
    return fig
