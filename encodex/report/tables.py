"""Tables for papers: how many cells carry each label and each variable, with intervals.

Counts and percentages are over the *classified* cells of an environment (status ``ok``);
cells excluded from classification (e.g. too few spikes) are listed separately by reason.
Intervals are Wilson score intervals computed by statsmodels.

References
----------
Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference.
J. Am. Stat. Assoc. 22:209-212.
Newcombe, R. G. (1998). Two-sided confidence intervals for the single proportion: comparison
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
    "cell_measures",
    "PaperTables",
    "make_tables",
    "write_tables",
    "to_markdown",
    "to_latex",
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
    Wilson (1927), JASA 22:209; Newcombe (1998), Stat. Med. 17:857 (method 3).
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
    return int(sel["ambiguous_with"].map(lambda v: isinstance(v, str) and v.strip() != "")
               .sum())


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
        gain_q3_bits_per_spike``. Gains are the held-out gains (bits per spike) of the chosen
        models of the cells with that label.
    """
    rows = []
    for env in pd.unique(cells["environment"]):
        ok = classified(cells[cells["environment"] == env])
        n = len(ok)
        for lab in sorted(set(ok["variables"]) | {NONE_LABEL}, key=_label_sort_key):
            sel = ok[ok["variables"] == lab]
            rows.append(_count_rows(env, "label", lab, len(sel), n,
                                    _gain_summary(sel["bits_per_spike"]), level,
                                    _n_flagged(sel)))
    return pd.DataFrame(rows, columns=_columns("label"))


def variable_counts(cells: pd.DataFrame, level: float = 0.95, tested=None) -> pd.DataFrame:
    """Cells carrying each variable (alone or with others), per environment.

    A cell labelled ``position+speed`` counts once for position and once for speed, so the
    percentages of one environment may add up to more than 100. ``tested`` restricts the rows
    to the variables the run considered (None: every built-in variable).

    Returns
    -------
    DataFrame
        Same columns as :func:`label_counts` with ``variable`` instead of ``label``; the gain
        is the cell's ``gain_<variable>`` column (bits per spike) among the cells carrying it.
    """
    rows = []
    names = variables_in(cells, tested)
    for env in pd.unique(cells["environment"]):
        ok = classified(cells[cells["environment"] == env])
        n = len(ok)
        sets = [set(carried(lab)) for lab in ok["variables"]]
        for v in names:
            has = np.array([v in s for s in sets], dtype=bool)
            if v not in (tested or VARIABLES) and not has.any():
                continue
            col = f"gain_{v}"
            gains = _gain_summary(ok.loc[has, col]) if col in ok else (np.nan,) * 3
            rows.append(_count_rows(env, "variable", v, int(has.sum()), n, gains, level,
                                    _n_flagged(ok.loc[has])))
    return pd.DataFrame(rows, columns=_columns("variable"))


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


def cell_measures(run: RunFolder, min_occupancy_s: float = 0.1) -> pd.DataFrame:
    """Per cell and environment: the model's label and gain beside the classic measures.

    Skaggs spatial information (bits per spike; Skaggs et al. 1993) and the peak and mean
    occupancy-normalised rates are computed from the occupancy map saved by the fit
    (``ratemap__occupancy_s``, ``ratemap__spikes``; on a track the 1-D occupancy along it,
    both directions pooled), over spatial bins visited for at least ``min_occupancy_s``
    seconds.

    Returns
    -------
    DataFrame
        ``unit, environment, status, label, n_spikes, mean_rate_hz, bits_per_spike,
        skaggs_bits_per_spike, peak_rate_hz, map_mean_rate_hz, ambiguous_with`` (the last
        as written by the fit: variables that could stand in for the chosen ones).
    """
    from encodex.classic import rate_map, skaggs_information

    rows = []
    for r in run.cells.itertuples(index=False):
        d = r._asdict()
        arr = run.unit_arrays(d["environment"], d["unit"]) or {}
        info = peak = mean = np.nan
        occ, spk = arr.get("ratemap__occupancy_s"), arr.get("ratemap__spikes")
        if "track__occupancy_s" in arr:  # on a track: the 1-D occupancy, all directions
            occ, spk = arr["track__occupancy_s"][0], arr["track__spikes"][0]
        if occ is not None and spk is not None:
            rates = rate_map(occ, spk, min_occupancy_s=min_occupancy_s)
            used = np.isfinite(rates)
            if used.any():
                info = skaggs_information(occ, spk, min_occupancy_s=min_occupancy_s)
                peak = float(np.max(rates[used]))
                mean = float(np.sum(np.asarray(spk)[used]) / np.sum(np.asarray(occ)[used]))
        rows.append({"unit": d["unit"], "environment": d["environment"],
                     "status": d["status"], "label": d["variables"],
                     "n_spikes": d["n_spikes"], "mean_rate_hz": d["mean_rate_hz"],
                     "bits_per_spike": d["bits_per_spike"], "skaggs_bits_per_spike": info,
                     "peak_rate_hz": peak, "map_mean_rate_hz": mean,
                     "ambiguous_with": d.get("ambiguous_with", "")})
    return pd.DataFrame(rows, columns=["unit", "environment", "status", "label", "n_spikes",
                                       "mean_rate_hz", "bits_per_spike",
                                       "skaggs_bits_per_spike", "peak_rate_hz",
                                       "map_mean_rate_hz", "ambiguous_with"])


