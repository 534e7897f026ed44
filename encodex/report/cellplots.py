"""The per-cell figure: response terms in Hz, the rate map, the selection path, model check.

Every response term found in the unit file is drawn (built-in variables, user variables and
nuisance terms alike, in canonical order), as the partial-dependence rate in Hz:
``baseline_hz * exp(log_modulation)`` with its 95% credible band (see
:mod:`encodex.population.curves` for how the baseline is defined). Under each 1-D curve the
time spent per bin is shaded (occupancy) and the observed rate per bin is drawn as dots.
"""

from __future__ import annotations

import re

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.patches import Rectangle

from encodex.classic import (
    MIN_OCCUPANCY_S,
    rate_map,
    skaggs_information,
    skaggs_information_corrected,
)
from encodex.report.load import carried
from encodex.report.palette import CHOSEN, NEUTRAL, variable_colour
from encodex.variables import UNITS, KINDS, canonical_order, label

__all__ = ["response_terms", "term_rate", "parse_selection_path", "draw_cell",
           "MIN_BIN_OCCUPANCY_S"]

Z95 = 1.959963984540054
#: Bins (spatial or along a variable) visited for less than this are not given a rate.
MIN_BIN_OCCUPANCY_S = MIN_OCCUPANCY_S
_PATH_STEP = re.compile(r"([+x])([^(]+)\(p=([^<>=)]+)(?:(<=|<|>=|>)([^)]+))?\)"
                        r"(?:\[gain ([^<\]]+)<([^\]]+)\])?")
_NAMES = {"distance": "distance since trial start", "time": "time since trial start",
          "drift": "time in the environment (slow drift, s)"}


def response_terms(arrays: dict) -> tuple[str, ...]:
    """Names of the response terms saved in a unit file, canonical order."""
    return canonical_order(k[: -len("__log_modulation")] for k in arrays
                           if k.endswith("__log_modulation"))


def _circular(name: str) -> bool:
    return KINDS.get(name) == "circular" or name in ("heading", "phase")


def term_rate(arrays: dict, name: str):
    """A term's partial-dependence rate (Hz) and its 95% band on the saved grid.

    Returns
    -------
    grid, rate, low, high, in_hz
        ``grid`` is 1-D or (grid_x, grid_y); ``in_hz`` is False for files without a saved
        baseline, whose values are then the rate factor (dimensionless).
    """
    lm = np.asarray(arrays[f"{name}__log_modulation"], float)
    se = arrays.get(f"{name}__se")
    se = np.zeros_like(lm) if se is None else np.asarray(se, float)
    base = arrays.get(f"{name}__baseline_hz")
    scale = 1.0 if base is None else float(base)
    grid = ((np.asarray(arrays[f"{name}__grid_x"], float),
             np.asarray(arrays[f"{name}__grid_y"], float))
            if f"{name}__grid_x" in arrays else np.asarray(arrays[f"{name}__grid"], float))
    return (grid, scale * np.exp(lm), scale * np.exp(lm - Z95 * se),
            scale * np.exp(lm + Z95 * se), base is not None)


def _axis_label(name: str) -> str:
    unit = UNITS.get(name, "")
    text = _NAMES.get(name, name)
    return f"{text} ({unit})" if unit else text


#: The y axis of a response curve reaches this multiple of the highest band or observed rate:
#: the top quarter of the panel stays free for the legend.
LEGEND_HEADROOM = 1.35


