"""Compare the labels of a population between two environments.

Paired comparison (cells recorded in both environments, matched by unit id):

- transition table of labels (environment A in rows, B in columns);
- per variable, McNemar's test on paired presence/absence, exact binomial form when fewer than
  25 discordant cells (Agresti 2013, Categorical Data Analysis, 3rd ed., sec. 11.1), with the
  change in fractions and Newcombe's interval for a paired difference (Newcombe 1998c,
  method 10);
- Wilcoxon signed-rank test on the paired held-out gains;
- cells active in one environment and silent (too few spikes) in the other;
- stability of tuning: correlation of the fitted response functions for cells that carry a
  variable in both environments.

Unpaired comparison (no cell matched): per variable Fisher's exact test when an expected
count is below 5, otherwise the chi-square test with Yates' correction, with Newcombe's
interval for a difference of independent proportions and the odds ratio; Mann-Whitney U on
the gains.

Every test of a comparison forms one family, corrected by Benjamini-Hochberg.

References
----------
McNemar, Q. (1947). Psychometrika 12:153-157.
Agresti, A. (2013). Categorical Data Analysis, 3rd ed. Wiley.
Newcombe, R. G. (1998b). Interval estimation for the difference between independent
proportions: comparison of eleven methods. Stat. Med. 17:873-890.
Newcombe, R. G. (1998c). Improved confidence intervals for the difference between binomial
proportions based on paired data. Stat. Med. 17:2635-2650.
Wilcoxon, F. (1945). Individual comparisons by ranking methods. Biometrics Bull. 1:80-83.
Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate. J. R. Stat. Soc. B
57:289-300.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats
from scipy.interpolate import RegularGridInterpolator
from statsmodels.stats.contingency_tables import Table2x2, mcnemar
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import confint_proportions_2indep

from encodex.errors import SettingsError
from encodex.report.load import CLASSIFIED_STATUS, RunFolder, carried, variables_in
from encodex.report.tables import _label_sort_key, wilson_interval
from encodex.report.wording import label_caveat

__all__ = [
    "EnvironmentComparison",
    "compare_environments",
    "mcnemar_test",
    "unpaired_test",
    "paired_difference_interval",
    "response_correlation",
    "EXACT_BELOW",
    "write_comparison",
    "summary_frame",
    "benjamini_hochberg",
    "paired_gain_test",
]

#: McNemar's test uses the exact binomial form when fewer discordant pairs than this
#: (common practice, e.g. Agresti 2013 sec. 11.1 recommends the exact form for small counts;
#: the cut-off 25 is common practice, no source).
EXACT_BELOW = 25

SILENT_STATUS = "too few spikes"


def mcnemar_test(both: int, a_only: int, b_only: int, neither: int) -> tuple[str, float, float]:
    """McNemar's test on a paired 2x2 table of presence (A) by presence (B).

    Returns
    -------
    (name, statistic, p_value)
        ``"McNemar exact"`` (statistic = smaller discordant count, binomial p) when
        ``a_only + b_only < EXACT_BELOW``, else ``"McNemar chi2 (cc)"`` with continuity
        correction. Computed by ``statsmodels.stats.contingency_tables.mcnemar``.
    """
    table = np.array([[both, a_only], [b_only, neither]])
    exact = (a_only + b_only) < EXACT_BELOW
    res = mcnemar(table, exact=exact, correction=True)
    name = "McNemar exact" if exact else "McNemar chi2 (cc)"
    return name, float(res.statistic), float(res.pvalue)


def unpaired_test(k_a: int, n_a: int, k_b: int, n_b: int) -> tuple[str, float, float]:
    """Compare two independent proportions ``k_a / n_a`` and ``k_b / n_b``.

    Fisher's exact test (``scipy.stats.fisher_exact``) when any expected count is below 5,
    otherwise the chi-square test with Yates' correction (``scipy.stats.chi2_contingency``).

    Returns
    -------
    (name, statistic, p_value)
        Statistic is the sample odds ratio (A over B) for Fisher, chi-square for the other.
    """
    table = np.array([[k_a, n_a - k_a], [k_b, n_b - k_b]])
    if table.sum(axis=1).min() == 0 or table.sum(axis=0).min() == 0:
        return ("none (a margin is empty)", float("nan"), float("nan"))
    expected = stats.contingency.expected_freq(table)
    if expected.min() < 5:
        res = stats.fisher_exact(table)
        return ("Fisher exact", float(res.statistic), float(res.pvalue))
    chi2, p, _, _ = stats.chi2_contingency(table, correction=True)
    return ("chi2 (Yates)", float(chi2), float(p))


def paired_difference_interval(
    both: int, a_only: int, b_only: int, neither: int, level: float = 0.95
) -> tuple[float, float, float]:
    """Newcombe's hybrid score interval for a difference of paired proportions.

    The difference is ``p_A - p_B = (a_only - b_only) / n``. Method 10 of Newcombe (1998c):
    Wilson intervals of each margin combined with the continuity-corrected phi coefficient.

    Returns
    -------
    (difference, low, high)

    References
    ----------
    Newcombe, R. G. (1998c). Improved confidence intervals for the difference between binomial
    proportions based on paired data. Stat. Med. 17:2635-2650 (method 10).
    """
    a, b, c, d = (int(x) for x in (both, a_only, b_only, neither))
    n = a + b + c + d
    if n == 0:
        return (float("nan"),) * 3
    p1, p2 = (a + b) / n, (a + c) / n
    l1, u1 = wilson_interval(a + b, n, level)
    l2, u2 = wilson_interval(a + c, n, level)
    e, f, g, h = a + b, c + d, a + c, b + d
    denom = float(e) * f * g * h
    if denom == 0:
        phi = 0.0
    else:
        num = a * d - b * c
        if num > 0:
            num = max(num - n / 2.0, 0.0)
        phi = num / np.sqrt(denom)
    theta = p1 - p2
    delta = np.sqrt(max((p1 - l1) ** 2 - 2 * phi * (p1 - l1) * (u2 - p2) + (u2 - p2) ** 2, 0))
    eps = np.sqrt(max((u1 - p1) ** 2 - 2 * phi * (u1 - p1) * (p2 - l2) + (p2 - l2) ** 2, 0))
    return (float(theta), float(max(theta - delta, -1.0)), float(min(theta + eps, 1.0)))


def response_correlation(arrays_a: dict, arrays_b: dict, variable: str) -> float:
    """Pearson correlation of a variable's fitted response between two environments.

    The response compared is ``<variable>__log_modulation`` of the unit files (natural log of
    the factor by which the term multiplies the rate; its baseline does not matter to a
    correlation).

    The B curve is interpolated onto the A grid points that lie in the range both grids
    cover (circular interpolation for angles). Position maps are compared bin by bin over the
    overlap of the two arenas' grids.

    Returns
    -------
    float
        Correlation in [-1, 1]; NaN when a curve is missing, flat, or fewer than 3 grid points
        overlap.
    """
    if variable == "position" and "position__grid" not in arrays_a:  # 1-D on a track: below
        keys = ("position__grid_x", "position__grid_y", "position__log_modulation")
        if not all(k in arrays_a and k in arrays_b for k in keys):
            return float("nan")
        gxa, gya, la = (np.asarray(arrays_a[k], float) for k in keys)
        gxb, gyb, lb = (np.asarray(arrays_b[k], float) for k in keys)
        if la.shape != (gya.size, gxa.size) or lb.shape != (gyb.size, gxb.size):
            return float("nan")
        if gxb.size < 2 or gyb.size < 2:
            return float("nan")
        interp = RegularGridInterpolator((gyb, gxb), lb, bounds_error=False, fill_value=np.nan)
        yy, xx = np.meshgrid(gya, gxa, indexing="ij")
        vb = interp(np.column_stack([yy.ravel(), xx.ravel()]))
        va = la.ravel()
    else:
        g, lg = f"{variable}__grid", f"{variable}__log_modulation"
        if not all(k in arrays_a and k in arrays_b for k in (g, lg)):
            return float("nan")
        ga, va = np.asarray(arrays_a[g], float), np.asarray(arrays_a[lg], float)
        gb, lb = np.asarray(arrays_b[g], float), np.asarray(arrays_b[lg], float)
        if variable in ("heading", "phase"):
            vb = np.interp(ga, gb, lb, period=2 * np.pi)
        else:
            inside = (ga >= gb.min()) & (ga <= gb.max())
            vb = np.where(inside, np.interp(ga, gb, lb), np.nan)
    ok = np.isfinite(va) & np.isfinite(vb)
    if ok.sum() < 3 or np.std(va[ok]) == 0 or np.std(vb[ok]) == 0:
        return float("nan")
    return float(np.corrcoef(va[ok], vb[ok])[0, 1])


@dataclass(frozen=True)
class EnvironmentComparison:
    """Result of comparing the labels of one population between environments A and B.

    Attributes
    ----------
    a, b : str
        Environment names (A in rows of the transition table).
    paired : bool
        True when cells were matched by unit id; False for the unpaired comparison.
    n_a, n_b, n_paired : int
        Classified cells in A, in B and in both.
    transitions : DataFrame
        Label in A (index) by label in B (columns), counts of paired cells (empty if unpaired).
    variables : DataFrame
        One row per variable: counts, fractions with Wilson intervals, the change in fraction
        (B minus A) with its interval, the test, its p-value and the BH-adjusted p-value.
    gains : DataFrame
        One row: the test of held-out gains (bits per spike) between environments.
    activity : DataFrame
        Cells classified in one environment and silent (too few spikes) in the other.
    stability : DataFrame
        One row per (unit, variable) carried in both: correlation of response functions.
    tests : DataFrame
        The family of tests with raw and BH-adjusted p-values.
    alpha : float
        Level of the BH correction and of the labels.
    notes : tuple of str
        Plain-language statements of what was done (e.g. that the comparison is unpaired).
    """

    a: str
    b: str
    paired: bool
    n_a: int
    n_b: int
    n_paired: int
    transitions: pd.DataFrame
    variables: pd.DataFrame
    gains: pd.DataFrame
    activity: pd.DataFrame
    stability: pd.DataFrame
    tests: pd.DataFrame
    alpha: float
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def caveat(self) -> str:
        return label_caveat(self.alpha)


def _per_env(cells: pd.DataFrame, env: str) -> pd.DataFrame:
    sub = cells[cells["environment"] == env]
    if sub["unit"].duplicated().any():
        dup = sub.loc[sub["unit"].duplicated(), "unit"].iloc[0]
        raise SettingsError(
            f"unit {dup} appears twice in environment {env} of cells.csv; unit ids must be "
            f"unique per environment - re-run `encodex fit`"
        )
    return sub.set_index("unit")


def compare_environments(
    run: RunFolder,
    a: str,
    b: str,
    paired: bool | None = None,
    alpha: float | None = None,
    level: float = 0.95,
) -> EnvironmentComparison:
    """Compare labels between environments ``a`` and ``b`` of one fit run.

    Parameters
    ----------
    run : RunFolder
        The fit output (see :func:`encodex.report.load.load_run`).
    a, b : str
        Environment names as written in ``cells.csv``.
    paired : bool, optional
        Force the paired (True) or unpaired (False) comparison. By default paired when at least
        one unit is classified in both environments.
    alpha : float, optional
        False discovery rate of the BH correction; default the run's alpha.
    level : float
        Confidence level of the intervals.

    Returns
    -------
    EnvironmentComparison
    """
    envs = run.environments
    for e in (a, b):
        if e not in envs:
            raise SettingsError(
                f"environment {e!r} is not in cells.csv; choose from {', '.join(envs)}"
            )
    if a == b:
        raise SettingsError("--between needs two different environments")
    alpha = run.alpha if alpha is None else float(alpha)
    if not 0 < alpha < 1:
        raise SettingsError(f"alpha must lie in (0, 1); got {alpha}")
    cells = run.cells
    ca, cb = _per_env(cells, a), _per_env(cells, b)
    ok_a = ca[ca["status"] == CLASSIFIED_STATUS]
    ok_b = cb[cb["status"] == CLASSIFIED_STATUS]
    common = [u for u in ok_a.index if u in ok_b.index]
    if paired is None:
        paired = len(common) > 0
    if paired and not common:
        raise SettingsError(
            f"no unit is classified in both {a} and {b}, so a paired comparison is impossible; "
            f"drop --paired to compare the populations unpaired"
        )
    notes = []
    # a variable is compared only where it was analysed in both environments: one never
    # analysed in an environment is not "0 % of cells" there
    in_a, in_b = set(run.analysed_variables(a)), set(run.analysed_variables(b))
    names = [v for v in variables_in(cells, run.tested_variables) if v in in_a and v in in_b]
    left_out = [v for v in variables_in(cells, run.tested_variables)
                if (v in in_a) != (v in in_b)]
    if left_out:
        notes.append(f"Not compared, analysed in only one of the two environments: "
                     f"{', '.join(left_out)}.")
    rows, tests = [], []
    if paired:
        la = ok_a.loc[common, "variables"]
        lb = ok_b.loc[common, "variables"]
        order_a = sorted(set(la), key=_label_sort_key)
        order_b = sorted(set(lb), key=_label_sort_key)
        transitions = pd.crosstab(la.rename(f"{a} (rows)"), lb.rename(f"{b} (columns)"))
        transitions = transitions.reindex(index=order_a, columns=order_b, fill_value=0)
        n = len(common)
        notes.append(
            f"Paired comparison of {n} cells classified in both {a} and {b} (matched by unit "
            f"id); per-variable McNemar tests (exact binomial form below {EXACT_BELOW} "
            f"discordant cells), Wilcoxon signed-rank test on paired gains, Benjamini-Hochberg "
            f"correction across all tests."
        )
        for v in names:
            ha = np.array([v in carried(x) for x in la])
            hb = np.array([v in carried(x) for x in lb])
            both, a_only = int((ha & hb).sum()), int((ha & ~hb).sum())
            b_only, neither = int((~ha & hb).sum()), int((~ha & ~hb).sum())
            if both + a_only + b_only == 0:
                test, stat, p = "none (no cell carries it)", np.nan, np.nan
            else:
                test, stat, p = mcnemar_test(both, a_only, b_only, neither)
            d, lo, hi = paired_difference_interval(both, a_only, b_only, neither, level)
            rows.append(_var_row(v, int(ha.sum()), n, int(hb.sum()), n, level,
                                 0.0 - d, 0.0 - hi, 0.0 - lo, test, stat, p,
                                 both=both, a_only=a_only, b_only=b_only, neither=neither))
        ga = pd.to_numeric(ok_a.loc[common, "bits_per_spike"], errors="coerce").to_numpy(float)
        gb = pd.to_numeric(ok_b.loc[common, "bits_per_spike"], errors="coerce").to_numpy(float)
        fin = np.isfinite(ga) & np.isfinite(gb)
        gains = _gain_test_paired(ga[fin], gb[fin])
    else:
        transitions = pd.DataFrame()
        n_a, n_b = len(ok_a), len(ok_b)
        notes.append(
            f"Unpaired comparison: no cell was matched between {a} and {b}, so the two "
            f"populations are compared as independent samples (Fisher's exact test when an "
            f"expected count is below 5, chi-square otherwise; Mann-Whitney U on gains), with "
            f"Benjamini-Hochberg correction across all tests."
        )
        for v in names:
            ka = int(sum(v in carried(x) for x in ok_a["variables"]))
            kb = int(sum(v in carried(x) for x in ok_b["variables"]))
            if ka + kb == 0:
                test, stat, p = "none (no cell carries it)", np.nan, np.nan
            else:
                test, stat, p = unpaired_test(ka, n_a, kb, n_b)
            if n_a and n_b:
                lo, hi = confint_proportions_2indep(kb, n_b, ka, n_a, method="newcomb",
                                                    compare="diff", alpha=1 - level)
                d = kb / n_b - ka / n_a
            else:
                d = lo = hi = np.nan
            tab = Table2x2(np.array([[kb, n_b - kb], [ka, n_a - ka]], float), shift_zeros=True)
            or_lo, or_hi = tab.oddsratio_confint(alpha=1 - level)
            rows.append(_var_row(v, ka, n_a, kb, n_b, level, d, float(lo), float(hi), test,
                                 stat, p, odds_ratio=float(tab.oddsratio),
                                 odds_ratio_ci_low=float(or_lo),
                                 odds_ratio_ci_high=float(or_hi)))
        ga = pd.to_numeric(ok_a["bits_per_spike"], errors="coerce").dropna().to_numpy(float)
        gb = pd.to_numeric(ok_b["bits_per_spike"], errors="coerce").dropna().to_numpy(float)
        gains = _gain_test_unpaired(ga, gb)
    variables = pd.DataFrame(rows)
    # one family: every per-variable test plus the gain test
    fam = [(f"{r['variable']}: {r['test']}", r["p_value"]) for r in rows]
    fam.append((f"gain: {gains['test'].iloc[0]}", float(gains["p_value"].iloc[0])))
    tests = pd.DataFrame(fam, columns=["test", "p_value"])
    padj, rej = benjamini_hochberg(tests["p_value"].to_numpy(float), alpha)
    tests["p_adjusted"] = padj
    tests["significant"] = rej
    variables["p_adjusted"] = tests["p_adjusted"].iloc[: len(rows)].to_numpy()
    variables["significant"] = tests["significant"].iloc[: len(rows)].to_numpy(bool)
    gains = gains.assign(p_adjusted=tests["p_adjusted"].iloc[-1],
                         significant=bool(tests["significant"].iloc[-1]))
    activity = _activity(ca, cb, a, b)
    stability = _stability(run, ok_a, ok_b, common, a, b, names) if paired else pd.DataFrame(
        columns=["unit", "variable", "correlation"])
    return EnvironmentComparison(
        a=a, b=b, paired=bool(paired), n_a=len(ok_a), n_b=len(ok_b), n_paired=len(common),
        transitions=transitions, variables=variables, gains=gains, activity=activity,
        stability=stability, tests=tests, alpha=alpha, notes=tuple(notes),
    )


def _var_row(v, ka, na, kb, nb, level, d, lo, hi, test, stat, p, **extra) -> dict:
    la, ha = wilson_interval(ka, na, level) if na else (np.nan, np.nan)
    lb, hb = wilson_interval(kb, nb, level) if nb else (np.nan, np.nan)
    row = {"variable": v, "n_a": na, "carry_a": ka, "fraction_a": ka / na if na else np.nan,
           "ci_low_a": la, "ci_high_a": ha, "n_b": nb, "carry_b": kb,
           "fraction_b": kb / nb if nb else np.nan, "ci_low_b": lb, "ci_high_b": hb,
           "change_b_minus_a": d, "change_ci_low": lo, "change_ci_high": hi}
    row.update(extra)
    row.update(test=test, statistic=stat, p_value=p)
    return row


def benjamini_hochberg(p_values, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Benjamini-Hochberg adjusted p-values and rejections; NaN p-values stay out of the family.

    Computed by ``statsmodels.stats.multitest.multipletests(method="fdr_bh")``.

    Returns
    -------
    (adjusted, reject) : ndarray of float, ndarray of bool

    References
    ----------
    Benjamini & Hochberg (1995), J. R. Stat. Soc. B 57:289-300.
    """
    p = np.asarray(p_values, dtype=float)
    adj = np.full(p.shape, np.nan)
    rej = np.zeros(p.shape, dtype=bool)
    fin = np.isfinite(p)
    if fin.any():
        r, a, _, _ = multipletests(p[fin], alpha=alpha, method="fdr_bh")
        adj[fin], rej[fin] = a, r
    return adj, rej


