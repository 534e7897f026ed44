"""Bases, penalties and the constrained design."""

import numpy as np
import pytest

from encodex.design import (CircularBasis, IntervalBasis, PlanarBasis, build_design,
                            default_bases)
from encodex.design.bsplines import difference_matrix, quantile_breaks
from encodex.errors import InputError, SettingsError


def test_interval_basis_clips_and_counts_out_of_range_values():
    basis = IntervalBasis(6, (0.0, 1.0))
    block = basis.evaluate(np.array([-0.5, 0.0, 0.5, 1.0, 1.2, 3.0]))
    assert block.n_clipped == 3
    dense = block.toarray()
    # Clipped values take the value at the nearest end.
    np.testing.assert_allclose(dense[0], dense[1])
    np.testing.assert_allclose(dense[4], dense[3])
    np.testing.assert_allclose(dense.sum(axis=1), 1.0)


def test_quantile_breaks_follow_the_values_and_never_tie():
    rng = np.random.default_rng(3)
    d = np.concatenate([np.zeros(4000), rng.exponential(2.0, 6000)])  # many ties at 0
    b = quantile_breaks(d, 7)
    assert b.size == 8 and b[0] == 0.0 and b[-1] == d.max()
    even = d.max() / 7
    assert np.all(np.diff(b) >= 0.1 * even * (1 - 1e-12))  # the even share keeps gaps open
    # the breaks are the blend of the quantiles with even spacing
    q = np.quantile(d, np.linspace(0, 1, 8))
    np.testing.assert_allclose(b, 0.9 * q + 0.1 * np.linspace(0, d.max(), 8))
    with pytest.raises(ValueError, match="distinct"):
        quantile_breaks(np.ones(10), 3)


def test_default_bases_put_trial_clock_knots_at_quantiles():
    rng = np.random.default_rng(4)
    cov = {"distance": rng.exponential(2.0, 5000), "time": rng.exponential(15.0, 5000),
           "speed": rng.gamma(2.0, 0.1, 5000)}
    bases = default_bases(cov)
    for v in ("distance", "time"):
        breaks = np.asarray(bases[v].breaks)
        assert breaks.size == bases[v].n_basis - 2
        np.testing.assert_array_equal(breaks, quantile_breaks(cov[v], bases[v].n_basis - 3))
        block = bases[v].evaluate(cov[v]).toarray()
        np.testing.assert_allclose(block.sum(axis=1), 1.0, atol=1e-12)
        assert bases[v].describe()["breaks"] == list(bases[v].breaks)
    assert bases["speed"].breaks == ()
    assert all(b.breaks == () for b in default_bases(cov, knots="even").values())
    with pytest.raises(SettingsError, match="knots must be one of"):
        default_bases(cov, knots="uneven")
    with pytest.raises(SettingsError, match="breaks must be"):
        IntervalBasis(5, (0.0, 1.0), breaks=(0.0, 0.6, 0.5))


def test_block_has_fixed_non_zeros_per_row():
    xy = np.random.default_rng(0).uniform(0, 1, (50, 2))
    block = PlanarBasis(10, 10, (0, 1), (0, 1)).evaluate(xy)
    assert block.values.shape == (50, 16)
    assert block.tocsr().nnz == 50 * 16
    # Distinct columns within each row.
    assert all(len(set(row)) == 16 for row in block.columns)


def test_circular_penalty_wraps_around():
    d = difference_matrix(6, 2, circular=True)
    # Row 5 links coefficients 5, 0 and 1.
    np.testing.assert_allclose(d[5], [-2, 1, 0, 0, 0, 1])
    s = CircularBasis(6).penalties()[0]
    # A constant has no roughness; a linear ramp does once wrapped.
    assert np.allclose(s @ np.ones(6), 0)
    ramp = np.arange(6.0)
    assert ramp @ s @ ramp > 1


def test_planar_penalties_act_along_each_axis():
    basis = PlanarBasis(5, 4, (0, 1), (0, 1))
    px, py = basis.penalties()
    ix, iy = np.meshgrid(np.arange(5), np.arange(4), indexing="ij")
    wiggly_in_x = ((-1.0) ** ix).ravel()  # varies along x only
    assert wiggly_in_x @ py @ wiggly_in_x == pytest.approx(0)
    assert wiggly_in_x @ px @ wiggly_in_x > 1


