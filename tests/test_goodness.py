"""Goodness of fit wiring: held-out predictions of the folds, cells.csv columns, KS curve."""

import numpy as np
import pytest

from encodex.compare.cell import analyse_cell, cross_validate
from encodex.compare.folds import chunked_folds
from encodex.compare.goodness import GOODNESS_COLUMNS, goodness_of_fit, heldout_series
from encodex.design import build_design, default_bases
from encodex.errors import SettingsError
from encodex.fit import fit_poisson, refit_folds


@pytest.fixture(scope="module")
def cell():
    rng = np.random.default_rng(4)
    n, dt = 6000, 0.05
    heading = np.mod(np.cumsum(rng.normal(0, 0.2, n)), 2 * np.pi)
    speed = np.abs(np.cumsum(rng.normal(0, 0.01, n))) % 0.4
    mu = 4.0 * dt * np.exp(1.0 * np.cos(heading - 1.0))
    y = rng.poisson(mu)
    cov = {"heading": heading, "speed": speed}
    design = build_design(cov, default_bases(cov, ("heading", "speed")))
    offset = np.full(n, np.log(dt))
    folds = chunked_folds(n, k=6, chunks_per_fold=2, rng=1)
    return design, y, offset, folds, mu


def test_heldout_predictions_are_those_of_the_fold_fits(cell):
    design, y, offset, folds, _ = cell
    cv = cross_validate(design, ("heading",), y, offset, folds)
    sub = design.subset(("heading",))
    full = fit_poisson(sub, y, offset)
    _, preds = refit_folds(sub, y, offset, full, folds.fold, folds.k, heldout=True)
    np.testing.assert_allclose(cv.heldout, heldout_series(len(y), folds, preds), rtol=1e-8)
    assert np.all(np.isfinite(cv.heldout)) and np.all(cv.heldout > 0)


def test_analyse_cell_checks_the_chosen_model(cell):
    design, y, offset, folds, mu = cell
    a = analyse_cell(design, y, offset, folds, ("heading", "speed"),
                     goodness_rng=np.random.default_rng(2))
    assert a.label == "heading"
    g = a.goodness
    assert g.n_intervals == np.count_nonzero(y) - 1
    # a correct model of a Poisson cell: inside the band, no dispersion or history excess
    assert g.ks_within_band and g.ks_distance < g.ks_critical
    assert abs(g.dispersion - 1) < 0.25 and abs(g.history_ratio - 1) < 0.15
    assert set(g.row()) == set(GOODNESS_COLUMNS)
    # the mean-rate model of the same cell misses the heading tuning: outside the band
    mean_only = analyse_cell(design, y, offset, folds, ("speed",),
                             goodness_rng=np.random.default_rng(2))
    assert mean_only.label == "none"
    assert not mean_only.goodness.ks_within_band
    assert mean_only.goodness.dispersion > g.dispersion


def test_bad_predictions_are_refused():
    with pytest.raises(SettingsError, match="positive and finite"):
        goodness_of_fit(np.array([0, 1, 0]), np.array([0.1, np.nan, 0.1]), 0.02,
                        np.random.default_rng(0))