def paired_gain_test(ga: np.ndarray, gb: np.ndarray) -> pd.DataFrame:
    """Two-sided Wilcoxon signed-rank test (``scipy.stats.wilcoxon``) of gains B vs A."""
    return _gain_test_paired(np.asarray(ga, float), np.asarray(gb, float))


def _gain_test_paired(ga: np.ndarray, gb: np.ndarray) -> pd.DataFrame:
    diff = gb - ga
    if np.count_nonzero(diff) < 1:
        stat = p = np.nan
    else:
        res = stats.wilcoxon(gb, ga, zero_method="wilcox", alternative="two-sided")
        stat, p = float(res.statistic), float(res.pvalue)
    return pd.DataFrame([{
        "test": "Wilcoxon signed-rank (paired)", "n_a": ga.size, "n_b": gb.size,
        "median_a_bits_per_spike": float(np.median(ga)) if ga.size else np.nan,
        "median_b_bits_per_spike": float(np.median(gb)) if gb.size else np.nan,
        "median_change_bits_per_spike": float(np.median(diff)) if diff.size else np.nan,
        "statistic": stat, "p_value": p}])


def _gain_test_unpaired(ga: np.ndarray, gb: np.ndarray) -> pd.DataFrame:
    if ga.size and gb.size:
        res = stats.mannwhitneyu(gb, ga, alternative="two-sided")
        stat, p = float(res.statistic), float(res.pvalue)
    else:
        stat = p = np.nan
    return pd.DataFrame([{
        "test": "Mann-Whitney U (unpaired)", "n_a": ga.size, "n_b": gb.size,
        "median_a_bits_per_spike": float(np.median(ga)) if ga.size else np.nan,
        "median_b_bits_per_spike": float(np.median(gb)) if gb.size else np.nan,
        "median_change_bits_per_spike": (float(np.median(gb) - np.median(ga))
                                         if ga.size and gb.size else np.nan),
        "statistic": stat, "p_value": p}])


