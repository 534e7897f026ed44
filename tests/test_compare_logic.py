"""Folds, held-out scores and the selection rule (no model fitting involved)."""

import numpy as np
import pytest

from encodex.compare.folds import chunked_folds
from encodex.compare.scores import heldout_score, mean_rate_counts, poisson_loglik
from encodex.compare.selection import MIN_STEP_GAIN, improvement_p, select_variables
from encodex.errors import SettingsError


def test_folds_are_contiguous_chunks_balanced_and_seeded():
    f = chunked_folds(1000, k=10, chunks_per_fold=3, rng=7)
    assert f.fold.shape == (1000,)
    sizes = np.bincount(f.fold, minlength=10)
    assert sizes.min() >= 99 and sizes.max() <= 101
    # 30 chunks -> at most 29 changes of fold along time.
    changes = np.count_nonzero(np.diff(f.fold))
    assert changes <= 29 and changes >= 10
    # Same seed, same folds; other seed, other folds.
    assert np.array_equal(f.fold, chunked_folds(1000, 10, 3, rng=7).fold)
    assert not np.array_equal(f.fold, chunked_folds(1000, 10, 3, rng=8).fold)
    splits = f.splits()
    assert len(splits) == 10
    for i, (tr, te) in enumerate(splits):
        assert np.array_equal(te, f.test_rows(i))
        assert np.array_equal(tr, f.train_rows(i))
        assert len(tr) + len(te) == 1000


def test_folds_reject_bad_settings():
    with pytest.raises(SettingsError, match="folds"):
        chunked_folds(100, k=1)
    with pytest.raises(SettingsError, match="usable bins"):
        chunked_folds(20, k=10, chunks_per_fold=3)


def test_scores_of_true_and_mean_models():
    rng = np.random.default_rng(0)
    rate = np.where(np.arange(4000) % 400 < 200, 0.5, 0.02)
    y = rng.poisson(rate)
    off = np.zeros_like(rate)
    mu0 = mean_rate_counts(y, off, off)
    assert np.allclose(mu0, y.mean())
    s_true = heldout_score(y, rate, mu0)
    s_mean = heldout_score(y, mu0, mu0)
    assert s_mean.bits_per_spike == 0.0 and s_mean.deviance_explained == 0.0
    assert s_true.bits_per_spike > 0.5
    assert 0 < s_true.pseudo_r2 < 1 and 0 < s_true.deviance_explained < 1
    # bits/spike by hand: (LL - LL0) / (n ln 2)
    manual = (np.sum(y * np.log(rate) - rate) - np.sum(y * np.log(mu0) - mu0)) / (
        y.sum() * np.log(2)
    )
    assert s_true.bits_per_spike == pytest.approx(manual, rel=1e-12)


def test_loglik_matches_scipy_poisson():
    # Source: scipy.stats.poisson.logpmf
    from scipy.stats import poisson

    y = np.array([0, 1, 3, 7])
    mu = np.array([0.2, 1.5, 2.0, 6.0])
    assert poisson_loglik(y, mu) == pytest.approx(poisson.logpmf(y, mu).sum(), rel=1e-12)


def test_heldout_score_equals_its_definitions_to_the_bit():
    # heldout_score shares the logs of the counts between the model's and the mean-rate
    # model's sums; each number must still be exactly that of the separate functions.
    # Deviance checked against scipy.special.xlogy's textbook form (Cameron & Windmeijer 1996).
    from scipy.special import xlogy

    from encodex.compare.scores import poisson_deviance

    rng = np.random.default_rng(4)
    y = rng.poisson(0.3, 5000)
    mu = rng.uniform(0.05, 1.0, 5000)
    mu0 = np.full(5000, y.mean())
    s = heldout_score(y, mu, mu0)
    assert s.loglik == poisson_loglik(y, mu) and s.loglik_mean == poisson_loglik(y, mu0)
    assert s.deviance_explained == 1.0 - poisson_deviance(y, mu) / poisson_deviance(y, mu0)
    textbook = 2.0 * np.sum(xlogy(y, y / mu) - (y - mu))
    assert poisson_deviance(y, mu) == pytest.approx(textbook, rel=1e-12)
    assert s.bits_per_spike == pytest.approx(
        (poisson_loglik(y, mu) - poisson_loglik(y, mu0)) / (y.sum() * np.log(2)), rel=1e-15)


def test_improvement_p_one_sided():
    better = np.array([0.1, 0.2, 0.15, 0.3, 0.05, 0.12, 0.2, 0.1, 0.25, 0.3])
    zero = np.zeros(10)
    assert improvement_p(better, zero) == pytest.approx(2.0**-10)
    assert improvement_p(zero, better) == pytest.approx(1.0)
    assert improvement_p(zero, zero) == 1.0


