"""Figures of a fit run: per cell, per population, and the environment comparison.

Figures need no display (the command line draws with the Agg backend), label axes with
units, and are saved as PNG and PDF by :func:`save_figure`. Gains are shown on the rate scale: a gain of 2
means twice the cell's mean rate; 95% bands are ``exp(log_gain +- 1.96 se)``.
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
from matplotlib.patches import Rectangle  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402

from encodex.classic import rate_map, skaggs_information  # noqa: E402
from encodex.errors import InputError, OutputError  # noqa: E402
from encodex.report.load import RunFolder, carried, classified  # noqa: E402
from encodex.variables import UNITS, VARIABLES, canonical_order  # noqa: E402

__all__ = [
    "save_figure",
    "figure_png_base64",
    "cell_figure",
    "population_figure",
    "comparison_figure",
]

Z95 = 1.959963984540054
_COLOURS = ("#1f5f8b", "#d9822b", "#3f8f4f", "#8c3b8f", "#b33939", "#6b6b6b")
_VAR_LABEL = {"position": "position", "heading": "heading", "speed": "speed",
              "distance": "distance since trial start", "time": "time since trial start"}

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


def figure_png_base64(fig, dpi: int = 90) -> str:
    """PNG bytes of a figure, base64-encoded for embedding in HTML."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _axis_label(var: str) -> str:
    unit = UNITS.get(var, "")
    return f"{_VAR_LABEL.get(var, var)} ({unit})" if unit else _VAR_LABEL.get(var, var)


