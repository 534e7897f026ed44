"""Bases, penalties and the constrained design."""

import numpy as np
import pytest

from encodex.design import (CircularBasis, IntervalBasis, PlanarBasis, build_design,
                            default_bases)
from encodex.design.bsplines import difference_matrix
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
