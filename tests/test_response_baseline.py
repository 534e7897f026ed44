"""The plotted response curves are rates in Hz that reproduce the observed rates.

Each term sums to zero over the bins, so exp(term) = 1 is the log-mean rate, not the mean
rate: a curve drawn as ``mean rate x exp(term)`` over-predicts (by 8-29% on simulated place
cells). The unit file stores each term's baseline in Hz (partial dependence); these tests
check, on simulated cells, that ``baseline_hz * exp(log_modulation)`` integrated against the
time spent at each value gives back the spikes that were fired there.
"""

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from encodex.population.run import run_population
from encodex.report.cellplots import term_rate
from encodex.session import build_session
from encodex.simulate import simulate_recording


def _interp_1d(arrays, name, x):
    g, rate, _, _, in_hz = term_rate(arrays, name)
    assert in_hz
    if name == "heading":
        return np.interp(x, g, rate, period=2 * np.pi)
    return np.interp(x, g, rate)


def test_one_d_curves_reproduce_observed_rates(unit_files):
    checked = 0
    for unit, arrays, label in unit_files:
        for name in ("heading", "speed"):
            if f"{name}__log_modulation" not in arrays:
                continue
            occ = arrays[f"{name}__occupancy_s"]
            spk = arrays[f"{name}__spikes"]
            e = arrays[f"{name}__edges"]
            centres = (e[:-1] + e[1:]) / 2
            curve = _interp_1d(arrays, name, centres)
            expected = occ * curve
            ratio = spk.sum() / expected.sum()
            single = label == name
            # the curve's own scale: total spikes come back within 3% (5% with other terms)
            assert ratio == pytest.approx(1.0, abs=0.03 if single else 0.05), (unit, name)
            # the old scale (mean rate x exp(term)) is off by far more on the same cells
            mean_rate = spk.sum() / occ.sum()
            old = occ * mean_rate * np.exp(np.interp(
                centres, arrays[f"{name}__grid"], arrays[f"{name}__log_modulation"]))
            assert abs(spk.sum() / old.sum() - 1) > 2 * abs(ratio - 1)
            if single:
                # bin by bin within Poisson noise (bins with >= 5 expected spikes)
                keep = expected >= 5
                chi2 = np.sum((spk[keep] - expected[keep]) ** 2 / expected[keep])
                assert chi2 / keep.sum() < 2.5, (unit, name, chi2 / keep.sum())
            checked += 1
    assert checked >= 2


def test_position_map_and_model_check_reproduce_observed_rates(unit_files):
    checked = 0
    for unit, arrays, label in unit_files:
        if "position__log_modulation" not in arrays:
            continue
        (gx, gy), rate, _, _, in_hz = term_rate(arrays, "position")
        assert in_hz
        occ, spk = arrays["ratemap__occupancy_s"], arrays["ratemap__spikes"]
        ex, ey = arrays["ratemap__edges_x"], arrays["ratemap__edges_y"]
        cx, cy = (ex[:-1] + ex[1:]) / 2, (ey[:-1] + ey[1:]) / 2
        f = RegularGridInterpolator((gy, gx), rate, bounds_error=False, fill_value=None)
        yy, xx = np.meshgrid(cy, cx, indexing="ij")
        curve = f(np.column_stack([yy.ravel(), xx.ravel()])).reshape(occ.shape)
        ratio = spk.sum() / np.sum(occ * curve)
        assert ratio == pytest.approx(1.0, abs=0.03 if label == "position" else 0.05), unit
        # the model check panel: observed over model-expected spikes in the visited bins
        pred = arrays["ratemap__predicted_spikes"]
        visited = occ >= 0.5
        assert spk[visited].sum() / pred[visited].sum() == pytest.approx(1.0, abs=0.02)
        checked += 1
    assert checked >= 2


@pytest.fixture(scope="module")
def fit_dir(tmp_path_factory):
    rec, _ = simulate_recording(seed=11, n_cells=8, duration_s=600.0,
                                environments=("room_a",))
    out = tmp_path_factory.mktemp("baseline") / "fit"
    run_population(build_session(rec), out=out, variables=("position", "heading", "speed"))
    return out


@pytest.fixture(scope="module")
def unit_files(fit_dir):
    import pandas as pd

    cells = pd.read_csv(fit_dir / "cells.csv", dtype={"unit": str})
    found = []
    for r in cells.itertuples():
        if r.status != "ok" or r.variables == "none":
            continue
        with np.load(fit_dir / "units" / "room_a" / f"{r.unit}.npz") as z:
            found.append((r.unit, {k: z[k] for k in z.files}, r.variables))
    return found


def test_cell_figure_draws_the_model_check_of_a_fitted_cell(fit_dir, unit_files):
    import matplotlib.pyplot as plt

    from encodex.report.figures import cell_figure
    from encodex.report.load import load_run

    run = load_run(fit_dir)
    unit = next(u for u, _, lab in unit_files if lab == "position")
    fig = cell_figure(run, unit, "room_a")
    check = next(ax for ax in fig.axes if ax.get_title() == "model check per spatial bin")
    ratio = float(check.texts[0].get_text().split(":")[1].split()[0])
    assert ratio == pytest.approx(1.0, abs=0.02)
    plt.close(fig)