def _draw_curve(ax, arrays: dict, name: str) -> None:
    colour = variable_colour(name)
    g, rate, lo, hi, in_hz = term_rate(arrays, name)
    if _circular(name):  # close the circle so the curve meets itself at 2*pi
        g, rate, lo, hi = (np.append(g, g[0] + 2 * np.pi),
                           *(np.append(a, a[0]) for a in (rate, lo, hi)))
    occ = arrays.get(f"{name}__occupancy_s")
    edges = arrays.get(f"{name}__edges")
    if occ is not None and edges is not None:
        occ, edges = np.asarray(occ, float), np.asarray(edges, float)
        # occupancy as a shaded histogram on its own scale, kept in the lower quarter
        ax2 = ax.twinx()
        ax2.stairs(occ, edges, fill=True, color=NEUTRAL, alpha=0.25, lw=0)
        ax2.set_ylim(0, max(occ.max(), 1e-9) * 4)
        ax2.set_ylabel("time in bin (s)", color="0.45", fontsize=7)
        ax2.tick_params(axis="y", labelsize=7, colors="0.45")
        ax2.spines["right"].set_visible(True)
        ax.set_zorder(ax2.get_zorder() + 1)
        ax.patch.set_visible(False)
        spk = np.asarray(arrays.get(f"{name}__spikes"), float)
        ok = occ >= MIN_BIN_OCCUPANCY_S
        centres = (edges[:-1] + edges[1:]) / 2
        observed = spk[ok] / occ[ok]
        ax.plot(centres[ok], observed, "o", ms=3.5, mfc="white", mec=colour,
                mew=1.0, label="observed", zorder=3)
    else:
        observed = np.empty(0)
    ax.fill_between(g, lo, hi, color=colour, alpha=0.25, lw=0, label="95% band")
    ax.plot(g, rate, color=colour, lw=1.8, label="model")
    # Headroom above the data for the legend (upper right), so it never covers a point.
    top = np.nanmax(np.concatenate([hi, observed, [0.0]]))
    ax.set_ylim(0, top * LEGEND_HEADROOM if np.isfinite(top) and top > 0 else None)
    ax.set_xlabel(_axis_label(name))
    ax.set_ylabel("rate (Hz)" if in_hz else "rate factor (no baseline saved)")
    if _circular(name):
        ax.set_xticks(np.arange(0, 2 * np.pi + 0.01, np.pi / 2))
        ax.set_xticklabels(["0", "π/2", "π", "3π/2", "2π"])
    ax.set_title(name, color=colour, fontweight="bold")
    ax.legend(frameon=False, fontsize=7, loc="upper right")


def _extent(ex, ey):
    return (ex[0], ex[-1], ey[0], ey[-1])


def _centres_extent(gx, gy):
    dx = (gx[1] - gx[0]) if gx.size > 1 else 1.0
    dy = (gy[1] - gy[0]) if gy.size > 1 else 1.0
    return (gx[0] - dx / 2, gx[-1] + dx / 2, gy[0] - dy / 2, gy[-1] + dy / 2)


def _observed_map(arrays: dict):
    occ, spk = arrays.get("ratemap__occupancy_s"), arrays.get("ratemap__spikes")
    ex, ey = arrays.get("ratemap__edges_x"), arrays.get("ratemap__edges_y")
    if occ is None or spk is None or ex is None or ey is None:
        return None
    return rate_map(occ, spk, min_occupancy_s=MIN_BIN_OCCUPANCY_S), np.asarray(ex), \
        np.asarray(ey)


def _map_axes(ax, fig, image, extent, vmax, title, arrays, bar: str = "rate (Hz)") -> None:
    cmap = plt.get_cmap("viridis").with_extremes(bad="white")
    im = ax.imshow(np.ma.masked_invalid(image), origin="lower", cmap=cmap, extent=extent,
                   aspect="equal", interpolation="nearest", vmin=0, vmax=vmax)
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    cb.set_label(bar)
    ex, ey = arrays.get("ratemap__edges_x"), arrays.get("ratemap__edges_y")
    if ex is not None and ey is not None:
        ax.add_patch(Rectangle((ex[0], ey[0]), ex[-1] - ex[0], ey[-1] - ey[0], fill=False,
                               ec="k", lw=1.0))
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.set_title(title, fontsize=9)


def _map_vmax(*images) -> float:
    vals = np.concatenate([np.ravel(i)[np.isfinite(np.ravel(i))] for i in images if i is not None])
    return float(np.percentile(vals, 99)) if vals.size and np.percentile(vals, 99) > 0 else 1.0


def _draw_maps(axes, fig, arrays: dict, fitted: bool) -> None:
    """Fitted and observed position maps on one colour scale (Hz)."""
    obs = _observed_map(arrays)
    fit_img = None
    if fitted:
        (gx, gy), rate, _, _, in_hz = term_rate(arrays, "position")
        fit_img = rate
    vmax = _map_vmax(fit_img, None if obs is None else obs[0])
    k = 0
    if fitted:
        # one colour scale for both maps when both are in Hz (old files: factor, own scale)
        _map_axes(axes[k], fig, fit_img, _centres_extent(gx, gy),
                  vmax if in_hz else _map_vmax(fit_img),
                  "position: model", arrays, "rate (Hz)" if in_hz else "rate factor")
        axes[k].title.set_color(variable_colour("position"))
        axes[k].title.set_fontweight("bold")
        k += 1
    if obs is not None:
        rates, ex, ey = obs
        info = _skaggs_text(arrays)
        _map_axes(axes[k], fig, rates, _extent(ex, ey), vmax,
                  f"observed, unsmoothed {100 * (ex[1] - ex[0]):.0f} cm bins\n{info}", arrays)


