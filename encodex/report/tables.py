"""Tables for papers: how many cells carry each label and each variable, with intervals.

Counts and percentages are over the *classified* cells of an environment (status ``ok``);
cells excluded from classification (e.g. too few spikes) are listed separately by reason.
Intervals are Wilson score intervals computed by statsmodels.

References
----------
Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference.
J. Am. Stat. Assoc. 22:209-212.
Newcombe, R. G. (1998a). Two-sided confidence intervals for the single proportion: comparison
of seven methods. Stat. Med. 17:857-872.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from statsmodels.stats.proportion import proportion_confint

from encodex.errors import OutputError, SettingsError
from encodex.report.load import RunFolder, carried, classified, variables_in
from encodex.report.wording import AMBIGUITY_SENTENCE, label_caveat
from encodex.variables import VARIABLES, NONE_LABEL

__all__ = [
    "wilson_interval",
    "label_counts",
    "variable_counts",
    "excluded_cells",
    "not_analysed",
    "cell_measures",
    "PaperTables",
    "make_tables",
    "write_tables",
    "to_markdown",
    "to_latex",
    "cells_display",
]


def wilson_interval(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for a proportion ``k / n``.

    Parameters
    ----------
    k, n : int
        Successes and trials (``0 <= k <= n``).
    level : float
        Confidence level (0.95 for a 95% interval).

    Returns
    -------
    (low, high) : tuple of float
        Interval on the proportion scale [0, 1]; (nan, nan) when ``n == 0``.

    References
    ----------
    Wilson (1927), JASA 22:209; Newcombe (1998a), Stat. Med. 17:857 (method 3).
    Computed by ``statsmodels.stats.proportion.proportion_confint(method="wilson")``.
    """
    if not 0 < level < 1:
        raise SettingsError(f"level must lie in (0, 1), e.g. 0.95; got {level}")
    if n < 0 or k < 0 or k > n:
        raise SettingsError(f"need 0 <= k <= n for a proportion; got k={k}, n={n}")
    if n == 0:
        return (float("nan"), float("nan"))
    lo, hi = proportion_confint(int(k), int(n), alpha=1 - level, method="wilson")
    return (float(lo), float(hi))


def _label_sort_key(lab: str) -> tuple:
    order = {v: i for i, v in enumerate(VARIABLES)}
    vs = carried(lab)
    return (len(vs), tuple(order.get(v, len(order)) for v in vs), lab)


def _gain_summary(values: pd.Series) -> tuple[float, float, float]:
    v = pd.to_numeric(values, errors="coerce").dropna().to_numpy(float)
    if v.size == 0:
        return (np.nan, np.nan, np.nan)
    q1, med, q3 = np.percentile(v, [25, 50, 75])
    return (float(med), float(q1), float(q3))


def _n_flagged(sel: pd.DataFrame) -> int:
    """Cells carrying an ``ambiguous_with`` flag (a variable or combination they cannot be
    told apart from in this session); counted beside, not instead of, the cells."""
    if "ambiguous_with" not in sel:
        return 0
    # empty flags read back from CSV as NaN (a float column when no cell is flagged)
    # (a plain count: the sum of an empty object column is not 0 in every pandas version)
    return sum(1 for v in sel["ambiguous_with"] if isinstance(v, str) and v.strip() != "")


def _count_rows(env: str, key: str, name: str, k: int, n: int, gains, level,
                n_flagged: int = 0) -> dict:
    lo, hi = wilson_interval(k, n, level)
    med, q1, q3 = gains
    return {
        "environment": env, key: name, "n_cells": k, "n_flagged": int(n_flagged),
        "n_classified": n,
        "percent": 100.0 * k / n if n else np.nan,
        "ci_low_percent": 100.0 * lo, "ci_high_percent": 100.0 * hi,
        "gain_median_bits_per_spike": med, "gain_q1_bits_per_spike": q1,
        "gain_q3_bits_per_spike": q3,
    }