def _activity(ca: pd.DataFrame, cb: pd.DataFrame, a: str, b: str) -> pd.DataFrame:
    rows = []
    for u in ca.index.intersection(cb.index):
        sa, sb = ca.at[u, "status"], cb.at[u, "status"]
        if sa == CLASSIFIED_STATUS and sb == SILENT_STATUS:
            rows.append({"unit": u, "active_in": a, "silent_in": b,
                         "label_when_active": ca.at[u, "variables"],
                         "n_spikes_active": ca.at[u, "n_spikes"],
                         "n_spikes_silent": cb.at[u, "n_spikes"]})
        elif sb == CLASSIFIED_STATUS and sa == SILENT_STATUS:
            rows.append({"unit": u, "active_in": b, "silent_in": a,
                         "label_when_active": cb.at[u, "variables"],
                         "n_spikes_active": cb.at[u, "n_spikes"],
                         "n_spikes_silent": ca.at[u, "n_spikes"]})
    return pd.DataFrame(rows, columns=["unit", "active_in", "silent_in", "label_when_active",
                                       "n_spikes_active", "n_spikes_silent"])


def _stability(run, ok_a, ok_b, common, a, b, names) -> pd.DataFrame:
    rows = []
    for u in common:
        keep = set(carried(ok_a.at[u, "variables"])) & set(carried(ok_b.at[u, "variables"]))
        if not keep:
            continue
        arr_a, arr_b = run.unit_arrays(a, u), run.unit_arrays(b, u)
        for v in [x for x in names if x in keep]:
            r = (response_correlation(arr_a, arr_b, v)
                 if arr_a is not None and arr_b is not None else np.nan)
            rows.append({"unit": u, "variable": v, "correlation": r})
    return pd.DataFrame(rows, columns=["unit", "variable", "correlation"])