def _skaggs_text(arrays: dict) -> str:
    occ, spk = arrays["ratemap__occupancy_s"], arrays["ratemap__spikes"]
    if np.nansum(spk) <= 0:
        return "no spikes"
    try:
        raw = skaggs_information(occ, spk, MIN_BIN_OCCUPANCY_S)
        cor = skaggs_information_corrected(occ, spk, MIN_BIN_OCCUPANCY_S)
    except Exception:  # e.g. no bin reaches the occupancy threshold
        return "Skaggs information undefined"
    return f"Skaggs {cor:.2f} bits/spike bias-corrected ({raw:.2f} raw)"


def parse_selection_path(path, chosen_label: str) -> list[dict]:
    """Steps of a ``selection_path`` string: variable, accepted, p-value, level.

    Older files without levels give ``level`` NaN; a missing path gives the chosen variables
    as accepted steps with unknown p-values.
    """
    steps = []
    if isinstance(path, str) and path.strip():
        for m in _PATH_STEP.finditer(path):
            steps.append({"variable": m.group(2).strip(), "accepted": m.group(1) == "+",
                          "p": float(m.group(3)),
                          "level": float(m.group(5)) if m.group(5) else np.nan,
                          "small_gain": m.group(6) is not None})
        return steps
    return [{"variable": v, "accepted": True, "p": np.nan, "level": np.nan,
             "small_gain": False} for v in carried(chosen_label)]


def _fold_scores(models: pd.DataFrame) -> dict[str, np.ndarray]:
    out = {}
    for name, g in models.groupby("model"):
        out[str(name)] = g.sort_values("fold")["bits_per_spike"].to_numpy(float)
    return out


def _draw_path(ax_gain, ax_p, steps: list[dict], models: pd.DataFrame) -> None:
    """Selection path: improvement per fold of each step (top), p-value vs level (bottom)."""
    scores = _fold_scores(models)
    base: set[str] = set()
    xs = np.arange(len(steps))
    for i, s in enumerate(steps):
        vs = set(carried(s["variable"]))
        colour = variable_colour(s["variable"]) if len(vs) == 1 else NEUTRAL
        old, new = scores.get(label(base)), scores.get(label(base | vs))
        face = colour if s["accepted"] else "white"
        if old is not None and new is not None and old.size == new.size:
            d = new - old
            jit = np.linspace(-0.18, 0.18, d.size)
            ax_gain.plot(i + jit, d, "o", ms=3.5, mfc=face, mec=colour, alpha=0.85)
            ax_gain.plot([i - 0.28, i + 0.28], [np.mean(d)] * 2, color=CHOSEN, lw=2)
        if np.isfinite(s["p"]):
            ax_p.plot(i, s["p"], "o", ms=6, mfc=face, mec=colour, mew=1.5)
        if np.isfinite(s["level"]):
            ax_p.plot([i - 0.3, i + 0.3], [s["level"]] * 2, color=CHOSEN, lw=1.5)
        if s["accepted"]:
            base |= vs
    ax_gain.axhline(0, color=NEUTRAL, lw=0.8, ls=":")
    ax_gain.set_ylabel("held-out gain of\nthe step (bits/spike)")
    ax_gain.set_title("selection path: each step's best candidate (dots: folds, "
                      "bar: mean)", fontsize=9)
    ax_gain.tick_params(labelbottom=False)
    ax_p.set_yscale("log")
    ax_p.set_ylabel("p-value")
    ax_p.set_xticks(xs)
    ax_p.set_xticklabels([("+ " if s["accepted"] else "gain under floor: "
                           if s.get("small_gain") else "rejected: ") + s["variable"]
                          for s in steps], fontsize=8)
    for a in (ax_gain, ax_p):
        a.set_xlim(-0.6, max(len(steps), 1) - 0.4)
    # Above the panel: with 20 folds the smallest p-values sit on the panel's floor.
    ax_p.set_title("bar: level of the step (added when p reached it and the step's gain "
                   "cleared the floor)", fontsize=7, color="0.3", loc="right")