def label_counts(cells: pd.DataFrame, level: float = 0.95) -> pd.DataFrame:
    """Cells per label and environment with Wilson intervals and held-out gain quartiles.

    Parameters
    ----------
    cells : DataFrame
        ``cells.csv`` of a fit run.
    level : float
        Confidence level of the intervals.

    Returns
    -------
    DataFrame
        Columns ``environment, label, n_cells, n_flagged, n_classified, percent,
        ci_low_percent,
        ci_high_percent, gain_median_bits_per_spike, gain_q1_bits_per_spike,
        gain_q3_bits_per_spike``. Gains are the held-out information (cells.csv
        ``bits_per_spike``, pooled folds) of the chosen models of the cells with that label;
        blank for "none", whose chosen model is the mean-rate model.
    """
    rows = []
    for env in pd.unique(cells["environment"]):
        ok = classified(cells[cells["environment"] == env])
        n = len(ok)
        for lab in sorted(set(ok["variables"]) | {NONE_LABEL}, key=_label_sort_key):
            sel = ok[ok["variables"] == lab]
            # a "none" cell's chosen model is the baseline model: its 0 is not a measurement
            gains = (_gain_summary(sel["bits_per_spike"]) if lab != NONE_LABEL
                     else (np.nan,) * 3)
            rows.append(_count_rows(env, "label", lab, len(sel), n, gains, level,
                                    _n_flagged(sel)))
    return pd.DataFrame(rows, columns=_columns("label"))


def variable_counts(cells: pd.DataFrame, level: float = 0.95, tested=None,
                    analysed=None) -> pd.DataFrame:
    """Cells carrying each variable (alone or with others), per environment.

    A cell labelled ``position+speed`` counts once for position and once for speed, so the
    percentages of one environment may add up to more than 100. Only variables analysed in
    an environment get a row there: ``analysed`` maps an environment to its variables
    (run.json ``environments``; :meth:`RunFolder.analysed_variables`); without it, ``tested``
    (the ``variables`` setting) or every built-in variable is used.

    Returns
    -------
    DataFrame
        Same columns as :func:`label_counts` with ``variable`` instead of ``label``; the gain
        is the cell's ``gain_<variable>`` column (bits per spike, fold-averaged) among the
        cells carrying it.
    """
    rows = []
    names = variables_in(cells, tested)
    for env in pd.unique(cells["environment"]):
        ok = classified(cells[cells["environment"] == env])
        n = len(ok)
        sets = [set(carried(lab)) for lab in ok["variables"]]
        here = analysed.get(env) if isinstance(analysed, dict) else None
        for v in names:
            has = np.array([v in s for s in sets], dtype=bool)
            if here is not None and v not in here and not has.any():
                continue  # never analysed in this environment: no row, not "0 %"
            if here is None and v not in (tested or VARIABLES) and not has.any():
                continue
            col = f"gain_{v}"
            gains = _gain_summary(ok.loc[has, col]) if col in ok else (np.nan,) * 3
            rows.append(_count_rows(env, "variable", v, int(has.sum()), n, gains, level,
                                    _n_flagged(ok.loc[has])))
    return pd.DataFrame(rows, columns=_columns("variable"))


def not_analysed(run: RunFolder) -> pd.DataFrame:
    """Variables left out of an environment's analysis, with the reason from run.json.

    Returns
    -------
    DataFrame
        Columns ``environment, variable, reason``.
    """
    rows = [{"environment": env, "variable": v, "reason": why}
            for env in run.environments
            for v, why in run.unavailable_variables(env).items()]
    return pd.DataFrame(rows, columns=["environment", "variable", "reason"])


def _columns(key: str) -> list[str]:
    return ["environment", key, "n_cells", "n_flagged", "n_classified", "percent",
            "ci_low_percent",
            "ci_high_percent", "gain_median_bits_per_spike", "gain_q1_bits_per_spike",
            "gain_q3_bits_per_spike"]


def excluded_cells(cells: pd.DataFrame) -> pd.DataFrame:
    """Cells left out of the counts, grouped by environment, status and reason.

    Returns
    -------
    DataFrame
        Columns ``environment, status, reason, n_cells, units`` (units joined by spaces).
    """
    out = cells[cells["status"] != "ok"]
    rows = []
    for (env, status, reason), g in out.groupby(["environment", "status", "reason"], sort=False):
        rows.append({"environment": env, "status": status, "reason": reason,
                     "n_cells": len(g), "units": " ".join(map(str, g["unit"]))})
    return pd.DataFrame(rows, columns=["environment", "status", "reason", "n_cells", "units"])


