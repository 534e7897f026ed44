"""The environment comparison's statistics against worked examples computed by hand.

Sources named per check:
- McNemar (1947), Psychometrika 12:153; exact binomial form and continuity correction as in
  Agresti (2013), Categorical Data Analysis, 3rd ed., sec. 11.1.
- Fisher's exact test: Agresti (2013) sec. 3.5 (two-sided p sums tables no more probable than
  the observed one); the 3-1/1-3 table is the tea-tasting layout of Fisher (1935).
- Chi-square with Yates' correction: Yates (1934), J. R. Stat. Soc. Suppl. 1:217.
- Benjamini & Hochberg (1995), J. R. Stat. Soc. B 57:289 (step-up adjusted p-values).
- Wilcoxon (1945), Biometrics Bull. 1:80 (signed-rank exact null distribution).
- Newcombe (1998a) Stat. Med. 17:873 (method 10, independent) and (1998b) Stat. Med.
  17:2635 (method 10, paired): with phi = 0 the paired interval equals the independent one,
  checked against statsmodels' confint_proportions_2indep(method="newcomb").
- Woolf's log odds-ratio interval: Agresti (2013) sec. 3.1.
"""

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.proportion import confint_proportions_2indep

from encodex.report.environments import (
    benjamini_hochberg,
    compare_environments,
    mcnemar_test,
    paired_difference_interval,
    paired_gain_test,
    unpaired_test,
)
from encodex.report.load import load_run
from encodex.report.testing import write_example_run


def test_mcnemar_exact_by_hand():
    # discordant 1 vs 7: p = 2 * P(X <= 1 | Bin(8, 1/2)) = 2 * (1 + 8) / 256 = 0.0703125
    name, stat, p = mcnemar_test(both=5, a_only=1, b_only=7, neither=3)
    assert name == "McNemar exact"
    assert stat == 1
    assert p == pytest.approx(18 / 256, abs=1e-12)


def test_mcnemar_chi2_with_correction_by_hand():
    # 30 vs 12 discordant (>= 25): chi2 = (|30 - 12| - 1)^2 / 42 = 289 / 42
    name, stat, p = mcnemar_test(both=10, a_only=30, b_only=12, neither=40)
    assert name.startswith("McNemar chi2")
    assert stat == pytest.approx(289 / 42, abs=1e-12)
    # chi-square(1) survival = erfc(sqrt(x / 2))
    assert p == pytest.approx(math.erfc(math.sqrt(289 / 42 / 2)), rel=1e-9)


def test_fisher_exact_by_hand():
    # table [[3, 1], [1, 3]]: hypergeometric probabilities of 0..4 in the first cell are
    # 1/70, 16/70, 36/70, 16/70, 1/70; two-sided p = (1 + 16 + 16 + 1) / 70
    name, stat, p = unpaired_test(3, 4, 1, 4)
    assert name == "Fisher exact"
    assert stat == pytest.approx(9.0)
    assert p == pytest.approx(34 / 70, abs=1e-12)


def test_chi2_yates_by_hand():
    # [[30, 20], [10, 40]]: expected [[20, 30], [20, 30]];
    # sum (|O - E| - 0.5)^2 / E = 9.5^2 * (2/20 + 2/30) = 15.0416667
    name, stat, p = unpaired_test(30, 50, 10, 50)
    assert name == "chi2 (Yates)"
    assert stat == pytest.approx(90.25 * (0.1 + 2 / 30), abs=1e-9)
    assert p == pytest.approx(math.erfc(math.sqrt(stat / 2)), rel=1e-9)


def test_benjamini_hochberg_by_hand():
    # sorted 0.005, 0.01, 0.03, 0.04 -> p * 4 / rank = 0.02, 0.02, 0.04, 0.04 (already monotone)
    adj, rej = benjamini_hochberg([0.01, 0.04, 0.03, 0.005, np.nan], alpha=0.03)
    np.testing.assert_allclose(adj[:4], [0.02, 0.04, 0.04, 0.02])
    assert np.isnan(adj[4])  # a test that could not run stays out of the family
    np.testing.assert_array_equal(rej, [True, False, False, True, False])
    # step-up: a larger p can rescue smaller ones. p = 0.02, 0.03, 0.035 (m = 3):
    # raw 0.06, 0.045, 0.035 -> running minimum from the top: 0.035 for all three
    adj2, _ = benjamini_hochberg([0.02, 0.03, 0.035])
    np.testing.assert_allclose(adj2, [0.035, 0.035, 0.035])