def test_terms_sum_to_zero_over_the_data():
    rng = np.random.default_rng(1)
    cov = {"position": rng.uniform(0, 1, (500, 2)), "heading": rng.uniform(0, 6, 500),
           "speed": rng.gamma(2, 0.1, 500)}
    design = build_design(cov, default_bases(cov))
    x = design.dense()
    for t in design.terms:
        sl = design.beta_slices[t.name]
        # Every constrained direction has zero column sum: 1' X_j Z_j = 0.
        np.testing.assert_allclose(x[:, sl].sum(axis=0) @ t.Z, 0, atol=1e-9)
    assert design.names == ("position", "heading", "speed")
    sub = design.subset(["speed", "position"])
    assert sub.names == ("position", "speed")
    assert sub.n_theta == 1 + 99 + 7


def test_bad_covariates_raise_clear_errors():
    with pytest.raises(InputError, match="NaN"):
        IntervalBasis(5, (0, 1)).evaluate([0.1, np.nan])
    with pytest.raises(InputError, match="constant"):
        default_bases({"speed": np.full(10, 0.2)})
    with pytest.raises(SettingsError, match="n_basis"):
        IntervalBasis(3, (0, 1))
    with pytest.raises(SettingsError, match="range"):
        IntervalBasis(6, (1, 1))
    with pytest.raises(InputError, match="shape"):
        PlanarBasis().evaluate(np.zeros((4, 3)))
    with pytest.raises(InputError, match="rows"):
        build_design({"speed": np.linspace(0, 1, 10), "time": np.linspace(0, 1, 11)},
                     {"speed": IntervalBasis(5, (0, 1)), "time": IntervalBasis(5, (0, 1))})


@pytest.mark.parametrize("names", [("speed",), ("position",), ("heading", "speed"),
                                   ("position", "speed", "heading")])
def test_sub_designs_share_the_base_plan_and_match_dense_products(names):
    rng = np.random.default_rng(5)
    n = 3000
    cov = {"position": rng.uniform(0, 1, (n, 2)), "heading": rng.uniform(0, 6, n),
           "speed": rng.gamma(2, 0.1, n)}
    design = build_design(cov, default_bases(cov))
    sub = design.subset(names)
    assert sub._base is design and design.subset(names) is sub
    xz = sub.dense() @ sub.Z
    w = rng.uniform(0.1, 2.0, n)
    groups = rng.integers(-1, 4, n)  # -1: rows in no group
    theta = rng.normal(0, 0.3, (3, sub.n_theta))
    r = rng.normal(size=n)
    np.testing.assert_allclose(sub.weighted_gram(w), xz.T @ (w[:, None] * xz), rtol=1e-10,
                               atol=1e-9)
    pieces = sub.weighted_gram(w, groups, 4)
    for k in range(4):
        m = groups == k
        np.testing.assert_allclose(pieces[k], xz[m].T @ (w[m, None] * xz[m]), rtol=1e-10,
                                   atol=1e-9)
    np.testing.assert_allclose(sub.linear_predictor(theta[0]), xz @ theta[0], atol=1e-12)
    rows = np.array([5, 17, 2999])
    np.testing.assert_allclose(sub.linear_predictor(theta[1], rows), (xz @ theta[1])[rows],
                               atol=1e-12)
    np.testing.assert_allclose(sub.linear_predictors(theta), xz @ theta.T, atol=1e-12)
    np.testing.assert_allclose(sub.transpose_dot(r), xz.T @ r, atol=1e-10)
    # Row quadratic forms x_i' Z M Z' x_i with a symmetric M (not positive: any sign).
    m = rng.normal(size=(sub.n_theta, sub.n_theta))
    m = m + m.T
    np.testing.assert_allclose(sub.row_quadratic_forms(m), np.einsum("ij,jk,ik->i", xz, m, xz),
                               rtol=1e-10, atol=1e-10)
    by_group = sub.transpose_dot_groups(r, groups, 4)
    for k in range(4):
        np.testing.assert_allclose(by_group[k], xz[groups == k].T @ r[groups == k], atol=1e-10)
    # Left-out rows (negative group) and an empty group (5 of 6).
    g2 = np.where(groups == 1, -1, groups)
    by_group = sub.transpose_dot_groups(r, g2, 6)
    for k in range(6):
        np.testing.assert_allclose(by_group[k], xz[g2 == k].T @ r[g2 == k], atol=1e-10)