#: Columns of :func:`cell_measures` with their header in the Markdown and LaTeX tables.
CELL_TABLE_HEADERS: dict[str, str] = {
    "unit": "Unit", "environment": "Environment", "status": "Status", "label": "Label",
    "n_spikes": "Spikes", "mean_rate_hz": "Mean rate (Hz)",
    "bits_per_spike": "Held-out information (bits/spike)",
    "skaggs_corrected_bits_per_spike": "Skaggs, bias-corrected (bits/spike)",
    "skaggs_bits_per_spike": "Skaggs, plug-in (bits/spike)",
    "peak_rate_hz": "Peak map rate (Hz)", "map_mean_rate_hz": "Map mean rate (Hz)",
    "ambiguous_with": "Not separable from",
}


def cell_measures(run: RunFolder, min_occupancy_s: float | None = None) -> pd.DataFrame:
    """Per cell and environment: the model's label and information beside classic measures.

    Skaggs spatial information (bits per spike; Skaggs et al. 1993), plug-in and
    bias-corrected (:func:`encodex.classic.skaggs_information_corrected`), and the peak and
    mean occupancy-normalised rates are computed from the unsmoothed occupancy map saved by
    the fit (``ratemap__occupancy_s``, ``ratemap__spikes``; on a track the 1-D occupancy along it,
    both directions pooled), over spatial bins visited for
    at least ``min_occupancy_s`` seconds (default :data:`encodex.classic.MIN_OCCUPANCY_S`).

    Returns
    -------
    DataFrame
        Columns of :data:`CELL_TABLE_HEADERS`. ``label`` is empty for cells that were not
        labelled (their ``status`` says why); ``ambiguous_with`` as written by the fit.
    """
    from encodex.classic import (
        MIN_OCCUPANCY_S,
        rate_map,
        skaggs_information,
        skaggs_information_corrected,
    )

    min_occ = MIN_OCCUPANCY_S if min_occupancy_s is None else min_occupancy_s
    rows = []
    for r in run.cells.itertuples(index=False):
        d = r._asdict()
        arr = run.unit_arrays(d["environment"], d["unit"]) or {}
        info = corrected = peak = mean = np.nan
        occ, spk = arr.get("ratemap__occupancy_s"), arr.get("ratemap__spikes")
        if "track__occupancy_s" in arr:  # on a track: the 1-D occupancy, all directions
            occ, spk = arr["track__occupancy_s"][0], arr["track__spikes"][0]
        if occ is not None and spk is not None:
            rates = rate_map(occ, spk, min_occupancy_s=min_occ)
            used = np.isfinite(rates)
            if used.any():
                info = skaggs_information(occ, spk, min_occupancy_s=min_occ)
                corrected = skaggs_information_corrected(occ, spk, min_occupancy_s=min_occ)
                peak = float(np.max(rates[used]))
                mean = float(np.sum(np.asarray(spk)[used]) / np.sum(np.asarray(occ)[used]))
        ok = d["status"] == "ok"
        amb = d.get("ambiguous_with", "")
        rows.append({"unit": d["unit"], "environment": d["environment"],
                     "status": d["status"], "label": d["variables"] if ok else "",
                     "n_spikes": d["n_spikes"], "mean_rate_hz": d["mean_rate_hz"],
                     "bits_per_spike": d["bits_per_spike"] if ok else np.nan,
                     "skaggs_corrected_bits_per_spike": corrected,
                     "skaggs_bits_per_spike": info,
                     "peak_rate_hz": peak, "map_mean_rate_hz": mean,
                     "ambiguous_with": amb if isinstance(amb, str) else ""})
    return pd.DataFrame(rows, columns=list(CELL_TABLE_HEADERS))


@dataclass(frozen=True)
class PaperTables:
    """The tables of a run and the significance level their labels rest on."""

    labels: pd.DataFrame
    variables: pd.DataFrame
    excluded: pd.DataFrame
    alpha: float
    level: float = 0.95
    cells: pd.DataFrame | None = None
    not_analysed: pd.DataFrame | None = None

    @property
    def caveat(self) -> str:
        return label_caveat(self.alpha)