def write_comparison(cmp: EnvironmentComparison, out_dir) -> list:
    """Write the comparison as CSV files plus a Markdown summary; returns the paths."""
    from pathlib import Path

    from encodex.errors import OutputError
    from encodex.report.tables import to_markdown, write_texts

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {out} ({exc.strerror}); choose a writable folder")
    from encodex.report.load import comparison_stem

    stem = comparison_stem(cmp.a, cmp.b)
    files = {
        f"{stem}_variables.csv": cmp.variables.to_csv(index=False),
        f"{stem}_gains.csv": cmp.gains.to_csv(index=False),
        f"{stem}_activity.csv": cmp.activity.to_csv(index=False),
        f"{stem}_stability.csv": cmp.stability.to_csv(index=False),
        f"{stem}_tests.csv": cmp.tests.to_csv(index=False),
    }
    if cmp.paired:
        files[f"{stem}_transitions.csv"] = cmp.transitions.to_csv()
    md = [f"# {cmp.a} vs {cmp.b}", "", *cmp.notes, "", cmp.caveat, ""]
    if cmp.paired:
        md += ["## Label transitions (rows: " + cmp.a + ", columns: " + cmp.b + ")", "",
               to_markdown(cmp.transitions.reset_index()), ""]
    md += ["## Per variable", "", to_markdown(summary_frame(cmp)), "",
           "## Held-out gains", "", to_markdown(cmp.gains.round(4)), ""]
    files[f"{stem}.md"] = "\n".join(md)
    files["README.txt"] = COMPARISON_README.format(stem=stem, a=cmp.a, b=cmp.b)
    return write_texts(out, files)


