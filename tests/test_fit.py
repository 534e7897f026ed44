"""The penalised Poisson solver on edge cases: few spikes, empty support, extreme rates."""

import numpy as np
import pytest

from encodex.design import CircularBasis, IntervalBasis, PlanarBasis, build_design
from encodex.errors import InputError, SettingsError
from encodex.fit import fit_poisson

DT = 0.02


def _design(n=6000, seed=0):
    rng = np.random.default_rng(seed)
    cov = {"heading": rng.uniform(0, 2 * np.pi, n), "speed": rng.uniform(0, 0.5, n)}
    bases = {"heading": CircularBasis(10), "speed": IntervalBasis(8, (0, 0.5))}
    return build_design(cov, bases), cov, rng


def test_cell_without_spikes_gives_finite_flat_fit_and_says_why():
    design, _, _ = _design()
    fit = fit_poisson(design, np.zeros(design.n_rows), np.log(DT))
    assert not fit.converged
    assert "no spikes" in fit.reason
    assert np.all(np.isfinite(fit.theta))
    assert np.all(fit.theta[1:] == 0)


@pytest.mark.parametrize("n_spikes", [1, 3, 10])
def test_very_few_spikes_converge_to_finite_coefficients(n_spikes):
    design, _, rng = _design()
    y = np.zeros(design.n_rows)
    y[rng.choice(design.n_rows, n_spikes, replace=False)] = 1
    fit = fit_poisson(design, y, np.log(DT))
    assert fit.converged, fit.reason
    assert np.all(np.isfinite(fit.theta))
    # Total predicted spikes equal the observed (canonical link, unpenalised intercept).
    assert fit.predict(design).sum() == pytest.approx(n_spikes, rel=1e-6)


@pytest.mark.parametrize("rate_hz", [0.01, 100.0])
def test_extreme_rates_recover_the_mean_rate(rate_hz):
    design, _, rng = _design(n=50_000)
    y = rng.poisson(rate_hz * DT, design.n_rows)
    fit = fit_poisson(design, y, np.log(DT))
    assert fit.converged, fit.reason
    assert np.exp(fit.intercept) == pytest.approx(max(y.sum(), 0.5) / (design.n_rows * DT), rel=0.05)
    assert fit.edf["heading"] < 3 and fit.edf["speed"] < 3


def test_barely_visited_corner_stays_finite():
    rng = np.random.default_rng(3)
    n = 8000
    xy = rng.uniform(0, 0.6, (n, 2))
    xy[:5] = rng.uniform(0.9, 1.0, (5, 2))  # the corner is visited five times
    y = rng.poisson(0.05, n)
    y[:5] = 3  # and the cell fires every time it is there
    design = build_design({"position": xy}, {"position": PlanarBasis(8, 8, (0, 1), (0, 1))})
    fit = fit_poisson(design, y, np.log(DT))
    assert np.all(np.isfinite(fit.theta))
    assert fit.converged, fit.reason
    r = fit.response("position", n=20)
    assert np.all(np.isfinite(r.log_modulation)) and np.all(np.isfinite(r.se))
    # The corner has wide uncertainty compared to the visited centre.
    assert r.se[-1, -1] > 3 * r.se[5, 5]


def test_perfectly_separable_heading_is_finite_with_penalty_and_flagged_without():
    rng = np.random.default_rng(4)
    n = 5000
    h = rng.uniform(0, 2 * np.pi, n)
    y = np.where((h > 1.0) & (h < 1.5), rng.poisson(1.0, n), 0)
    design = build_design({"heading": h}, {"heading": CircularBasis(12)})
    fit = fit_poisson(design, y, np.log(DT))
    assert np.all(np.isfinite(fit.theta))
    assert fit.converged, fit.reason
    peak = fit.response("heading").grid[np.argmax(fit.response("heading").log_modulation)]
    assert 1.0 <= peak <= 1.5
    unpenalised = fit_poisson(design, y, np.log(DT), lambdas=np.zeros(1))
    assert np.all(np.isfinite(unpenalised.theta))
    assert not unpenalised.converged
    assert "diverging" in unpenalised.reason


def test_rows_fit_equals_fit_on_the_subset_and_ignores_left_out_bins():
    design, cov, rng = _design()
    y = rng.poisson(np.exp(0.5 * np.cos(cov["heading"])) * 0.1)
    train = np.arange(design.n_rows) % 3 != 0
    lam = np.array([5.0, 50.0])
    fit = fit_poisson(design, y, np.log(DT), lambdas=lam, rows=train)
    y_changed = y.copy()
    y_changed[~train] = 99  # held-out bins must not matter
    fit2 = fit_poisson(design, y_changed, np.log(DT), lambdas=lam, rows=np.flatnonzero(train))
    np.testing.assert_allclose(fit.theta, fit2.theta, rtol=1e-10)