def _scorer(table):
    calls = []

    def score(model):
        calls.append(model)
        return np.asarray(table.get(model, np.full(10, -0.01)))

    return score, calls


def _up(x):
    # Positive per-fold improvements with distinct values (all folds agree).
    return x + np.linspace(0.001, 0.01, 10)


def test_forward_selection_picks_two_variables_and_stops():
    z = np.zeros(10)
    table = {
        (): z,
        ("position",): _up(0.30 + z),
        ("speed",): _up(0.05 + z),
        ("heading",): _up(0.01 + z),
        ("position", "speed"): _up(0.36 + z),
        ("position", "heading"): _up(0.30 + z) - 0.0005,
        ("position", "heading", "speed"): _up(0.36 + z) - 0.001,
    }
    score, calls = _scorer(table)
    sel = select_variables(["speed", "heading", "position"], score, alpha=0.05)
    assert sel.chosen == ("position", "speed")
    assert sel.label == "position+speed"
    assert [s.accepted for s in sel.steps] == [True, True, False]
    assert sel.steps[0].best == ("position",)
    assert sel.gains["speed"] == pytest.approx(0.06, abs=1e-9)
    assert sel.gains["heading"] < 0
    # no model scored twice
    assert len(calls) == len(set(calls))
    assert sel.p_value == pytest.approx(2.0**-10)


def test_selection_none_when_nothing_beats_mean_rate():
    rng = np.random.default_rng(3)
    table = {(): np.zeros(10)}
    for v in ("position", "heading"):
        table[(v,)] = rng.normal(-0.001, 0.002, 10)
    score, _ = _scorer(table)
    sel = select_variables(["position", "heading"], score)
    assert sel.chosen == () and sel.label == "none"
    assert sel.p_value >= 0.05
    assert sel.ambiguous_with == ()


def test_exhaustive_scores_lattice_and_agrees_with_forward():
    rng = np.random.default_rng(5)
    vars_ = ("position", "heading", "speed")
    table = {(): np.zeros(10)}
    import itertools

    for r in (1, 2, 3):
        for sub in itertools.combinations(vars_, r):
            base = 0.2 * ("position" in sub) + 0.05 * ("speed" in sub) - 0.01 * len(sub)
            table[sub] = base + rng.normal(0, 0.005, 10)
    s1, c1 = _scorer(table)
    s2, c2 = _scorer(table)
    fwd = select_variables(vars_, s1)
    exh = select_variables(vars_, s2, exhaustive=True)
    assert fwd.chosen == exh.chosen == ("position", "speed")
    assert len(c2) == 8 and len(c1) < 8
    assert set(exh.scores) == set(table)


def test_ambiguous_when_two_candidates_tie():
    z = np.zeros(10)
    table = {
        (): z,
        ("distance",): _up(0.2 + z),
        ("time",): _up(0.2 + z) - 0.0001 * np.array([1, -1] * 5),
        ("distance", "time"): _up(0.2 + z) - 0.002,
    }
    score, _ = _scorer(table)
    sel = select_variables(["distance", "time"], score)
    assert len(sel.chosen) == 1
    other = "time" if sel.chosen == ("distance",) else "distance"
    assert sel.ambiguous_with == (other,)


def test_bad_alpha():
    with pytest.raises(SettingsError, match="alpha"):
        select_variables(["position"], lambda m: np.zeros(5), alpha=1.5)


def test_bonferroni_over_the_candidates_of_a_step():
    # Two negative folds of middling rank: exact one-sided p = 19/1024 = 0.0186, significant
    # at 0.05 but not at 0.05 / 5 = 0.01.
    d = np.array([0.05, 0.06, 0.07, 0.08, 0.09, 0.10, 0.11, 0.12, -0.065, -0.066])
    p = improvement_p(d, np.zeros(10))
    assert 0.01 < p < 0.05
    vars_ = ("position", "heading", "speed", "distance", "time")
    table = {(): np.zeros(10), ("position",): d}
    for v in vars_[1:]:
        table[(v,)] = np.full(10, -0.01)
    s_none, _ = _scorer(table)
    s_bonf, _ = _scorer(table)
    assert select_variables(vars_, s_none, correction="none").chosen[:1] == ("position",)
    sel = select_variables(vars_, s_bonf, correction="bonferroni")  # alpha / 5 per step
    assert sel.chosen == () and sel.p_value == pytest.approx(p)
    with pytest.raises(SettingsError, match="correction"):
        select_variables(vars_, s_bonf, correction="holm")


