"""The population figure: percent of classified cells per label, one panel per environment.

Each label is a horizontal bar whose length is the percent of the environment's classified
cells carrying exactly that set of variables, with its Wilson interval; the bar is split into
equal stripes in the colours of the variables it holds (grey for "none"), so a combination
reads from its colours without a separate membership chart.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from encodex.report.load import carried, classified
from encodex.report.palette import NEUTRAL, variable_colour

__all__ = ["draw_population"]


def draw_population(cells: pd.DataFrame, level: float = 0.95):
    """Figure of the label percentages per environment (see the module docstring).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from encodex.report.tables import wilson_interval

    ok = classified(cells)
    envs = list(pd.unique(cells["environment"]))
    if ok.empty:
        fig = plt.figure(figsize=(5, 1.2))
        fig.text(0.5, 0.5, "no classified cell in any environment (see table_excluded)",
                 ha="center", va="center")
        return fig
    counts = pd.crosstab(ok["variables"], ok["environment"]).reindex(columns=envs, fill_value=0)
    totals = {e: int((ok["environment"] == e).sum()) for e in envs}
    pct = counts.apply(lambda c: 100.0 * c / totals[c.name] if totals[c.name] else c * np.nan)
    order = pct.mean(axis=1).sort_values(ascending=True).index
    labels = list(order)
    fig, axes = plt.subplots(1, len(envs), figsize=(2.2 + 3.0 * len(envs), 0.9 + 0.38 *
                                                    len(labels)),
                             sharey=True, layout="constrained", squeeze=False)
    y = np.arange(len(labels))
    for ax, env in zip(axes[0], envs):
        n = totals[env]
        for i, lab in enumerate(labels):
            k = int(counts.loc[lab, env])
            p = 100.0 * k / n if n else 0.0
            vs = carried(lab) or ("none",)
            w = p / len(vs)
            for j, v in enumerate(vs):
                ax.barh(i, w, left=j * w, height=0.62,
                        color=NEUTRAL if v == "none" else variable_colour(v))
            if n:
                lo, hi = wilson_interval(k, n, level)
                ax.plot([100 * lo, 100 * hi], [i, i], color="k", lw=0.9)
            ax.text(min(p, 100) + 1.5, i + 0.3, f"{k}/{n}", va="center", fontsize=7,
                    color="0.25")
        ax.set_xlim(0, 100)
        ax.set_xlabel(f"% of labelled cells ({level * 100:g}% Wilson CI)")
        ax.set_title(f"{env} (n = {n} labelled)", fontsize=9)
        ax.grid(axis="x", color="0.92", lw=0.6)
        ax.set_axisbelow(True)
    axes[0, 0].set_yticks(y)
    axes[0, 0].set_yticklabels(labels)
    fig.suptitle("Labels of the labelled cells (bar stripes: the variables of the label)",
                 fontsize=10)
    return fig
