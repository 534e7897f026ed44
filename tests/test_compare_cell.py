"""One cell end to end: cross-validation with the engine, exhaustive mode, shuffle control."""

import numpy as np
import pytest

from encodex.compare.cell import analyse_cell, cross_validate
from encodex.compare.folds import chunked_folds
from encodex.design import build_design, default_bases


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(0)
    n, bs = 8000, 0.05
    # Slowly turning heading (random walk) and an independent speed process.
    heading = np.mod(np.cumsum(rng.normal(0, 0.15, n)), 2 * np.pi)
    speed = np.abs(np.convolve(rng.normal(0, 0.1, n), np.ones(20) / 20, "same")) * 5
    cov = {"heading": heading, "speed": speed}
    design = build_design(cov, default_bases(cov, sizes={"heading": 8, "speed": 6}))
    tuned = rng.poisson(3.0 * bs * np.exp(1.2 * np.cos(heading - 2.0)) / np.i0(1.2))
    flat = rng.poisson(np.full(n, 3.0 * bs))
    off = np.full(n, np.log(bs))
    folds = chunked_folds(n, k=8, chunks_per_fold=2, rng=1)
    return design, tuned, flat, off, folds


def test_cross_validation_never_fits_held_out_bins(data):
    design, tuned, _, off, folds = data
    # The strict mode: with "one-step" the held-out bins reach a fold's model through the
    # all-bins fit it starts from (second order) and its smoothing parameters.
    cv = cross_validate(design, ("heading",), tuned, off, folds, fold_fits="refit")
    # Changing the spikes of fold 0's held-out bins must not change the fits of fold 0,
    # hence its predictions on other bins; only fold 0's score may change.
    y2 = tuned.copy()
    y2[folds.test_rows(0)] = 0
    cv2 = cross_validate(design, ("heading",), y2, off, folds, fold_fits="refit")
    s1, s2 = cv.folds[0], cv2.folds[0]
    assert s2.n_spikes == 0 and s1.n_spikes > 0
    # fold 0's model was trained on identical bins, so its held-out expected counts are equal:
    # the held-out log-likelihood with y = 0 is minus the sum of expected counts.
    from encodex.fit import fit_poisson

    sub = design.subset(("heading",))
    fit = fit_poisson(sub, tuned, off, rows=folds.train_rows(0))
    mu = fit.predict(sub, rows=folds.test_rows(0), offset=off)
    assert s2.loglik == pytest.approx(-mu.sum(), rel=1e-5)
    assert cv.bits_per_spike.mean() > 0.15


def test_exhaustive_equals_forward_and_scores_lattice(data):
    design, tuned, _, off, folds = data
    fwd = analyse_cell(design, tuned, off, folds, ("heading", "speed"), refit=False)
    exh = analyse_cell(design, tuned, off, folds, ("heading", "speed"), exhaustive=True,
                       refit=False)
    assert fwd.label == exh.label == "heading"
    assert set(exh.models) == {(), ("heading",), ("speed",), ("heading", "speed")}
    for m in fwd.models:
        assert np.allclose(fwd.models[m].bits_per_spike, exh.models[m].bits_per_spike)


def test_shuffle_control_separates_tuned_and_untuned(data):
    design, tuned, flat, off, folds = data
    a = analyse_cell(design, tuned, off, folds, ("heading",), shuffles=9, min_shift_bins=400,
                     rng=np.random.default_rng(5))
    assert a.label == "heading"
    assert a.shuffle_p == pytest.approx(0.1)  # the smallest possible with 9 shifts
    observed = a.models[("heading",)].bits_per_spike.mean()
    assert a.shuffle_null.shape == (9,) and np.all(a.shuffle_null < observed / 2)
    b = analyse_cell(design, flat, off, folds, ("heading",), shuffles=9, min_shift_bins=400,
                     rng=np.random.default_rng(5))
    assert b.label == "none"
    assert b.shuffle_p > 0.1
    assert a.final_fit is not None and b.final_fit is None
    r = a.final_fit.response("heading")
    # The fitted tuning peaks near the true preferred heading (2 rad).
    assert abs(r.grid[np.argmax(r.log_modulation)] - 2.0) < 0.4


def test_warm_start_takes_the_parent_only():
    from encodex.compare.cell import warm_start_fits

    fits = {(): "baseline", ("position",): "P", ("speed",): "S", ("heading",): "H",
            ("position", "heading"): "PH"}
    # The largest fitted sub-model; never the earlier single-variable fit of a new term,
    # whose smoothing parameters can lead LAML to a rougher local optimum.
    assert warm_start_fits(("position", "speed"), fits) == ("P",)
    assert warm_start_fits(("position", "heading", "speed"), fits) == ("PH",)
    # A first-step model: the baseline (drift-only) fit.
    assert warm_start_fits(("time",), fits) == ("baseline",)
    assert warm_start_fits(("time",), {}) is None