COMPARISON_README = """Comparison of environments written by `encodex compare` ({stem}_*)
==================================================================

A = {a}, B = {b}. Only labelled cells (status "ok") enter; "paired" means matched by unit id.
Percentages and fractions are of the labelled cells of an environment.

{stem}_variables.csv   one row per variable analysed in A or B:
  n_a, n_b (labelled cells), carry_a, carry_b (cells carrying the variable),
  fraction_a, fraction_b (carry / n, 0-1) with ci_low_*, ci_high_* (95% Wilson),
  change_b_minus_a (fraction B - fraction A) with change_ci_low, change_ci_high (Newcombe's
  interval: paired method 10 of Newcombe 1998c, or independent proportions, Newcombe 1998b),
  both, a_only, b_only, neither (paired cells by presence in A and B; empty if unpaired),
  test (McNemar exact / chi-square, or Fisher / chi-square unpaired), statistic, p_value,
  p_adjusted (Benjamini-Hochberg over every test of this comparison), significant
  (rejected by the Benjamini-Hochberg procedure at the comparison's alpha).
{stem}_gains.csv       the test of held-out information (cells.csv bits_per_spike, bits per
  spike) between environments: test (Wilcoxon signed-rank paired, Mann-Whitney U unpaired),
  n_a, n_b, median_a_bits_per_spike, median_b_bits_per_spike,
  median_change_bits_per_spike (paired: median of B - A over the cells; unpaired: median
  of B minus median of A; a cell labelled "none" counts with 0), statistic, p_value,
  p_adjusted, significant.
{stem}_activity.csv    cells labelled in one environment and "too few spikes" in the other:
  unit, active_in, silent_in, label_when_active, n_spikes_active, n_spikes_silent.
{stem}_stability.csv   one row per paired cell and variable carried in both environments:
  unit, variable, correlation (Pearson correlation, -1..1, of the fitted response
  <variable>__log_modulation in A and B over the values both cover; position maps bin by
  bin; empty when a curve is flat or fewer than 3 points overlap).
{stem}_tests.csv       the family of tests: test, p_value, p_adjusted, significant.
{stem}_transitions.csv (paired only) label in A (rows) by label in B (columns), cell counts.
{stem}.md              a readable summary of the above.
"""


def summary_frame(cmp: EnvironmentComparison) -> pd.DataFrame:
    """Human-readable per-variable summary of a comparison."""
    def pct(x):
        return f"{100 * x:.1f}" if np.isfinite(x) else ""

    rows = []
    for r in cmp.variables.to_dict("records"):
        rows.append({
            "Variable": r["variable"],
            f"{cmp.a} % [95% CI]": f"{pct(r['fraction_a'])} [{pct(r['ci_low_a'])}, "
                                   f"{pct(r['ci_high_a'])}] (n={r['n_a']})",
            f"{cmp.b} % [95% CI]": f"{pct(r['fraction_b'])} [{pct(r['ci_low_b'])}, "
                                   f"{pct(r['ci_high_b'])}] (n={r['n_b']})",
            "Change, points [95% CI]": f"{pct(r['change_b_minus_a'])} "
                                       f"[{pct(r['change_ci_low'])}, {pct(r['change_ci_high'])}]",
            "Test": r["test"],
            "p": f"{r['p_value']:.3g}" if np.isfinite(r["p_value"]) else "",
            "p (BH)": f"{r['p_adjusted']:.3g}" if np.isfinite(r["p_adjusted"]) else "",
        })
    return pd.DataFrame(rows)