def test_signflip_equal_differences_reach_the_floor_not_zero():
    # Equal positive differences in every fold give an infinite studentised statistic; the
    # identity sign vector reaches it, so p is the floor 2^-k, never 0.
    from encodex.compare.selection import max_signflip_p

    k = 10
    p = max_signflip_p(np.c_[np.full(k, 0.01), np.linspace(-1.0, 1.0, k)], "t")
    assert p[0] == pytest.approx(2.0 ** -k)
    assert 0.5 < p[1] <= 1.0
    # With the mean as statistic equal differences reach the floor too (ties count).
    assert max_signflip_p(np.full((k, 1), 0.01))[0] == pytest.approx(2.0 ** -k)


def test_signflip_mean_statistic_weighs_candidates_by_their_spread():
    # A spread-out real improvement beside four tight null candidates: the mean statistic's
    # maximum under flips is carried by the real candidate, so it pays little for the other
    # four; the studentised statistic puts all five on one footing and pays for each.
    from encodex.compare.selection import max_signflip_p

    rng = np.random.default_rng(4)
    d = np.c_[0.8 + rng.normal(0.0, 1.0, 12), rng.normal(0.0, 0.05, (12, 4))]
    p_clip, p_mean, p_t = (max_signflip_p(d, s)[0] for s in ("clipped", "mean", "t"))
    alone = max_signflip_p(d[:, :1], "mean")[0]
    assert p_mean < p_t and p_clip < p_t
    assert p_mean <= 1.2 * alone
    # One wild fold in a null candidate (a refit that lost the only visits to a corner):
    # on the plain mean it dominates the maximum under flips and the real candidate is lost;
    # the clipped statistic bounds its pull.
    d[5, 3] = -40.0
    assert max_signflip_p(d, "mean")[0] > 0.2
    assert max_signflip_p(d)[0] <= 0.05
    with pytest.raises(SettingsError):
        max_signflip_p(d, "median")


def test_effect_size_floor_refuses_a_significant_but_tiny_later_step():
    z = np.zeros(10)
    # speed improves on position in every fold (p = 2^-10) but by 0.3% of position's score.
    tiny = _up(0.30 + z) + 0.0009 + np.linspace(0, 1e-4, 10)
    table = {(): z, ("position",): _up(0.30 + z), ("speed",): _up(0.01 + z),
             ("position", "speed"): tiny}
    score, _ = _scorer(table)
    sel = select_variables(["position", "speed"], score, alpha=0.05)
    assert sel.chosen == ("position",)
    last = sel.steps[-1]
    assert last.p_value == pytest.approx(2.0**-10) and not last.accepted
    mean_pos = float(np.mean(table[("position",)]))
    assert last.min_gain == pytest.approx(MIN_STEP_GAIN * mean_pos)
    assert last.mean_improvement < last.min_gain
    # The first step has no floor; with the floor off the tiny step is taken.
    assert sel.steps[0].min_gain == 0.0
    assert select_variables(["position", "speed"], score, alpha=0.05,
                            min_step_gain=0.0).chosen == ("position", "speed")
    with pytest.raises(SettingsError):
        select_variables(["position"], score, min_step_gain=1.0)


def test_fold_weights_reach_the_signflip_test_only():
    # Two folds hold most of the spikes and carry the improvement; weighted by spikes the
    # step passes, unweighted (every fold's ratio counted alike) it does not.
    from encodex.compare.selection import max_signflip_p

    k = 12
    d = np.array([0.30, 0.28, -0.05, 0.04, -0.06, 0.03, -0.04, 0.05, -0.03, 0.02, -0.02, 0.01])
    w = np.array([40, 38, 3, 3, 3, 3, 3, 3, 3, 3, 3, 3], dtype=float)
    table = {(): np.zeros(k), ("speed",): d, ("heading",): -0.01 * np.ones(k)}
    score = lambda m: table.get(m, np.full(k, -0.05))  # noqa: E731
    vars_ = ("heading", "speed")
    weighted = select_variables(vars_, score, fold_weights=w)
    plain = select_variables(vars_, score)
    assert weighted.steps[0].p_value < plain.steps[0].p_value
    assert weighted.steps[0].p_value == pytest.approx(
        max_signflip_p(np.c_[-0.01 * np.ones(k), d], weights=w)[1])
    # The studentised and Wilcoxon rules ignore the weights.
    for corr in ("signflip-t", "bonferroni", "none"):
        assert (select_variables(vars_, score, correction=corr, fold_weights=w).steps[0].p_value
                == select_variables(vars_, score, correction=corr).steps[0].p_value)
    with pytest.raises(SettingsError):
        max_signflip_p(np.c_[d], weights=np.ones(3))