def test_wilcoxon_signed_rank_by_hand():
    # differences B - A: 1.5, -0.5, 2.0, 3.0, 2.5; ranks of |d|: 2, 1, 3, 5, 4
    # W- = 1, W+ = 14; exact two-sided p = 2 * #{subsets with rank sum <= 1} / 2^5 = 4 / 32
    a = np.array([1.0, 1.0, 1.0, 1.0, 1.0])
    b = a + np.array([1.5, -0.5, 2.0, 3.0, 2.5])
    res = paired_gain_test(a, b).iloc[0]
    assert res["statistic"] == pytest.approx(1.0)
    assert res["p_value"] == pytest.approx(0.125, abs=1e-12)
    assert res["median_change_bits_per_spike"] == pytest.approx(2.0)


def test_paired_newcombe_reduces_to_independent_when_phi_is_zero():
    # a d = b c (2 * 2 = 4 * 1), so phi = 0 and the interval is Newcombe's independent one
    d, lo, hi = paired_difference_interval(both=2, a_only=4, b_only=1, neither=2)
    assert d == pytest.approx(3 / 9)
    ref_lo, ref_hi = confint_proportions_2indep(6, 9, 3, 9, method="newcomb", compare="diff")
    assert (lo, hi) == pytest.approx((ref_lo, ref_hi), abs=1e-12)


def test_paired_newcombe_uses_the_correlation():
    # Concordant-heavy table: positive phi narrows the interval compared with phi = 0.
    d, lo, hi = paired_difference_interval(both=20, a_only=6, b_only=1, neither=20)
    ind_lo, ind_hi = confint_proportions_2indep(26, 47, 21, 47, method="newcomb",
                                                compare="diff")
    assert d == pytest.approx(5 / 47)
    assert hi - lo < 0.8 * (ind_hi - ind_lo)
    # phi by hand: (20*20 - 6*1 - 47/2) / sqrt(26*21*21*26) = 370.5 / 546 = 0.678571
    l1, u1 = stats.binomtest(26, 47).proportion_ci(method="wilson")
    l2, u2 = stats.binomtest(21, 47).proportion_ci(method="wilson")
    p1, p2, phi = 26 / 47, 21 / 47, 370.5 / 546
    delta = math.sqrt((p1 - l1) ** 2 - 2 * phi * (p1 - l1) * (u2 - p2) + (u2 - p2) ** 2)
    eps = math.sqrt((u1 - p1) ** 2 - 2 * phi * (u1 - p1) * (p2 - l2) + (p2 - l2) ** 2)
    assert (lo, hi) == pytest.approx((d - delta, d + eps), abs=1e-12)
    # swapping the environments mirrors the interval
    d2, lo2, hi2 = paired_difference_interval(both=20, a_only=1, b_only=6, neither=20)
    assert (d2, lo2, hi2) == pytest.approx((-d, -hi, -lo), abs=1e-12)


def test_unpaired_comparison_odds_ratio_woolf_interval(tmp_path):
    # Two environments with no shared unit: the comparison must say it is unpaired.
    labels = {f"a{i}": {"arena_a": "position" if i < 3 else "none"} for i in range(4)}
    labels.update({f"b{i}": {"arena_b": "position" if i < 1 else "none"} for i in range(4)})
    run = load_run(write_example_run(tmp_path / "run", labels=labels))
    cmp = compare_environments(run, "arena_a", "arena_b")
    assert not cmp.paired
    assert "Unpaired" in cmp.notes[0]
    row = cmp.variables.set_index("variable").loc["position"]
    assert row["test"] == "Fisher exact" and row["p_value"] == pytest.approx(34 / 70)
    # B vs A odds ratio = (1 * 1) / (3 * 3) = 1/9; Woolf SE = sqrt(1 + 1/3 + 3... ) by hand:
    # cells (B: 1 carry, 3 not; A: 3 carry, 1 not): se = sqrt(1/1 + 1/3 + 1/3 + 1/1)
    se = math.sqrt(1 + 1 / 3 + 1 / 3 + 1)
    z = 1.959963984540054
    assert row["odds_ratio"] == pytest.approx(1 / 9)
    assert row["odds_ratio_ci_low"] == pytest.approx(math.exp(math.log(1 / 9) - z * se))
    assert row["odds_ratio_ci_high"] == pytest.approx(math.exp(math.log(1 / 9) + z * se))
    assert row["change_b_minus_a"] == pytest.approx(0.25 - 0.75)
