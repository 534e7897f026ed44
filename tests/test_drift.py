"""Slow drift as a nuisance term: basis, baseline model, labels and stored response."""

import re

import numpy as np
import pytest

from encodex.compare.cell import analyse_cell
from encodex.compare.folds import chunked_folds
from encodex.design import (DRIFT_TERM, build_design, default_bases, drift_basis,
                            drift_basis_size)
from encodex.errors import InputError


def test_basis_size_follows_the_environment_length():
    assert [drift_basis_size(m * 60) for m in (1, 5, 10, 30, 60, 240)] == [4, 4, 5, 9, 12, 12]
    b = drift_basis(np.linspace(0.0, 1800.0, 1000))
    assert b.n_basis == 9 and b.range == (0.0, 1800.0) and b.penalty_order == 2
    with pytest.raises(InputError, match="no-drift"):
        drift_basis(np.zeros(10))


@pytest.fixture(scope="module")
def slowing():
    """10 min, 50 ms bins: a steady runner whose speed falls to 0.2x over the session."""
    from scipy.ndimage import gaussian_filter1d

    rng = np.random.default_rng(2)
    bs = 0.05
    clock = np.arange(12000) * bs
    vigour = np.exp(gaussian_filter1d(rng.normal(size=clock.size), 20) * 1.5)
    speed = 0.3 * vigour * (1.0 - 0.8 * clock / clock[-1])
    bases = default_bases({"speed": speed}, ["speed"])
    bases[DRIFT_TERM] = drift_basis(clock)
    design = build_design({"speed": speed, DRIFT_TERM: clock}, bases)
    folds = chunked_folds(clock.size, 10, 3, 0)
    return design, folds, clock, speed, bs


def test_untuned_cell_with_a_rate_ramp_is_not_labelled_speed(slowing):
    design, folds, clock, speed, bs = slowing
    # Speed really falls over the session (the confound the drift term is for).
    half = clock.size // 2
    assert speed[half:].mean() < 0.7 * speed[:half].mean()
    rng = np.random.default_rng(4)
    # Untuned: the rate falls fourfold over the 10 minutes, following nothing but the clock.
    rate = 4.0 * np.exp(-np.log(4.0) * clock / clock[-1])
    y = rng.poisson(rate * bs)
    off = np.full(y.size, np.log(bs))
    without = analyse_cell(design, y, off, folds, ["speed"])
    with_drift = analyse_cell(design, y, off, folds, ["speed"], nuisance=(DRIFT_TERM,))
    # Without the drift term speed stands in for the clock; with it speed adds nothing.
    assert without.label == "speed" and without.selection.gains["speed"] > 0.01
    assert with_drift.label == "none"
    assert with_drift.selection.gains["speed"] < 0.3 * without.selection.gains["speed"]
    # The drift-only baseline recovers the ramp: log(4) = 1.39 from start to end.
    r = with_drift.baseline_fit.response(DRIFT_TERM)
    assert r.log_gain[0] - r.log_gain[-1] == pytest.approx(np.log(4.0), abs=0.3)
    # Baseline scores are against itself: all zero.
    assert np.all(with_drift.models[()].bits_per_spike == 0.0)


def test_speed_cell_is_still_found_with_the_drift_term(slowing):
    from scipy.ndimage import gaussian_filter1d

    _, folds, clock, _, bs = slowing
    rng = np.random.default_rng(5)
    # Runs and stops (seconds) on top of the slowing: speed varies fast, the drift cannot
    # follow it.
    running = gaussian_filter1d(rng.normal(size=clock.size), 40) > 0
    speed = 0.25 * running * (1.0 - 0.6 * clock / clock[-1]) + 0.01
    bases = default_bases({"speed": speed}, ["speed"])
    bases[DRIFT_TERM] = drift_basis(clock)
    design = build_design({"speed": speed, DRIFT_TERM: clock}, bases)
    rate = 2.0 * np.exp(np.log(4.0) * np.minimum(speed, 0.4) / 0.4)
    y = rng.poisson(rate / rate.mean() * 2.0 * bs)
    off = np.full(y.size, np.log(bs))
    a = analyse_cell(design, y, off, folds, ["speed"], nuisance=(DRIFT_TERM,))
    assert a.label == "speed"
    assert set(a.final_fit.names) == {"speed", DRIFT_TERM}


def test_run_stores_the_drift_response_and_records_the_setting(tmp_path):
    import json

    from encodex.population import run_population
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, _ = simulate_recording(seed=3, n_cells=2, duration_s=240.0, environments=("box",))
    session = build_session(rec, bin_size=0.05)
    settings = dict(variables=("speed",), folds=6, chunks_per_fold=2, min_spikes=10)
    on = run_population(session, tmp_path / "on", **settings)
    off = run_population(session, tmp_path / "off", drift=False, **settings)
    run = json.loads((tmp_path / "on" / "run.json").read_text())
    assert run["settings"]["drift"] is True and "environment's clock" in run["methods"]["drift"]
    assert run["environments"]["box"]["drift_basis_functions"] == 4
    assert json.loads((tmp_path / "off" / "run.json").read_text())["settings"]["drift"] is False
    for unit in session.unit_ids:
        with np.load(tmp_path / "on" / "units" / "box" / f"{unit}.npz") as z:
            assert z["drift__log_modulation"].shape == z["drift__grid"].shape == z["drift__se"].shape
            assert z["drift__grid"][-1] == pytest.approx(240.0, abs=1.0)
        with np.load(tmp_path / "off" / "units" / "box" / f"{unit}.npz") as z:
            assert "drift__log_gain" not in z
    # each step shows its p-value against the level it was tested at (alpha for signflip)
    assert re.search(r"\(p=[0-9.e-]+(<=|>)0\.05\)", on.cells["selection_path"].iloc[0])
    assert len(off.cells) == len(on.cells)
    readme = (tmp_path / "on" / "README.txt").read_text()
    assert "drift-only model" in readme
