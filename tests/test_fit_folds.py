"""Per-fold Gram pieces and one-step fold refits."""

import numpy as np
import pytest

from encodex.design import CircularBasis, IntervalBasis, build_design
from encodex.fit import fit_poisson, poisson_loglik, refit_folds

DT = 0.02


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(11)
    n = 20_000
    cov = {"heading": rng.uniform(0, 2 * np.pi, n), "speed": rng.uniform(0, 0.5, n)}
    y = rng.poisson(np.exp(np.log(4.0) + 0.7 * np.cos(cov["heading"] - 2) + 2 * cov["speed"]) * DT)
    design = build_design(cov, {"heading": CircularBasis(10), "speed": IntervalBasis(8, (0, 0.5))})
    folds = (np.arange(n) // 1000) % 10
    return design, y, folds


def test_group_gram_pieces_add_up_and_match_direct_products(problem):
    design, y, folds = problem
    w = np.random.default_rng(0).uniform(0.1, 1, design.n_rows)
    pieces = design.weighted_gram(w, folds, 10)
    xz = design.dense() @ design.Z
    for k in (0, 7):
        m = folds == k
        np.testing.assert_allclose(pieces[k], xz[m].T @ (w[m, None] * xz[m]), rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(pieces.sum(axis=0), design.weighted_gram(w), rtol=1e-10, atol=1e-9)


def test_one_step_refits_are_close_to_exact_refits(problem):
    design, y, folds = problem
    full = fit_poisson(design, y, np.log(DT))
    one = refit_folds(design, y, np.log(DT), full, folds, 10)
    exact = refit_folds(design, y, np.log(DT), full, folds, 10, exact=True)
    for k in range(10):
        rows = np.flatnonzero(folds == k)
        l_one = poisson_loglik(y[rows], one[k].predict(design, rows))
        l_exact = poisson_loglik(y[rows], exact[k].predict(design, rows))
        n_spikes = y[rows].sum()
        # Held-out log-likelihoods agree to better than 1e-3 bits per spike.
        assert abs(l_one - l_exact) / n_spikes / np.log(2) < 1e-3
        assert one[k].reason.startswith("one Newton step")
        # The fold's own bins were not used: refits differ from the full fit.
        assert not np.allclose(one[k].theta, full.theta)


def test_one_step_fold_summaries_match_direct_sums(problem):
    # Log-likelihood and deviance of each one-step fit are assembled from per-fold sums;
    # they must equal the sums over the fold's training bins, and the held-out predictions
    # must equal the fit's own predictions.
    from encodex.fit import poisson_deviance

    design, y, folds = problem
    full = fit_poisson(design, y, np.log(DT))
    fits, held = refit_folds(design, y, np.log(DT), full, folds, 10, heldout=True)
    for k in (0, 4, 9):
        train = (folds != k).astype(float)
        mu = fits[k].predict(design)
        assert fits[k].loglik == pytest.approx(poisson_loglik(y, mu, train), rel=1e-10)
        assert fits[k].deviance == pytest.approx(poisson_deviance(y, mu, train), rel=1e-10)
        np.testing.assert_allclose(held[k], mu[folds == k], rtol=1e-12)


def test_one_step_fits_without_covariances_are_the_same_fits(problem):
    # Scoring asks for the fold fits without their covariances: coefficients, likelihoods
    # and held-out predictions must be the very same numbers; only covariance and edf go.
    design, y, folds = problem
    full = fit_poisson(design, y, np.log(DT))
    with_cov, held = refit_folds(design, y, np.log(DT), full, folds, 10, heldout=True)
    without, held_without = refit_folds(design, y, np.log(DT), full, folds, 10, heldout=True,
                                        covariances=False)
    for a, b, ha, hb in zip(with_cov, without, held, held_without):
        assert np.array_equal(a.theta, b.theta) and np.array_equal(ha, hb)
        assert (a.loglik, a.deviance, a.converged) == (b.loglik, b.deviance, b.converged)
        assert a.covariance.shape == (design.n_theta,) * 2 and a.edf
        assert b.covariance is None and b.edf == {}