def make_tables(run: RunFolder, level: float = 0.95) -> PaperTables:
    """Build the label, variable and exclusion tables of a fit run."""
    return PaperTables(
        labels=label_counts(run.cells, level),
        variables=variable_counts(run.cells, level, run.tested_variables,
                                  {e: run.analysed_variables(e) for e in run.environments}),
        excluded=excluded_cells(run.cells),
        alpha=run.alpha,
        level=level,
        cells=cell_measures(run),
        not_analysed=not_analysed(run),
    )


# ---------------------------------------------------------------- formatting for manuscripts

def _fmt_num(x, digits=2) -> str:
    return "" if x is None or (isinstance(x, float) and not np.isfinite(x)) else f"{x:.{digits}f}"


def display_frame(df: pd.DataFrame, level: float = 0.95) -> pd.DataFrame:
    """Human-readable version of a count table (percent with interval, gain quartiles)."""
    key = "label" if "label" in df.columns else "variable"
    pct = int(round(level * 100))
    rows = []
    for r in df.itertuples(index=False):
        d = r._asdict()
        rows.append({
            "Environment": d["environment"],
            key.capitalize(): d[key],
            "Cells": f"{d['n_cells']} / {d['n_classified']}",
            "Flagged": str(d.get("n_flagged", 0)),
            "Percent": _fmt_num(d["percent"], 1),
            f"{pct}% CI (Wilson)": (
                f"[{_fmt_num(d['ci_low_percent'], 1)}, {_fmt_num(d['ci_high_percent'], 1)}]"
                if np.isfinite(d["ci_low_percent"]) else ""),
            ("Held-out information, bits/spike: median [Q1, Q3]" if key == "label" else
             "Gain of the variable, bits/spike: median [Q1, Q3]"): (
                f"{_fmt_num(d['gain_median_bits_per_spike'], 3)} "
                f"[{_fmt_num(d['gain_q1_bits_per_spike'], 3)}, "
                f"{_fmt_num(d['gain_q3_bits_per_spike'], 3)}]"
                if np.isfinite(d["gain_median_bits_per_spike"]) else "-"),
        })
    return pd.DataFrame(rows)


def to_markdown(df: pd.DataFrame, caption: str = "") -> str:
    """A GitHub-flavoured Markdown table (pipes escaped), with the caption as a paragraph."""
    def cell(x) -> str:
        return str(x).replace("|", "\\|").replace("\n", " ")

    head = "| " + " | ".join(cell(c) for c in df.columns) + " |"
    align = "| " + " | ".join(
        "---:" if pd.api.types.is_numeric_dtype(df[c]) else ":---" for c in df.columns) + " |"
    body = ["| " + " | ".join(cell(x) for x in row) + " |" for row in df.itertuples(index=False)]
    text = "\n".join([head, align, *body]) + "\n"
    return (caption.strip() + "\n\n" + text) if caption else text


_LATEX_SPECIAL = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
                  "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
                  "^": r"\textasciicircum{}"}


def latex_escape(text: str) -> str:
    """Escape LaTeX special characters in plain text."""
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