def _check_data(arrays: dict):
    """(what, occupancy, spikes, predicted) of the first binning with model predictions.

    Spatial bins when the model holds position, otherwise the bins of its first 1-D term:
    binning along a variable the model ignores would only show the spread it leaves out.
    """
    terms = response_terms(arrays)
    if "position" in terms and "ratemap__predicted_spikes" in arrays \
            and "ratemap__spikes" in arrays:
        return ("spatial bin", arrays["ratemap__occupancy_s"], arrays["ratemap__spikes"],
                arrays["ratemap__predicted_spikes"])
    for name in terms:
        if f"{name}__predicted_spikes" in arrays:
            return (f"{name} bin", arrays[f"{name}__occupancy_s"], arrays[f"{name}__spikes"],
                    arrays[f"{name}__predicted_spikes"])
    return None


def _draw_check(ax, data) -> None:
    """Observed against model rate per bin (spatial bins, else the first 1-D term's bins)."""
    what = data[0]
    occ, spk, pred = (np.asarray(a, float) for a in data[1:])
    ok = occ >= MIN_BIN_OCCUPANCY_S
    o, p = spk[ok] / occ[ok], pred[ok] / occ[ok]
    ax.plot(p, o, "o", ms=3, color="#3d5a80", alpha=0.6)
    hi = float(np.max(np.r_[o, p, 1e-3])) * 1.05
    ax.plot([0, hi], [0, hi], color=NEUTRAL, lw=0.8, ls="--")
    ratio = spk[ok].sum() / pred[ok].sum() if pred[ok].sum() > 0 else np.nan
    ax.text(0.03, 0.97, f"observed / model, all these bins: {ratio:.3f}\n"
            f"{int(ok.sum())} {what}s with >= {MIN_BIN_OCCUPANCY_S:g} s",
            transform=ax.transAxes, va="top", fontsize=7)
    ax.set_xlim(0, hi)
    ax.set_ylim(0, hi)
    ax.set_xlabel("model rate (Hz)")
    ax.set_ylabel("observed rate (Hz)")
    ax.set_title(f"model check per {what}", fontsize=9)


def draw_cell(fig, row: pd.Series, arrays: dict, models: pd.DataFrame) -> None:
    """Draw one cell's panels into an empty figure (see :func:`encodex.report.cell_figure`).

    Top row (when there is anything to draw): every response term in Hz and the position
    maps. Below, for labelled cells: the selection path and, when the model has terms, the
    observed-against-model check. Nothing is drawn as a placeholder.
    """
    ok = row["status"] == "ok"
    terms = response_terms(arrays) if ok else ()
    one_d = [t for t in terms if f"{t}__grid" in arrays]
    has_map = _observed_map(arrays) is not None
    n_maps = int("position" in terms) + int(has_map)
    n_top = len(one_d) + n_maps
    check = _check_data(arrays) if ok else None
    ks = arrays.get("goodness__ks_rescaled")
    has_ks = ok and ks is not None and np.size(ks) > 0
    n_side = int(check is not None) + int(has_ks)
    ncol = max(n_top, (2 + n_side if n_side else 3) if ok else 1)
    heights = ([1.25] if n_top else []) + ([0.8, 0.5] if ok else [])
    if not heights:
        return
    grid = fig.add_gridspec(len(heights), ncol, height_ratios=heights)
    for i, t in enumerate(one_d):
        _draw_curve(fig.add_subplot(grid[0, i]), arrays, t)
    if n_maps:
        axes = [fig.add_subplot(grid[0, len(one_d) + j]) for j in range(n_maps)]
        _draw_maps(axes, fig, arrays, "position" in terms)
    if not ok:
        return
    r0 = 1 if n_top else 0
    # the selection path takes what the side panels (model check, KS plot) leave
    width = max(1, ncol // (2 + n_side)) if n_side else 0
    split = ncol - n_side * width
    steps = parse_selection_path(row.get("selection_path"), row["variables"])
    _draw_path(fig.add_subplot(grid[r0, :split]), fig.add_subplot(grid[r0 + 1, :split]),
               steps, models)
    at = split
    if check is not None:
        _draw_check(fig.add_subplot(grid[r0:, at:at + width]), check)
        at += width
    if has_ks:
        from encodex.report.goodness_figures import ks_panel

        ks_panel(fig.add_subplot(grid[r0:, at:at + width]), arrays, row)
