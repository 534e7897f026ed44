"""Held-out scores and the signed-rank decision against outside references.

Sources named beside each check.
"""

import itertools

import numpy as np
import pytest

from encodex.compare.scores import heldout_score, poisson_deviance, poisson_loglik
from encodex.compare.selection import improvement_p


def test_mcfadden_and_deviance_explained_match_statsmodels():
    # Source: statsmodels GLM(Poisson) results: llf, llnull, pseudo_rsquared(kind="mcf"),
    # deviance and null_deviance (statsmodels.genmod.generalized_linear_model.GLMResults).
    import statsmodels.api as sm

    rng = np.random.default_rng(1)
    n = 3000
    x = rng.normal(size=n)
    y = rng.poisson(np.exp(-0.5 + 0.7 * x))
    res = sm.GLM(y, sm.add_constant(x), family=sm.families.Poisson()).fit()
    mu = res.fittedvalues
    mu0 = np.full(n, y.mean())  # the intercept-only model's fit is the mean count
    s = heldout_score(y, mu, mu0)
    assert s.loglik == pytest.approx(res.llf, rel=1e-10)
    assert s.loglik_mean == pytest.approx(res.llnull, rel=1e-10)
    assert s.pseudo_r2 == pytest.approx(res.pseudo_rsquared(kind="mcf"), rel=1e-8)
    assert s.deviance_explained == pytest.approx(1 - res.deviance / res.null_deviance, rel=1e-8)
    assert poisson_deviance(y, mu) == pytest.approx(res.deviance, rel=1e-10)
    # bits per spike: (llf - llnull) / (n_spikes ln 2), the definition of the score
    # (common practice, no source beyond the definition; e.g. Hardcastle et al. 2017).
    assert s.bits_per_spike == pytest.approx((res.llf - res.llnull) / (y.sum() * np.log(2)),
                                             rel=1e-10)


def test_loglik_matches_scipy_poisson_logpmf():
    # Source: scipy.stats.poisson.logpmf
    from scipy.stats import poisson

    rng = np.random.default_rng(2)
    mu = rng.uniform(0.01, 5, 500)
    y = rng.poisson(mu)
    assert poisson_loglik(y, mu) == pytest.approx(poisson.logpmf(y, mu).sum(), rel=1e-12)


def _exact_signed_rank_p(d):
    """Independent path: enumerate all 2^n sign patterns of the ranks (Wilcoxon 1945,
    Biometrics Bulletin 1:80, exact null distribution of W+ without ties)."""
    d = np.asarray(d, float)
    ranks = np.argsort(np.argsort(np.abs(d))) + 1
    w_obs = ranks[d > 0].sum()
    n = len(d)
    count = 0
    for signs in itertools.product((0, 1), repeat=n):
        if np.dot(signs, ranks) >= w_obs:
            count += 1
    return count / 2**n


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_one_sided_signed_rank_equals_exact_enumeration(seed):
    rng = np.random.default_rng(seed)
    d = rng.normal(0.2 * seed, 1.0, 10)
    assert improvement_p(d, np.zeros(10)) == pytest.approx(_exact_signed_rank_p(d), rel=1e-12)


def test_all_folds_improving_gives_two_to_minus_k():
    # Hand-worked: W+ at its maximum is reached by one pattern of 2^k (common practice).
    for k in (5, 8, 10):
        d = np.arange(1, k + 1) * 0.01
        assert improvement_p(d, np.zeros(k)) == pytest.approx(2.0**-k)
