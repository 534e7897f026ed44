"""Figures of a cell on a linear or circular track (the arena figure's analogue).

Top row: the fitted rate along the track in each running direction with 95% bands; the
lap-by-position raster (laps down, position across, rate in each lap and position bin); the
occupancy-normalised rate along the track per direction (the rate-map analogue) with the
Skaggs information of the 1-D occupancy. Middle row (when there are any): the fitted rate
of each other carried variable. Bottom row: the selection path (held-out gain per step with
fold dots, p-value against its level) and the KS plot of the goodness-of-fit check.

Every fitted curve is a rate in Hz: the partial-dependence rate of the plotted terms
(``baseline_hz * exp(log_modulation)``, see :mod:`encodex.population.curves`), as in the
arena figure.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np

from encodex.classic import rate_map, skaggs_information
from encodex.report.cellplots import (
    Z95,
    _draw_curve,
    _draw_path,
    parse_selection_path,
    response_terms,
    term_rate,
)

#: Direction names shown on track figures: +1 runs towards larger positions.
DIRECTION_NAMES = {1: "running +1 (position rising)", -1: "running -1 (position falling)"}
_DIR_COLOURS = {1: "#1f5f8b", -1: "#d9822b", 0: "0.3"}


def is_track_cell(arrays: dict) -> bool:
    """True when a unit's saved arrays come from a track session."""
    return "track__edges" in arrays


def _centres(edges):
    e = np.asarray(edges, float)
    return 0.5 * (e[:-1] + e[1:])


def plot_track_curves(ax, arrays: dict) -> bool:
    """Fitted rate (Hz) along the track per direction (or the shared curve), 95% bands."""
    if "track__log_modulation" in arrays:
        g = np.asarray(arrays["track__grid"], float)
        base = float(np.asarray(arrays.get("track__baseline_hz", np.nan)))
        for row, s in enumerate((1, -1)):
            lm = np.asarray(arrays["track__log_modulation"], float)[row]
            se = np.asarray(arrays["track__se"], float)[row]
            ax.plot(g, base * np.exp(lm), color=_DIR_COLOURS[s], lw=1.8,
                    label=DIRECTION_NAMES[s])
            ax.fill_between(g, base * np.exp(lm - Z95 * se), base * np.exp(lm + Z95 * se),
                            color=_DIR_COLOURS[s], alpha=0.2, lw=0)
        ax.set_title("position x direction: fitted rate, 95% bands", fontsize=9)
    elif ("position__log_modulation" in arrays
          and np.ndim(arrays["position__log_modulation"]) == 1):
        g, rate, lo, hi, _ = term_rate(arrays, "position")
        ax.plot(g, rate, color=_DIR_COLOURS[0], lw=1.8, label="both directions")
        ax.fill_between(g, lo, hi, color=_DIR_COLOURS[0], alpha=0.2, lw=0)
        ax.set_title("position: fitted rate (shared by both directions)", fontsize=9)
    else:
        ax.text(0.5, 0.5, "no position term in the chosen model", ha="center", va="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return False
    ax.set_xlabel("position along the track (m)")
    ax.set_ylabel("rate (Hz)")
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, frameon=False)
    return True