def to_latex(df: pd.DataFrame, caption: str = "", label: str = "", long: bool = False) -> str:
    """A LaTeX table with booktabs rules (needs ``\\usepackage{booktabs}``).

    ``long=True`` writes a ``longtable`` (needs ``\\usepackage{longtable}``) that breaks
    across pages and repeats its header, for tables with one row per cell.
    """
    spec = "".join("r" if _numeric_column(df[c]) else "l" for c in df.columns)
    if long:
        # long headers wrap in a narrow paragraph cell so that 12 columns fit a page
        head = " & ".join(latex_escape(c) if len(str(c)) <= 12 else
                          r"\multicolumn{1}{p{1.7cm}}{" + latex_escape(c) + "}"
                          for c in df.columns) + r" \\"
    else:
        head = " & ".join(latex_escape(c) for c in df.columns) + r" \\"
    body = [" & ".join(latex_escape(x) for x in row) + r" \\"
            for row in df.itertuples(index=False)]
    cap = (r"\caption{" + latex_escape(caption) + "}") if caption else ""
    lab = (r"\label{" + label + "}") if label else ""
    if long:
        lines = [r"\begingroup\small\setlength{\tabcolsep}{3pt}",
                 r"\begin{longtable}{" + spec + "}"]
        if cap or lab:
            lines.append(cap + lab + r" \\")
        lines += [r"\toprule", head, r"\midrule", r"\endfirsthead",
                  r"\toprule", head, r"\midrule", r"\endhead",
                  r"\bottomrule", r"\endlastfoot", *body, r"\end{longtable}", r"\endgroup"]
        return "\n".join(lines) + "\n"
    lines = [r"\begin{table}[htbp]", r"\centering"]
    lines += [x for x in (cap, lab) if x]
    lines += [r"\begin{tabular}{" + spec + "}", r"\toprule", head, r"\midrule", *body,
              r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(lines) + "\n"


def _numeric_column(col: pd.Series) -> bool:
    """Numbers, or text that reads as numbers (blanks allowed): right-aligned."""
    if pd.api.types.is_numeric_dtype(col):
        return True
    vals = [str(x) for x in col if str(x) != ""]
    if not vals:
        return False
    return pd.to_numeric(pd.Series(vals), errors="coerce").notna().all()


def cells_display(df: pd.DataFrame) -> pd.DataFrame:
    """The per-cell table for reading: headers with units, blanks for missing values."""
    out = pd.DataFrame(index=df.index)
    digits = {"mean_rate_hz": 2, "bits_per_spike": 3, "skaggs_corrected_bits_per_spike": 3,
              "skaggs_bits_per_spike": 3, "peak_rate_hz": 2, "map_mean_rate_hz": 2}
    for col, head in CELL_TABLE_HEADERS.items():
        v = df[col]
        if col in digits:
            out[head] = [_fmt_num(x, digits[col]) for x in pd.to_numeric(v, errors="coerce")]
        elif col == "n_spikes":
            out[head] = [f"{int(x)}" if pd.notna(x) else "" for x in v]
        else:
            out[head] = ["" if pd.isna(x) else str(x) for x in v]
    return out.reset_index(drop=True)


def not_analysed_display(df: pd.DataFrame) -> pd.DataFrame:
    """The not-analysed table with capitalised headers."""
    return df.rename(columns={"environment": "Environment", "variable": "Variable",
                              "reason": "Reason"})


def excluded_display(df: pd.DataFrame) -> pd.DataFrame:
    """The table of cells that were not labelled, with capitalised headers."""
    return df.rename(columns={"environment": "Environment", "status": "Status",
                              "reason": "Reason", "n_cells": "Cells", "units": "Units"})


def _captions(t: PaperTables) -> dict[str, str]:
    pct = f"{t.level * 100:g}"
    return {
        "labels": (f"Cells per label (set of carried variables) per environment, among "
                   f"labelled cells, with {pct}% Wilson score intervals and the held-out "
                   f"information of the chosen model (bits per spike, all held-out bins "
                   f"pooled; blank for 'none', whose model is the baseline); Flagged: of these, "
                   f"cells with an ambiguity flag. {t.caveat} {AMBIGUITY_SENTENCE}"),
        "variables": (f"Cells carrying each variable (alone or with others; a cell can carry "
                      f"several) per environment, among labelled cells, with {pct}% Wilson "
                      f"score intervals and the gain of the variable (bits per spike, "
                      f"averaged over folds). Variables not analysed in an environment have "
                      f"no row (see table_not_analysed); Flagged: of these, cells with an "
                      f"ambiguity flag. {t.caveat} {AMBIGUITY_SENTENCE}"),
        "excluded": "Cells not labelled, by environment, status and reason; they are in no "
                    "count.",
        "not_analysed": "Variables not analysed in an environment, with the reason.",
        "cells": (f"Per cell and environment: label and held-out information of the chosen "
                  f"model beside the classic measures of the unsmoothed occupancy-normalised "
                  f"rate map. Blank: not labelled (see Status) or not available. "
                  f"{t.caveat}"),
    }


README = """Tables written by `encodex table`
=================================

Every table comes as CSV (raw numbers, machine-readable), Markdown and LaTeX (booktabs;
needs \\usepackage{{booktabs}}; table_cells.tex is a longtable, needs
\\usepackage{{longtable}}). Percentages are of the labelled cells (status "ok") of one
environment; cells not labelled are listed in table_excluded and are in no count.
Intervals are {pct}% Wilson score intervals.

table_labels      one row per environment and label ("none": labelled, carries no variable)
table_variables   one row per environment and variable analysed there
  environment, label | variable,
  n_cells (cells with the label / carrying the variable),
  n_flagged (of these, cells whose ambiguous_with is not empty: a chosen variable cannot be
             told apart from another variable or combination in this session),
  n_classified (labelled cells),
  percent, ci_low_percent, ci_high_percent (percent of n_classified and its interval),
  gain_median_bits_per_spike, gain_q1_bits_per_spike, gain_q3_bits_per_spike:
    table_labels: median and quartiles of the chosen model's held-out information
      (cells.csv bits_per_spike: all held-out bins pooled, bits per held-out spike);
      blank for "none";
    table_variables: of the variable's gain (cells.csv gain_<variable>: fold-averaged
      held-out bits per spike the variable adds), among the cells carrying it.
table_excluded    environment, status ("too few spikes", "no variables", "too few bins",
                  "error"), reason, n_cells, units (space-separated unit ids)
table_not_analysed  environment, variable, reason (e.g. no trials: no distance or time)
table_cells       one row per unit and environment:
  unit, environment, status, label (empty when not labelled), n_spikes,
  mean_rate_hz (spikes / usable time, Hz),
  bits_per_spike (held-out information of the chosen model, pooled, bits/spike),
  skaggs_corrected_bits_per_spike (Skaggs information minus its first-order bias
    (B - 1) / (2 N ln 2), B used spatial bins, N spikes; about 0 for an untuned cell),
  skaggs_bits_per_spike (plug-in Skaggs information, biased upwards with few spikes),
  peak_rate_hz, map_mean_rate_hz (of the unsmoothed rate map; spatial bins visited for
    less than {min_occ:g} s left out),
  ambiguous_with (variables a chosen variable cannot be told apart from, ";"-separated)
methods.txt       the methods paragraph of this run with its references (plain text)
methods.md        the same as Markdown

{caveat}
"""


def write_tables(tables: PaperTables, out_dir: str | Path) -> list[Path]:
    """Write each table as CSV (raw numbers), Markdown and LaTeX (booktabs).

    Files: ``table_labels.{csv,md,tex}``, ``table_variables.*``, ``table_excluded.*``,
    ``table_not_analysed.*`` and, when present, ``table_cells.*`` (per-cell model and
    classic measures; its LaTeX is a ``longtable``), and ``README.txt`` describing every
    column.

    Returns
    -------
    list of Path
        The files written.
    """
    from encodex.classic import MIN_OCCUPANCY_S

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {out} ({exc.strerror}); choose a writable folder")
    caps = _captions(tables)
    items = [("labels", tables.labels, display_frame(tables.labels, tables.level)),
             ("variables", tables.variables, display_frame(tables.variables, tables.level)),
             ("excluded", tables.excluded, excluded_display(tables.excluded))]
    if tables.not_analysed is not None:
        items.append(("not_analysed", tables.not_analysed,
                      not_analysed_display(tables.not_analysed)))
    if tables.cells is not None:
        items.append(("cells", tables.cells, cells_display(tables.cells)))
    written = write_texts(out, {"README.txt": README.format(
        pct=f"{tables.level * 100:g}", min_occ=MIN_OCCUPANCY_S, caveat=tables.caveat)})
    for name, raw, shown in items:
        files = {
            f"table_{name}.csv": raw.to_csv(index=False),
            f"table_{name}.md": to_markdown(shown, caps[name]),
            f"table_{name}.tex": to_latex(shown, caps[name], f"tab:encodex-{name}",
                                          long=name == "cells"),
        }
        written += write_texts(out, files)
    return written


def write_texts(out: Path, files: dict) -> list:
    """Write ``{file name: text}`` into the folder ``out``; a failure is one OutputError."""
    written = []
    for fname, text in files.items():
        p = Path(out) / fname
        try:
            p.write_text(text)
        except OSError as exc:
            raise OutputError(f"cannot write {p} ({exc.strerror}); check the folder")
        written.append(p)
    return written