def _plot_curve(ax, arrays: dict, var: str, colour: str) -> bool:
    g, lg, se = (arrays.get(f"{var}__{k}") for k in ("grid", "log_gain", "se"))
    if g is None or lg is None:
        ax.text(0.5, 0.5, f"no {var} curve saved", ha="center", va="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return False
    g, lg = np.asarray(g, float), np.asarray(lg, float)
    if var in ("heading", "phase"):
        # close the circle so the curve meets itself at 2*pi
        g = np.append(g, g[0] + 2 * np.pi)
        lg = np.append(lg, lg[0])
        se = None if se is None else np.append(se, np.asarray(se)[0])
    ax.plot(g, np.exp(lg), color=colour, lw=1.8)
    if se is not None:
        se = np.asarray(se, float)
        ax.fill_between(g, np.exp(lg - Z95 * se), np.exp(lg + Z95 * se), color=colour,
                        alpha=0.25, lw=0, label="95% band")
    ax.axhline(1.0, color="0.5", lw=0.8, ls=":")
    ax.set_xlabel(_axis_label(var))
    ax.set_ylabel("gain (x mean rate)")
    if var in ("heading", "phase"):
        ax.set_xticks(np.arange(0, 2 * np.pi + 0.01, np.pi / 2))
        ax.set_xticklabels(["0", "pi/2", "pi", "3pi/2", "2pi"])
    ax.set_title(f"{var}: fitted response")
    return True


def _arena_outline(ax, arrays: dict) -> None:
    ex, ey = arrays.get("ratemap__edges_x"), arrays.get("ratemap__edges_y")
    if ex is None or ey is None:
        return
    ax.add_patch(Rectangle((ex[0], ey[0]), ex[-1] - ex[0], ey[-1] - ey[0], fill=False,
                           ec="k", lw=1.2, label="arena (tracked extent)"))
    ax.set_xlim(ex[0] - 0.02 * (ex[-1] - ex[0]), ex[-1] + 0.02 * (ex[-1] - ex[0]))
    ax.set_ylim(ey[0] - 0.02 * (ey[-1] - ey[0]), ey[-1] + 0.02 * (ey[-1] - ey[0]))


def _centres_extent(gx, gy):
    gx, gy = np.asarray(gx, float), np.asarray(gy, float)
    dx = (gx[1] - gx[0]) if gx.size > 1 else 1.0
    dy = (gy[1] - gy[0]) if gy.size > 1 else 1.0
    return (gx[0] - dx / 2, gx[-1] + dx / 2, gy[0] - dy / 2, gy[-1] + dy / 2)


def _plot_position(ax, fig, arrays: dict) -> bool:
    gx, gy, lg = (arrays.get(k) for k in ("position__grid_x", "position__grid_y",
                                           "position__log_gain"))
    if gx is None or gy is None or lg is None:
        ax.text(0.5, 0.5, "no position map saved", ha="center", va="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return False
    im = ax.imshow(np.exp(np.asarray(lg, float)), origin="lower", cmap="magma",
                   extent=_centres_extent(gx, gy), aspect="equal", interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    cb.set_label("gain (x mean rate)")
    _arena_outline(ax, arrays)
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.set_title("position: fitted map")
    return True


def _plot_ratemap(ax, fig, arrays: dict, min_occupancy_s: float = 0.1) -> float:
    occ, spk = arrays.get("ratemap__occupancy_s"), arrays.get("ratemap__spikes")
    ex, ey = arrays.get("ratemap__edges_x"), arrays.get("ratemap__edges_y")
    if occ is None or spk is None or ex is None or ey is None:
        ax.text(0.5, 0.5, "no occupancy map saved", ha="center", va="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return float("nan")
    rates = rate_map(occ, spk, min_occupancy_s=min_occupancy_s)
    info = skaggs_information(occ, spk, min_occupancy_s=min_occupancy_s) \
        if np.isfinite(rates).any() else float("nan")
    cmap = plt.get_cmap("viridis").with_extremes(bad="white")
    im = ax.imshow(np.ma.masked_invalid(rates), origin="lower", cmap=cmap,
                   extent=(ex[0], ex[-1], ey[0], ey[-1]), aspect="equal",
                   interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    cb.set_label("rate (Hz)")
    _arena_outline(ax, arrays)
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.set_title(f"rate map, Skaggs {info:.2f} bits/spike" if np.isfinite(info)
                 else "rate map (silent)")
    return info


def _plot_scores(ax, models: pd.DataFrame, chosen: str) -> None:
    if models.empty:
        ax.text(0.5, 0.5, "no model scores", ha="center", va="center", transform=ax.transAxes)
        ax.set_axis_off()
        return
    stats = models.groupby("model")["bits_per_spike"].agg(["mean", "sem", "count"])
    stats = stats.sort_values("mean")
    for i, (name, row) in enumerate(stats.iterrows()):
        vals = models.loc[models["model"] == name, "bits_per_spike"].to_numpy(float)
        colour = _COLOURS[1] if name == chosen else _COLOURS[0]
        jitter = np.linspace(-0.15, 0.15, vals.size) if vals.size > 1 else np.zeros(1)
        ax.plot(vals, i + jitter, "o", ms=3, color=colour, alpha=0.6)
        ax.errorbar(row["mean"], i, xerr=row["sem"] if np.isfinite(row["sem"]) else None,
                    fmt="|", ms=14, color=colour, lw=1.5)
    ax.set_yticks(range(len(stats)))
    ax.set_yticklabels([f"{m} (chosen)" if m == chosen else m for m in stats.index])
    ax.axvline(0, color="0.5", lw=0.8, ls=":")
    ax.set_xlabel("held-out gain over mean rate (bits/spike)")
    ax.set_title("compared models (dots: folds, bar: mean +- s.e.m.)")


def _plot_observed_predicted(ax, arrays: dict, mean_rate_hz: float) -> None:
    need = ("position__grid_x", "position__grid_y", "position__log_gain",
            "ratemap__occupancy_s", "ratemap__spikes", "ratemap__edges_x", "ratemap__edges_y")
    if not all(k in arrays for k in need) or not np.isfinite(mean_rate_hz):
        ax.text(0.5, 0.5, "observed vs predicted rate needs a position term\n"
                "(shown for cells that carry position)", ha="center", va="center",
                transform=ax.transAxes, fontsize=8)
        ax.set_axis_off()
        return
    from scipy.interpolate import RegularGridInterpolator

    obs = rate_map(arrays["ratemap__occupancy_s"], arrays["ratemap__spikes"], 0.5)
    ex, ey = np.asarray(arrays["ratemap__edges_x"]), np.asarray(arrays["ratemap__edges_y"])
    cx, cy = (ex[:-1] + ex[1:]) / 2, (ey[:-1] + ey[1:]) / 2
    interp = RegularGridInterpolator(
        (np.asarray(arrays["position__grid_y"], float), np.asarray(arrays["position__grid_x"],
                                                                   float)),
        np.asarray(arrays["position__log_gain"], float), bounds_error=False, fill_value=None)
    yy, xx = np.meshgrid(cy, cx, indexing="ij")
    pred = mean_rate_hz * np.exp(interp(np.column_stack([yy.ravel(), xx.ravel()])))
    o = obs.ravel()
    ok = np.isfinite(o) & np.isfinite(pred)
    ax.plot(pred[ok], o[ok], "o", ms=2.5, color=_COLOURS[0], alpha=0.5)
    hi = float(np.nanmax(np.r_[pred[ok], o[ok], 1e-3])) * 1.05
    ax.plot([0, hi], [0, hi], color="0.4", lw=0.8, ls="--", label="identity")
    if ok.sum() > 2 and np.std(o[ok]) > 0 and np.std(pred[ok]) > 0:
        r = np.corrcoef(pred[ok], o[ok])[0, 1]
        ax.text(0.04, 0.94, f"r = {r:.2f} over {ok.sum()} spatial bins",
                transform=ax.transAxes, va="top", fontsize=8)
    ax.set_xlim(0, hi)
    ax.set_ylim(0, hi)
    ax.set_xlabel("predicted rate, mean rate x position gain (Hz)")
    ax.set_ylabel("observed rate (Hz)")
    ax.set_title("observed vs predicted, per spatial bin")


def _caveat_footer(fig, alpha: float) -> None:
    fig.text(0.0, -0.01, f"Labels are statistical statements at alpha = {alpha:g} about this "
             f"session's behaviour (held-out prediction), not proof of mechanism.",
             fontsize=7, color="0.35", ha="left", va="top")


def cell_figure(run: RunFolder, unit: str, environment: str):
    """Figure of one cell in one environment.

    Top row: the fitted response of each carried variable with its 95% band (position as a
    map with a colour bar and the arena outline) and the classic rate map with its Skaggs
    information. Bottom row: held-out scores of every compared model (fold by fold) and the
    observed versus predicted rate per spatial bin.

    Returns
    -------
    matplotlib.figure.Figure
    """
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
    vs = list(carried(row["variables"])) if row["status"] == "ok" else []
    n_top = max(1, len(vs)) + 1
    fig = plt.figure(figsize=(3.6 * max(n_top, 2), 6.6), layout="constrained")
    grid = fig.add_gridspec(2, max(n_top, 2))
    for i, v in enumerate(vs):
        ax = fig.add_subplot(grid[0, i])
        if v == "position":
            _plot_position(ax, fig, arrays)
        else:
            _plot_curve(ax, arrays, v, _COLOURS[(i + 1) % len(_COLOURS)])
    if not vs:
        ax = fig.add_subplot(grid[0, 0])
        msg = (f"status: {row['status']}\n{row['reason']}" if row["status"] != "ok"
               else "carries none of the variables\n(no response to show)")
        ax.text(0.5, 0.5, msg, ha="center", va="center", transform=ax.transAxes)
        ax.set_axis_off()
    _plot_ratemap(fig.add_subplot(grid[0, n_top - 1]), fig, arrays)
    half = max(n_top, 2) // 2
    m = run.models
    m = m[(m["unit"].astype(str) == str(unit)) & (m["environment"].astype(str) ==
                                                  str(environment))]
    _plot_scores(fig.add_subplot(grid[1, :half]), m, row["variables"])
    _plot_observed_predicted(fig.add_subplot(grid[1, half:]), arrays,
                             float(row.get("mean_rate_hz", np.nan)))
    gain = row["bits_per_spike"]
    fig.suptitle(
        f"unit {unit}, {environment}: label '{row['variables']}' (status {row['status']}), "
        f"{int(row['n_spikes'])} spikes"
        + (f", held-out gain {gain:.3f} bits/spike" if np.isfinite(gain) else ""),
        fontsize=10)
    _caveat_footer(fig, run.alpha)
    return fig


def population_figure(cells: pd.DataFrame, alpha: float | None = None):
    """How many classified cells carry each combination of variables, per environment.

    A bar per combination (label) and environment, with a dot matrix underneath showing which
    variables the combination holds. With ``alpha`` given, a footnote states what a label means.

    Returns
    -------
    matplotlib.figure.Figure
    """
    ok = classified(cells)
    envs = list(pd.unique(cells["environment"]))
    counts = pd.crosstab(ok["variables"], ok["environment"]).reindex(columns=envs, fill_value=0)
    if counts.empty:
        fig, ax = plt.subplots(figsize=(5, 2))
        ax.text(0.5, 0.5, "no classified cell", ha="center", va="center")
        ax.set_axis_off()
        return fig
    counts = counts.loc[counts.sum(axis=1).sort_values(ascending=False).index]
    labels = list(counts.index)
    used = canonical_order({v for lab in labels for v in carried(lab)}) or VARIABLES[:1]
    n = len(labels)
    fig, (ax, axm) = plt.subplots(
        2, 1, figsize=(max(5.0, 0.55 * n + 2.5), 2.2 + 0.3 * len(used) + 2.4),
        gridspec_kw={"height_ratios": [3, 0.35 * len(used) + 0.3]}, sharex=True,
        layout="constrained")
    width = 0.8 / len(envs)
    x = np.arange(n)
    for j, env in enumerate(envs):
        total = int((ok["environment"] == env).sum())
        bars = ax.bar(x - 0.4 + width * (j + 0.5), counts[env].to_numpy(), width,
                      color=_COLOURS[j % len(_COLOURS)], label=f"{env} (n = {total})")
        ax.bar_label(bars, fontsize=7, padding=1)
    ax.set_ylabel("cells")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.legend(frameon=False, fontsize=8)
    ax.set_title("cells per combination of carried variables (classified cells)")
    for i, lab in enumerate(labels):
        has = set(carried(lab))
        ys = [k for k, v in enumerate(used) if v in has]
        axm.plot([i] * len(used), range(len(used)), "o", color="0.85", ms=7)
        if ys:
            axm.plot([i] * len(ys), ys, "o-", color="0.15", ms=7, lw=1.5)
    axm.set_yticks(range(len(used)))
    axm.set_yticklabels(used)
    axm.set_ylim(-0.6, len(used) - 0.4)
    axm.invert_yaxis()
    axm.set_xticks(x)
    axm.set_xticklabels(["none" if not carried(lab) else "" for lab in labels])
    axm.spines["left"].set_visible(False)
    axm.spines["bottom"].set_visible(False)
    axm.tick_params(length=0)
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
    ax = axes[-1]
    v = cmp.variables
    y = np.arange(len(v))
    for k, (env, suffix, colour, off) in enumerate(((cmp.a, "a", _COLOURS[0], -0.15),
                                                    (cmp.b, "b", _COLOURS[1], 0.15))):
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