def plot_lap_raster(ax, fig, arrays: dict, min_occupancy_s: float = 0.02) -> bool:
    """Rate in each lap (rows, first lap on top) and position bin; the lap's direction at left."""
    occ, spk = arrays.get("track__lap_occupancy_s"), arrays.get("track__lap_spikes")
    if occ is None or spk is None or np.size(occ) == 0:
        ax.text(0.5, 0.5, "no laps (no trials in this session)", ha="center", va="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return False
    occ, spk = np.asarray(occ, float), np.asarray(spk, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        rates = np.where(occ >= min_occupancy_s, spk / occ, np.nan)
    e = np.asarray(arrays["track__edges"], float)
    n = rates.shape[0]
    cmap = plt.get_cmap("viridis").with_extremes(bad="white")
    im = ax.imshow(np.ma.masked_invalid(rates), aspect="auto", cmap=cmap, origin="upper",
                   extent=(e[0], e[-1], n + 0.5, 0.5), interpolation="nearest",
                   vmax=np.nanpercentile(rates, 99) if np.isfinite(rates).any() else None)
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    cb.set_label("rate (Hz)")
    d = np.asarray(arrays.get("track__lap_direction", np.zeros(n)), float)
    width = 0.02 * (e[-1] - e[0])
    for i, s in enumerate(np.sign(np.round(d, 1))):
        ax.add_patch(plt.Rectangle((e[0] - 2 * width, i + 0.5), width, 1.0,
                                   color=_DIR_COLOURS[int(s)], clip_on=False, lw=0))
    ax.set_xlim(e[0] - 2 * width, e[-1])
    ax.set_xlabel("position along the track (m)")
    ax.set_ylabel("lap (strip at left: its direction)")
    ax.set_title(f"lap-by-position raster, {n} laps")
    return True


def track_information(arrays: dict, min_occupancy_s: float = 0.1) -> dict:
    """Skaggs information (bits/spike) on the 1-D occupancy: all bins and each direction."""
    occ = np.asarray(arrays["track__occupancy_s"], float)
    spk = np.asarray(arrays["track__spikes"], float)
    out = {}
    for row, key in enumerate(("all", 1, -1)):
        if spk[row].sum() > 0 and (occ[row] >= min_occupancy_s).any():
            out[key] = skaggs_information(occ[row], spk[row], min_occupancy_s=min_occupancy_s)
        else:
            out[key] = float("nan")
    return out


def plot_track_ratemap(ax, arrays: dict, min_occupancy_s: float = 0.1) -> dict:
    """Occupancy-normalised rate along the track, pooled and per direction, with Skaggs info."""
    occ = np.asarray(arrays["track__occupancy_s"], float)
    spk = np.asarray(arrays["track__spikes"], float)
    c = _centres(arrays["track__edges"])
    info = track_information(arrays, min_occupancy_s)
    for row, key in enumerate(("all", 1, -1)):
        if occ[row].sum() == 0:
            continue
        r = rate_map(occ[row], spk[row], min_occupancy_s=min_occupancy_s)
        name = "all bins" if key == "all" else DIRECTION_NAMES[key]
        colour = _DIR_COLOURS[0 if key == "all" else key]
        ax.step(c, r, where="mid", color=colour, lw=1.2 if key == "all" else 1.6,
                ls="--" if key == "all" else "-",
                label=f"{name}: {info[key]:.2f} bits/spike" if np.isfinite(info[key])
                else name)
    ax.set_xlabel("position along the track (m)")
    ax.set_ylabel("rate (Hz)")
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, frameon=False, title="Skaggs information", title_fontsize=7)
    ax.set_title("observed rate (occupancy-normalised)", fontsize=9)
    return info


def track_cell_figure(run, unit: str, environment: str, row, arrays: dict):
    """Figure of one track cell (see the module docstring); called by ``cell_figure``."""
    from encodex.report.figures import _caveat_footer
    from encodex.report.goodness_figures import ks_panel

    ok = row["status"] == "ok"
    others = [t for t in (response_terms(arrays) if ok else ())
              if t not in ("position", "direction", "track") and f"{t}__grid" in arrays]
    heights = [1.2] + ([1.0] if others else []) + ([0.8, 0.5] if ok else [])
    ncol = max(3, len(others))
    fig = plt.figure(figsize=(3.8 * ncol, 2.6 * sum(heights) + 0.8), layout="constrained")
    grid = fig.add_gridspec(len(heights), ncol, height_ratios=heights)
    plot_track_curves(fig.add_subplot(grid[0, 0]), arrays)
    plot_lap_raster(fig.add_subplot(grid[0, 1]), fig, arrays)
    plot_track_ratemap(fig.add_subplot(grid[0, 2:]), arrays)
    for i, t in enumerate(others):
        _draw_curve(fig.add_subplot(grid[1, i]), arrays, t)
    if ok:
        r0 = 1 + int(bool(others))
        m = run.models
        m = m[(m["unit"].astype(str) == str(unit)) & (m["environment"].astype(str) ==
                                                      str(environment))]
        split = ncol - max(1, ncol // 3)
        steps = parse_selection_path(row.get("selection_path"), row["variables"])
        _draw_path(fig.add_subplot(grid[r0, :split]), fig.add_subplot(grid[r0 + 1, :split]),
                   steps, m)
        ks_panel(fig.add_subplot(grid[r0:, split:]), arrays, row)
    gain = row["bits_per_spike"]
    flags = row.get("ambiguous_with", "")
    flags = flags if isinstance(flags, str) else ""  # empty cells read back as NaN
    what = (f"label {row['variables']}" if ok else
            f"not labelled ({row['status']}): {row['reason']}")
    fig.suptitle(
        f"unit {unit} in {environment} (track): {what}, {int(row['n_spikes'])} spikes"
        + (f", held-out information {gain:.3f} bits/spike (pooled folds)"
           if ok and np.isfinite(gain) else "")
        + (f"; cannot be told apart from {flags.replace(';', ', ')}" if flags else ""),
        fontsize=10)
    _caveat_footer(fig, run.alpha)
    return fig
