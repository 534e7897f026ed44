"""Concurvity measures and the ambiguity flags (encodex.compare.concurvity)."""

import numpy as np
import pytest

from encodex.compare.concurvity import (DEFAULT_THRESHOLD, TermConcurvity, ambiguous_pairs,
                                        concurvity, pairwise_concurvity)
from encodex.design import CircularBasis, IntervalBasis, build_design
from encodex.errors import InputError, SettingsError


@pytest.fixture(scope="module")
def design():
    rng = np.random.default_rng(0)
    n = 4000
    x = rng.uniform(0, 1, n)
    cov = {
        "speed": x,
        "twin": 2.0 * x + 1.0,  # an exact (linear) function of speed
        "near": x + rng.normal(0, 0.02, n),  # almost a function of speed
        "angle": rng.uniform(0, 2 * np.pi, n),  # unrelated
    }
    bases = {
        "speed": IntervalBasis(8, (0.0, 1.0)),
        "twin": IntervalBasis(8, (1.0, 3.0)),
        "near": IntervalBasis(8, (cov["near"].min(), cov["near"].max())),
        "angle": CircularBasis(10),
    }
    return build_design(cov, bases)


def test_identical_spaces_have_concurvity_one_and_unrelated_terms_near_zero(design):
    pw = pairwise_concurvity(design)
    assert pw[("speed", "twin")] == pytest.approx(1.0, abs=1e-8)
    assert pw[("twin", "speed")] == pytest.approx(1.0, abs=1e-8)
    assert pw[("speed", "angle")] < 0.02 and pw[("angle", "speed")] < 0.02
    assert 0.5 < pw[("speed", "near")] < 1.0  # close but not identical
    largest = pairwise_concurvity(design, measure="largest")
    for (a, b), v in largest.items():
        assert v == pytest.approx(largest[(b, a)], abs=1e-9)  # the largest ratio is symmetric
        assert pw[(a, b)] <= v + 1e-12  # the average never exceeds the largest
        assert 0.0 <= pw[(a, b)] <= 1.0


def test_concurvity_of_a_model_and_its_fitted_ratio(design):
    res = concurvity(design, ("speed", "angle"))
    assert set(res) == {"speed", "angle"}
    assert isinstance(res["speed"], TermConcurvity)
    assert res["speed"].others == ("angle",)
    assert np.isnan(res["speed"].fitted)
    assert res["speed"].largest < 0.05
    # a one-term model: only the intercept, to which every term is orthogonal
    single = concurvity(design, ("speed",))
    assert single["speed"].largest == pytest.approx(0.0, abs=1e-10)
    # fitted: the fitted function of speed is exactly reproduced by twin
    sub = design.subset(("speed", "twin"))
    coef = np.random.default_rng(1).normal(size=sub.n_theta)
    obs = concurvity(design, ("speed", "twin"), coef=coef)
    assert obs["speed"].fitted == pytest.approx(1.0, abs=1e-8)
    with pytest.raises(InputError, match="coef has"):
        concurvity(design, ("speed", "twin"), coef=coef[:-1])


def test_ambiguous_pairs_flags_inseparable_variables_only(design):
    flags = ambiguous_pairs(design, ("speed", "angle"))
    assert flags == {"speed": ("near", "twin"), "angle": ()}  # canonical (alphabetical) order
    assert ambiguous_pairs(design, ()) == {}
    strict = ambiguous_pairs(design, ("speed",), threshold=1.0 - 1e-9)
    assert strict == {"speed": ("twin",)}


def test_ambiguous_pairs_from_covariates_drops_unknown_rows_and_uses_kinds():
    rng = np.random.default_rng(2)
    n = 3000
    t = rng.uniform(0, 60, n)
    d = 0.2 * t * (1 + rng.normal(0, 0.01, n))
    bearing = rng.uniform(0, 2 * np.pi, n)
    d[:50] = np.nan
    cov = {"distance": d, "time": t, "goal_bearing": bearing}
    flags = ambiguous_pairs(cov, ("distance",), kinds={"goal_bearing": "circular"})
    assert flags == {"distance": ("time",)}


def test_bad_arguments(design):
    with pytest.raises(SettingsError, match="not in the design"):
        ambiguous_pairs(design, ("heading",))
    with pytest.raises(SettingsError, match="threshold"):
        ambiguous_pairs(design, ("speed",), threshold=1.5)
    with pytest.raises(SettingsError, match="measure"):
        pairwise_concurvity(design, measure="best")
    with pytest.raises(InputError, match="weights"):
        concurvity(design, weights=np.ones(3))
    with pytest.raises(InputError, match="Design or a mapping"):
        ambiguous_pairs([1, 2, 3], ("speed",))
    assert 0.5 < DEFAULT_THRESHOLD < 1.0


def test_unweighted_ratios_are_remembered_per_design_and_weighted_ones_are_not(design):
    import encodex.compare.concurvity as C

    fresh = pairwise_concurvity(design)
    again = pairwise_concurvity(design)                # served from the memo
    assert again == fresh
    gram = C._gram(design, None)
    memo = C._measure_memo(gram)
    assert memo is not None and len(memo) >= len(fresh)
    # The memo holds exactly what a fresh computation gives.
    sl = design.theta_slices
    ia = np.arange(sl["speed"].start, sl["speed"].stop)
    ib = np.concatenate([[0], np.arange(sl["near"].start, sl["near"].stop)]).astype(int)
    assert memo[(ia.tobytes(), ib.tobytes())][:2] == C._measure_now(gram, ia, ib)[:2]
    # Weighted Gram matrices are the caller's (writeable) and never remembered.
    w = np.linspace(0.5, 2.0, design.n_rows)
    weighted = pairwise_concurvity(design, weights=w)
    assert C._measure_memo(C._gram(design, w)) is None
    assert weighted[("speed", "twin")] == pytest.approx(1.0, abs=1e-8)
    assert weighted[("speed", "near")] != fresh[("speed", "near")]