@dataclass(frozen=True)
class PaperTables:
    """The three tables of a run and the significance level their labels rest on."""

    labels: pd.DataFrame
    variables: pd.DataFrame
    excluded: pd.DataFrame
    alpha: float
    level: float = 0.95
    cells: pd.DataFrame | None = None

    @property
    def caveat(self) -> str:
        return label_caveat(self.alpha)


def make_tables(run: RunFolder, level: float = 0.95) -> PaperTables:
    """Build the label, variable and exclusion tables of a fit run."""
    return PaperTables(
        labels=label_counts(run.cells, level),
        variables=variable_counts(run.cells, level, run.tested_variables),
        excluded=excluded_cells(run.cells),
        alpha=run.alpha,
        level=level,
        cells=cell_measures(run),
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
            "Gain, bits/spike: median [Q1, Q3]": (
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


def to_latex(df: pd.DataFrame, caption: str = "", label: str = "") -> str:
    """A LaTeX ``table`` with a booktabs ``tabular`` (needs ``\\usepackage{booktabs}``)."""
    spec = "".join("r" if pd.api.types.is_numeric_dtype(df[c]) else "l" for c in df.columns)
    lines = [r"\begin{table}[htbp]", r"\centering"]
    if caption:
        lines.append(r"\caption{" + latex_escape(caption) + "}")
    if label:
        lines.append(r"\label{" + label + "}")
    lines += [r"\begin{tabular}{" + spec + "}", r"\toprule",
              " & ".join(latex_escape(c) for c in df.columns) + r" \\", r"\midrule"]
    for row in df.itertuples(index=False):
        lines.append(" & ".join(latex_escape(x) for x in row) + r" \\")
    lines += [r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(lines) + "\n"


def _captions(t: PaperTables) -> dict[str, str]:
    pct = int(round(t.level * 100))
    return {
        "labels": (f"Cells per label (set of carried variables) per environment, among "
                   f"classified cells, with {pct}% Wilson score intervals and the held-out "
                   f"gain of the chosen model; Flagged: of these, cells with an ambiguity "
                   f"flag. {t.caveat} {AMBIGUITY_SENTENCE}"),
        "variables": (f"Cells carrying each variable (alone or with others; a cell can carry "
                      f"several) per environment, with {pct}% Wilson score intervals and the "
                      f"held-out gain attributed to that variable; Flagged: of these, cells "
                      f"with an ambiguity flag. {t.caveat} {AMBIGUITY_SENTENCE}"),
        "excluded": "Cells not classified, by environment and reason; they are in no count.",
        "cells": (f"Per cell: label and held-out gain of the chosen model (bits/spike) beside "
                  f"the classic measures, Skaggs spatial information (bits/spike) and peak "
                  f"rate of the occupancy-normalised rate map. {t.caveat}"),
    }


def write_tables(tables: PaperTables, out_dir: str | Path) -> list[Path]:
    """Write each table as CSV (raw numbers), Markdown and LaTeX (booktabs).

    Files: ``table_labels.{csv,md,tex}``, ``table_variables.*``, ``table_excluded.*`` and,
    when present, ``table_cells.*`` (per-cell model and classic measures).

    Returns
    -------
    list of Path
        The files written.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {out} ({exc.strerror}); choose a writable folder")
    caps = _captions(tables)
    written = []
    items = [("labels", tables.labels), ("variables", tables.variables),
             ("excluded", tables.excluded)]
    if tables.cells is not None:
        items.append(("cells", tables.cells))
    readme = out / "README.txt"
    try:
        readme.write_text(
            "Tables written by `encodex table`: CSV (raw numbers), Markdown and LaTeX "
            "(booktabs; needs \\usepackage{booktabs}).\n\n" + tables.caveat + "\n")
    except OSError as exc:
        raise OutputError(f"cannot write {readme} ({exc.strerror}); check the folder")
    for name, raw in items:
        if name in ("labels", "variables"):
            shown = display_frame(raw, tables.level)
        else:
            shown = raw.rename(columns=lambda c: c.replace("_", " ")).round(3)
        files = {
            f"table_{name}.csv": raw.to_csv(index=False),
            f"table_{name}.md": to_markdown(shown, caps[name]),
            f"table_{name}.tex": to_latex(shown, caps[name], f"tab:encodex-{name}"),
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