def test_warm_start_from_parent_model_reaches_the_same_optimum():
    design, cov, rng = _design()
    y = rng.poisson(np.exp(0.5 * np.cos(cov["heading"]) + 2 * cov["speed"]) * 0.1)
    parent = fit_poisson(design.subset(["heading"]), y, np.log(DT))
    cold = fit_poisson(design, y, np.log(DT))
    warm = fit_poisson(design, y, np.log(DT), start=parent)
    np.testing.assert_allclose(warm.theta, cold.theta, atol=1e-4)
    assert warm.laml == pytest.approx(cold.laml, abs=1e-4)


def test_warm_start_from_several_fits_reaches_the_same_optimum():
    design, cov, rng = _design(seed=3)
    y = rng.poisson(np.exp(0.5 * np.cos(cov["heading"]) + 2 * cov["speed"]) * 0.1)
    heading = fit_poisson(design.subset(["heading"]), y, np.log(DT))
    speed = fit_poisson(design.subset(["speed"]), y, np.log(DT))
    cold = fit_poisson(design, y, np.log(DT))
    warm = fit_poisson(design, y, np.log(DT), start=(heading, speed))
    np.testing.assert_allclose(warm.theta, cold.theta, atol=1e-4)
    np.testing.assert_allclose(np.log(warm.lambdas), np.log(cold.lambdas), atol=0.05)
    assert warm.laml == pytest.approx(cold.laml, abs=1e-4)
    # Each term's smoothing parameters start from the first fit that holds it.
    from encodex.fit.engine import _warm_lambdas
    start = _warm_lambdas(design, (heading, speed))
    np.testing.assert_array_equal(start, np.concatenate([heading.lambdas, speed.lambdas]))


def test_results_are_complete():
    design, cov, rng = _design()
    y = rng.poisson(np.exp(0.5 * np.cos(cov["heading"])) * 0.1)
    fit = fit_poisson(design, y, np.log(DT))
    assert fit.covariance.shape == (design.n_theta, design.n_theta)
    assert set(fit.edf) == {"heading", "speed"}
    assert 1 < fit.edf_total < design.n_theta
    assert fit.deviance > 0 and fit.loglik < 0
    assert fit.lambdas.shape == (2,)
    assert fit.n_iter >= 1 and fit.n_outer >= 1
    r = fit.response("speed")
    assert np.all(r.lower <= r.upper)


def test_bad_counts_and_settings_raise():
    design, _, _ = _design(n=100)
    with pytest.raises(InputError, match="whole numbers"):
        fit_poisson(design, np.full(100, 0.5))
    with pytest.raises(InputError, match="bins"):
        fit_poisson(design, np.zeros(99))
    with pytest.raises(SettingsError, match="lambdas"):
        fit_poisson(design, np.ones(100), lambdas=[1.0])


def test_smoothness_update_survives_a_singular_hessian():
    # One spike in the fitted bins can leave a direction that no penalty covers with a
    # numerically zero Hessian; the update must still return finite smoothing parameters.
    from encodex.fit.smoothing import PenaltyStructure, fellner_schall_update

    rng = np.random.default_rng(3)
    x = rng.uniform(0, 0.5, 2000)
    design = build_design({"speed": x}, {"speed": IntervalBasis(8, (0, 0.5))})
    gram = np.zeros((design.n_theta, design.n_theta))  # no information from the data at all
    theta = rng.normal(0, 0.1, design.n_theta)
    lam = fellner_schall_update(theta, gram, design, PenaltyStructure.of(design),
                                np.array([1e3]))
    assert np.all(np.isfinite(lam)) and lam.shape == (1,)


def test_line_search_gives_up_quickly_when_the_objective_cannot_resolve_the_step():
    # At the optimum the predicted decrease is below the rounding of f; the line search must
    # report "no step" after a few trials instead of accepting steps that leave f unchanged
    # (which once made the Newton loop run to its iteration limit, 40 halvings per step).
    from encodex.fit.solver import PenalisedPoissonNewton

    design, cov, rng = _design()
    y = rng.poisson(np.exp(np.log(5.0) + 0.5 * np.cos(cov["heading"])) * DT)
    lam = np.array([1.0, 1e9])
    fit = fit_poisson(design, y, np.log(DT), lambdas=lam)
    assert fit.converged and fit.n_iter < 30
    solver = PenalisedPoissonNewton(design, y.astype(float), np.log(DT),
                                    design.penalty_matrix(lam))
    calls = []
    original = solver.objective
    solver.objective = lambda th, eta=None: calls.append(1) or original(th, eta)
    f, mu = original(fit.theta)
    g = solver.gradient(fit.theta, mu)
    d = solver.direction(solver.gram(mu) + solver.S, g)
    t, f_new, _, _ = solver.line_search(fit.theta, f, g, d)
    assert (t == 0.0 and f_new == f) or f_new < f
    assert len(calls) <= 8
