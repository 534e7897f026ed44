"""The sign-flip max-statistic step test against brute-force enumeration and scipy.

Sources named beside each check.
"""

import itertools

import numpy as np
import pytest
from scipy import stats

from encodex.compare.selection import max_signflip_p, paired_p, select_variables


def _clip(x: np.ndarray, c: float = 3.0) -> np.ndarray:
    """Huber-type clip of each column at c times its median absolute value (Huber 1964,
    Ann. Math. Stat. 35:73), written out here independently of encodex."""
    bound = c * np.median(np.abs(x), axis=0)
    return np.minimum(np.maximum(x, -bound), bound)


def _brute_force(d: np.ndarray, statistic: str) -> np.ndarray:
    """Westfall & Young (1993, Resampling-Based Multiple Testing, Wiley, sec. 2.6) single-step
    max-statistic adjusted p-values, by looping over every sign vector; the t statistic of
    each candidate from scipy.stats.ttest_1samp and the mean from numpy (implementations
    independent of encodex)."""
    def stat(x):
        if statistic == "t":
            return stats.ttest_1samp(x, 0.0, axis=0).statistic
        return np.mean(_clip(x) if statistic == "clipped" else x, axis=0)

    k, m = d.shape
    obs = stat(d)
    counts = np.zeros(m)
    total = 0
    for signs in itertools.product((1.0, -1.0), repeat=k):
        t = stat(d * np.array(signs)[:, None])
        counts += t.max() >= obs - 1e-9 * np.maximum(1, np.abs(obs))
        total += 1
    return counts / total


@pytest.mark.parametrize("statistic", ["clipped", "mean", "t"])
@pytest.mark.parametrize("k,m,seed", [(5, 1, 0), (6, 3, 1), (8, 4, 2), (9, 5, 3)])
def test_max_statistic_p_equals_brute_force(k, m, seed, statistic):
    rng = np.random.default_rng(seed)
    # Correlated candidates (a shared fold effect) with one carrying a real improvement.
    common = rng.normal(size=(k, 1))
    d = 0.6 * common + rng.normal(size=(k, m)) * rng.uniform(0.5, 2.0, m)
    d[:, 0] += 0.8
    d[1, -1] = -25.0  # one wild fold, which the clipped statistic bounds
    got = max_signflip_p(d, statistic)
    want = _brute_force(d, statistic)
    np.testing.assert_array_equal(got * 2**k, np.round(want * 2**k))
    assert np.all(got >= 2.0**-k)


@pytest.mark.parametrize("seed", [5, 6])
def test_spike_weighted_statistic_equals_brute_force(seed):
    # Fold weights (spikes held out per fold) scale each fold's clipped differences by
    # w / mean(w): brute force over every sign vector of the mean of the clipped, weighted
    # differences.
    rng = np.random.default_rng(seed)
    d = rng.normal(0.2, 1.0, size=(9, 4))
    d[2, 1] = 12.0
    w = rng.integers(1, 30, size=9).astype(float)
    got = max_signflip_p(d, "clipped", weights=w)
    want = _brute_force(_clip(d) * (w / w.mean())[:, None], "mean")
    np.testing.assert_array_equal(got * 2**9, np.round(want * 2**9))
    # Equal weights change nothing.
    np.testing.assert_array_equal(max_signflip_p(d, "clipped", weights=np.full(9, 7.0)),
                                  max_signflip_p(d, "clipped"))


def test_single_candidate_matches_scipy_permutation_test():
    # Source: scipy.stats.permutation_test, one sample with permutation_type="samples", which
    # flips the signs of the observations (exact when n_resamples >= 2**k).
    rng = np.random.default_rng(7)
    for _ in range(5):
        d = rng.normal(0.3, 1.0, 10)
        d[3] = 9.0  # a wild fold: clipped by the default statistic, not by the plain mean
        ref = stats.permutation_test((d,), np.mean, permutation_type="samples",
                                     alternative="greater", n_resamples=np.inf).pvalue
        assert paired_p(d, np.zeros(10), "signflip-t") == pytest.approx(ref, rel=1e-12)
        ref = stats.permutation_test((d,), lambda x, axis: np.mean(_clip(x.T).T, axis=axis),
                                     permutation_type="samples", alternative="greater",
                                     n_resamples=np.inf).pvalue
        assert paired_p(d, np.zeros(10)) == pytest.approx(ref, rel=1e-12)


def test_worked_example_by_hand():
    # All ten folds improve: only the observed sign vector reaches the statistic, p = 2^-10
    # (common practice, no source: the smallest p of an exact sign-flip test is 2^-k).
    d = np.linspace(0.01, 0.1, 10)
    assert paired_p(d, np.zeros(10)) == pytest.approx(2.0**-10)
    # Eight folds +1 and two -1 (equal sizes): the sign vectors with a mean at least as large
    # are those with at most two minus signs, 1 + 10 + 45 = 56 of 1024 (counted by hand).
    d = np.array([1.0] * 8 + [-1.0] * 2)
    assert paired_p(d, np.zeros(10)) == pytest.approx(56 / 1024)


@pytest.mark.parametrize("statistic", ["clipped", "mean", "t"])
def test_max_statistic_keeps_the_false_label_rate_on_symmetric_nulls(statistic):
    # Ground-truth simulation: 4000 steps with five correlated candidates and no improvement;
    # the best candidate is accepted at most at rate alpha (binomial 99.9% bound above 0.05).
    rng = np.random.default_rng(11)
    hits = 0
    n = 4000
    for _ in range(n):
        d = 0.8 * rng.normal(size=(10, 1)) + rng.normal(size=(10, 5)) * [1, 2, 0.5, 1, 3]
        hits += max_signflip_p(d, statistic)[int(np.argmax(d.mean(axis=0)))] <= 0.05
    assert hits / n <= 0.05 + 3.1 * np.sqrt(0.05 * 0.95 / n)
    # ... and is not trivially conservative (a test that never rejects would fail here).
    assert hits / n >= 0.03


def test_signflip_adds_a_variable_that_bonferroni_refuses():
    # The example of tests/test_compare_logic.py: raw Wilcoxon p = 0.0186 refused at 0.05/5;
    # four other candidates that share its fold pattern (they see the same folds) but are
    # worse. With the max-statistic the step is tested at 0.05 against the joint null of the
    # five, and their correlation costs little (adjusted p 0.029 against 0.0195 alone).
    d = np.array([0.05, 0.06, 0.07, 0.08, 0.09, 0.10, 0.11, 0.12, -0.065, -0.066])
    rng = np.random.default_rng(3)
    table = {(): np.zeros(10), ("position",): d}
    for v in ("heading", "speed", "distance", "time"):
        table[(v,)] = d * 0.5 + rng.normal(0, 0.005, 10) - 0.03
    score = lambda m: table.get(m, np.full(10, -0.05) + rng.normal(0, 0.001, 10))  # noqa: E731
    vars_ = ("position", "heading", "speed", "distance", "time")
    assert select_variables(vars_, score, correction="bonferroni").chosen == ()
    sel = select_variables(vars_, score, correction="signflip")
    assert sel.chosen == ("position",)
    assert sel.steps[0].level == 0.05 and sel.steps[0].p_value <= 0.05