@pytest.mark.parametrize("names", [("speed",), ("position", "speed", "heading")])
def test_linear_predictors_in_single_precision_stay_within_float32_rounding(names):
    # Several vectors at once run over the Gram plan's compact rows in the plan's arithmetic;
    # in float32 the error is rounding of sum_j |x_ij beta_j| (relative ~1e-7), far below
    # anything a Newton step or a derivative needs, and nowhere near a wrong column (O(1)).
    rng = np.random.default_rng(8)
    n = 5000
    cov = {"position": rng.uniform(0, 1, (n, 2)), "heading": rng.uniform(0, 6, n),
           "speed": rng.gamma(2, 0.1, n)}
    sub = build_design(cov, default_bases(cov), gram_precision="single").subset(names)
    xz = sub.dense() @ sub.Z
    theta = rng.normal(0, 0.3, (20, sub.n_theta))
    exact = xz @ theta.T
    scale = np.abs(xz) @ np.abs(theta.T)
    got = sub.linear_predictors(theta)
    assert got.shape == (n, 20) and got.dtype == np.float64
    assert np.max(np.abs(got - exact) / scale) < 1e-6


@pytest.mark.parametrize("batch, chunk", [(200, 64), (50, 64), (5000, 128)])
def test_weighted_gram_batches_and_chunks_give_the_dense_product(monkeypatch, batch, chunk):
    # Short runs are weighted in batches, long ones chunk by chunk; with small sizes both
    # paths (and runs spanning several chunks inside a batch) are taken on a small design.
    import encodex.design.design as design_module

    monkeypatch.setattr(design_module, "GRAM_BATCH_ROWS", batch)
    monkeypatch.setattr(design_module, "GRAM_CHUNK_ROWS", chunk)
    rng = np.random.default_rng(8)
    n = 2500
    cov = {"position": rng.uniform(0, 1, (n, 2)), "speed": rng.gamma(2, 0.1, n)}
    design = build_design(cov, default_bases(cov))
    w = rng.uniform(0.1, 2.0, n)
    w[:300] = 0.0                                   # a stretch of rows with no weight
    groups = rng.integers(-1, 5, n)
    for names in (("speed",), ("position", "speed")):
        sub = design.subset(names)
        xz = sub.dense() @ sub.Z
        np.testing.assert_allclose(sub.weighted_gram(w), xz.T @ (w[:, None] * xz),
                                   rtol=1e-10, atol=1e-9)
        pieces = sub.weighted_gram(w, groups, 5)
        for k in range(5):
            m = groups == k
            np.testing.assert_allclose(pieces[k], xz[m].T @ (w[m, None] * xz[m]),
                                       rtol=1e-10, atol=1e-9)


def test_linear_predictor_bounds_hold_and_are_reached_by_b_splines():
    # |x_i' beta| <= |beta_0| + sum_terms max row L1 norm * max|beta_term|, with no pass over
    # the bins (it decides whether a weight-derivative trace is negligible). It must never be
    # below the largest |X Z theta| over the bins, and for B-splines (non-negative rows summing
    # to 1) it is within a small factor of it.
    rng = np.random.default_rng(12)
    n = 4000
    cov = {"position": rng.uniform(0, 1, (n, 2)), "heading": rng.uniform(0, 6, n),
           "speed": rng.gamma(2, 0.1, n)}
    design = build_design(cov, default_bases(cov))
    for names in (design.names, ("speed",), ("position", "heading")):
        sub = design.subset(names)
        theta = rng.normal(0, 1.0, (6, sub.n_theta))
        theta[1] *= 1e-9                                  # tiny steps: bounded as tiny
        exact = np.max(np.abs(sub.linear_predictors(theta)), axis=0)
        bound = sub.linear_predictor_bounds(theta)
        assert bound.shape == (6,)
        assert np.all(exact <= bound * (1 + 1e-12))
        assert np.all(bound <= 10 * exact)                # and not wildly loose
    # Only the intercept: the bound is exact.
    theta = np.zeros((1, design.n_theta))
    theta[0, 0] = -2.5
    assert design.linear_predictor_bounds(theta)[0] == pytest.approx(2.5)


def test_linear_predictors_in_the_plans_own_precision_on_request():
    rng = np.random.default_rng(13)
    n = 2000
    cov = {"heading": rng.uniform(0, 6, n), "speed": rng.gamma(2, 0.1, n)}
    single = build_design(cov, default_bases(cov), gram_precision="single")
    theta = rng.normal(0, 0.3, (4, single.n_theta))
    got = single.linear_predictors(theta, dtype=None)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, single.linear_predictors(theta), rtol=0, atol=0)
    double = build_design(cov, default_bases(cov))
    assert double.linear_predictors(theta, dtype=None).dtype == np.float64
