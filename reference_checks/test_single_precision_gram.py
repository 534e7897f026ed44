"""Single-precision X'WX (the default of population runs) against float64 throughout.

Sources:
- the exact product, ``X' diag(w) X`` from the dense design in float64 (numpy), and encodex's
  own float64 path (``gram_precision="double"``), which earlier checks hold to statsmodels,
  glum and mgcv;
- the rounding bound of a floating-point inner product of length m,
  ``|fl(x'y) - x'y| <= gamma_m |x|'|y|`` with ``gamma_m = m u / (1 - m u)``
  (Higham 2002, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., SIAM, sec. 3.1;
  quoted from memory). Here each chunk of at most 4,096 rows is a float32 inner product
  (u = 2^-24) and chunks are summed in float64, so the error relative to ``|X|' W |X|`` is
  at most ~4096 u = 2.4e-4, in practice ~sqrt(4096) u = 4e-6 or less; the design's values
  themselves are rounded to float32 (relative 6e-8).
- why the optimum does not move: Newton's method with an inexact Hessian and the exact
  gradient converges to the zero of the exact gradient (inexact Newton; Dembo, Eisenstat &
  Steihaug 1982, SIAM J. Numer. Anal. 19:400), and encodex's stopping rule tests the exact
  gradient.

Checked on a simulated population (encodex.simulate, ground truth known): X'WX to 1e-6
relative (a wrong column or weight gives O(1)), then for every cell the label, p value,
held-out bits per spike, chosen-model coefficients, smoothing parameters and standard errors
against the float64 run.
"""

import numpy as np
import pytest

import encodex
from encodex.design import build_design, default_bases
from encodex.session import build_session
from encodex.simulate import simulate_recording


@pytest.fixture(scope="module")
def session():
    rec, truth = simulate_recording(seed=11, n_cells=8, duration_s=480.0,
                                    environments=("room_a",), dropouts=False)
    return build_session(rec, bin_size=0.02), truth


def test_single_precision_gram_matches_the_dense_product(session):
    s, _ = session
    ses = s.restrict("room_a")
    variables = ses.available_variables("room_a")
    cov = {v: ses.covariates[v] for v in variables}
    bases = default_bases(cov)
    single = build_design(cov, bases, gram_precision="single")
    double = build_design(cov, bases)
    rng = np.random.default_rng(0)
    w = np.exp(rng.normal(-3.0, 1.0, single.n_rows))
    xz = single.dense() @ single.Z
    exact = xz.T @ (w[:, None] * xz)
    scale = np.abs(xz).T @ (w[:, None] * np.abs(xz))
    for design in (single, single.subset(["position", "speed"])):
        got = design.weighted_gram(w)
        cols = np.concatenate([[0], *[np.arange(single.theta_slices[t].start,
                                                single.theta_slices[t].stop)
                                      for t in design.names]])
        ref = exact[np.ix_(cols, cols)] if design is not single else exact
        sc = scale[np.ix_(cols, cols)] if design is not single else scale
        assert np.max(np.abs(got - ref) / sc) < 1e-6
    # The float64 path stays exact to rounding.
    assert np.max(np.abs(double.weighted_gram(w) - exact) / scale) < 1e-12
    # Per-fold pieces too.
    groups = rng.integers(-1, 5, single.n_rows)
    pieces = single.weighted_gram(w, groups, 5)
    for k in range(5):
        m = groups == k
        ref = xz[m].T @ (w[m, None] * xz[m])
        assert np.max(np.abs(pieces[k] - ref) / scale) < 1e-6


def test_population_results_do_not_depend_on_the_gram_precision(session):
    s, truth = session
    runs = {p: encodex.run_population(s, jobs=1, gram_precision=p) for p in ("single", "double")}
    a = runs["single"].cells.set_index("unit")
    b = runs["double"].cells.set_index("unit")
    assert (a["status"] == "ok").sum() >= 6
    assert a["variables"].tolist() == b["variables"].tolist()
    # At least two tuned cells, so that the comparison covers chosen models with terms.
    assert (a["variables"].isin(["", "none"]) == False).sum() >= 2  # noqa: E712
    np.testing.assert_allclose(a["p_value"], b["p_value"], rtol=1e-6, atol=1e-12)
    # Held-out scores move more than the all-bins fits: each fold's model is one Newton step
    # (not iterated) with the rounded Hessian, and the drift-only baseline goes through the
    # same steps. Measured with the drift term on: 7.9e-6 bits per spike per cell, 4.5e-5
    # per fold (a wrong Gram entry would move them by orders of magnitude more).
    np.testing.assert_allclose(a["bits_per_spike"], b["bits_per_spike"], rtol=0, atol=3e-5)
    ma, mb = runs["single"].models, runs["double"].models
    np.testing.assert_allclose(ma["bits_per_spike"], mb["bits_per_spike"], rtol=0, atol=1.5e-4)
    for key in runs["single"].fits:
        fa, fb = runs["single"].fits[key], runs["double"].fits[key]
        scale = np.max(np.abs(fb.theta))
        assert np.max(np.abs(fa.theta - fb.theta)) <= 1e-6 * scale
        np.testing.assert_allclose(np.log(fa.lambdas), np.log(fb.lambdas), atol=1e-5)
        np.testing.assert_allclose(np.sqrt(np.diag(fa.covariance)),
                                   np.sqrt(np.diag(fb.covariance)), rtol=1e-5)
