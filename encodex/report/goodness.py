"""How well the chosen models describe the spike trains: population summary of the checks.

Reads the goodness-of-fit columns that ``encodex fit`` writes to ``cells.csv`` (see
:mod:`encodex.compare.goodness`) and summarises them per environment and label: the fraction
of cells whose time-rescaling KS distance lies inside the 95% band, with a Wilson interval,
and the share of cells with significant over-dispersion or short-lag history structure.
Folders written before these columns existed give an empty summary.

References
----------
Brown, Barbieri, Ventura, Kass & Frank (2002), Neural Computation 14:325.
Haslinger, Pipa & Brown (2010), Neural Computation 22:2477.
Wilson (1927), J. Am. Stat. Assoc. 22:209 (intervals).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from encodex.report.load import classified
from encodex.report.tables import _label_sort_key, to_markdown, wilson_interval, write_texts

__all__ = ["fit_summary", "fit_caveat", "write_fit_summary", "within_band", "ALL_LABELS"]

#: Label of the summary row over every label of an environment.
ALL_LABELS = "(all labels)"

SUMMARY_COLUMNS = ("environment", "label", "n_checked", "n_within_band", "percent_within_band",
                   "ci_low_percent", "ci_high_percent", "median_ks_distance",
                   "median_dispersion", "percent_overdispersed", "median_history_ratio",
                   "percent_history_structure")


def fit_caveat(level: float = 0.05) -> str:
    """The sentence that says how a poor fit qualifies a label."""
    return (
        "A poor fit qualifies a label: for a cell outside the 95% KS band of the "
        "time-rescaling check, or with significant over-dispersion or short-lag history "
        f"structure (p < {level:g}), the listed variables still improved held-out prediction, "
        "but the model misses part of the spike train's structure (an unmodelled variable, "
        "slow changes of excitability, bursts or refractoriness), so its response curves and "
        "gains are approximate."
    )


def within_band(values: pd.Series) -> pd.Series:
    """``ks_within_band`` read back from CSV as booleans (NaN where not checked)."""
    text = values.astype(str).str.strip().str.lower()
    return text.map({"true": True, "false": False, "1": True, "0": False, "1.0": True,
                     "0.0": False})


def _summary_row(env: str, lab: str, sub: pd.DataFrame, level: float, p_level: float) -> dict:
    inside = within_band(sub["ks_within_band"]).dropna().astype(bool)
    n, k = int(inside.size), int(inside.sum())
    lo, hi = wilson_interval(k, n, level) if n else (np.nan, np.nan)

    def med(col):
        v = pd.to_numeric(sub[col], errors="coerce").dropna()
        return float(v.median()) if len(v) else np.nan

    def pct_sig(col):
        p = pd.to_numeric(sub[col], errors="coerce").dropna()
        return 100.0 * float((p < p_level).mean()) if len(p) else np.nan

    return {"environment": env, "label": lab, "n_checked": n, "n_within_band": k,
            "percent_within_band": 100.0 * k / n if n else np.nan,
            "ci_low_percent": 100.0 * lo, "ci_high_percent": 100.0 * hi,
            "median_ks_distance": med("ks_distance"), "median_dispersion": med("dispersion"),
            "percent_overdispersed": pct_sig("dispersion_p"),
            "median_history_ratio": med("history_ratio"),
            "percent_history_structure": pct_sig("history_p")}


def fit_summary(cells: pd.DataFrame, level: float = 0.95, p_level: float = 0.05) -> pd.DataFrame:
    """Fraction of classified cells inside the KS band, per environment and label.

    Parameters
    ----------
    cells : DataFrame
        ``cells.csv`` of a fit run.
    level : float
        Confidence level of the Wilson intervals.
    p_level : float
        Level at which ``dispersion_p`` and ``history_p`` count as significant.

    Returns
    -------
    DataFrame
        Columns :data:`SUMMARY_COLUMNS`; one row per environment and label, then a row
        ``(all labels)`` per environment. Empty when the folder has no goodness columns.
    """
    if "ks_within_band" not in cells.columns:
        return pd.DataFrame(columns=list(SUMMARY_COLUMNS))
    rows = []
    for env in pd.unique(cells["environment"]):
        ok = classified(cells[cells["environment"] == env])
        ok = ok[within_band(ok["ks_within_band"]).notna()]
        if ok.empty:
            continue
        for lab in sorted(pd.unique(ok["variables"]), key=_label_sort_key):
            rows.append(_summary_row(env, lab, ok[ok["variables"] == lab], level, p_level))
        rows.append(_summary_row(env, ALL_LABELS, ok, level, p_level))
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))


def display_fit_summary(summary: pd.DataFrame) -> pd.DataFrame:
    """Human-readable form of :func:`fit_summary`."""
    def pct(x):
        return f"{x:.0f}" if np.isfinite(x) else ""

    rows = []
    for r in summary.to_dict("records"):
        rows.append({
            "Environment": r["environment"], "Label": r["label"],
            "Within KS band, % [95% CI]": f"{pct(r['percent_within_band'])} "
                                           f"[{pct(r['ci_low_percent'])}, "
                                           f"{pct(r['ci_high_percent'])}] "
                                           f"({r['n_within_band']}/{r['n_checked']})",
            "Median KS distance": f"{r['median_ks_distance']:.3f}",
            "Median dispersion": f"{r['median_dispersion']:.2f}",
            "Over-dispersed, %": pct(r["percent_overdispersed"]),
            "Median pairs obs/exp": f"{r['median_history_ratio']:.2f}",
            "History structure, %": pct(r["percent_history_structure"]),
        })
    return pd.DataFrame(rows)


def write_fit_summary(summary: pd.DataFrame, out_dir) -> list[Path]:
    """Write ``table_goodness.csv`` and ``table_goodness.md`` in ``out_dir``."""
    md = "\n".join([
        "# Goodness of fit of the chosen models (held-out predictions)", "",
        to_markdown(display_fit_summary(summary)), "", fit_caveat(), ""])
    return write_texts(Path(out_dir), {"table_goodness.csv": summary.to_csv(index=False),
                                       "table_goodness.md": md})
