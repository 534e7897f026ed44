"""Ground truth: narrow distance and time fields keep their single label (knot placement).

Source of the ground truth: cells simulated here with a known Gaussian field in distance run
since trial start (peak 0.4-2 m, s.d. 0.2-0.3 m, 5-8x) or in time since trial start (peak
3-15 s, s.d. 1.5-2.5 s), inhomogeneous Poisson counts on the behaviour of the project's
simulator (:mod:`encodex.simulate`; distance since trial start reaches 10-17 m and time 60 s
there, most bins lie early in trials). The generating model carries one variable, so the
right label is that variable alone.

What is checked: with the default knot placement (interior knots of distance and time at
quantiles, :func:`encodex.design.bsplines.quantile_breaks`) at most one of 18 cells gets a
wrong label (measured at this seed: 0 of 18). With evenly spaced knots the distance basis is
too coarse for these fields (knots 2.4 m apart): the misfit is taken up by time or the cell
is missed; the second run checks that this population still shows it (measured at this seed:
8 of 12 distance cells exact: one distance+time, three none), so the first assertion
has teeth.
"""

import numpy as np
import scipy.sparse as sp

from encodex.population import run_population
from encodex.session import build_session
from encodex.simulate import simulate_recording

N_DISTANCE, N_TIME = 12, 6


def _session():
    rec, _ = simulate_recording(seed=31, n_cells=1, duration_s=40 * 60.0, environments=("box",))
    s = build_session(rec, bin_size=0.05)
    rng = np.random.default_rng(32)
    n = N_DISTANCE + N_TIME
    is_distance = np.arange(n) < N_DISTANCE
    peaks = np.where(is_distance, rng.uniform(0.4, 2.0, n), rng.uniform(3.0, 15.0, n))
    widths = np.where(is_distance, rng.uniform(0.2, 0.3, n), rng.uniform(1.5, 2.5, n))
    gains = np.log(rng.uniform(5.0, 8.0, n))
    base_hz = rng.uniform(2.0, 4.0, n)
    # outside trials the clocks are NaN: far from any field
    d = np.nan_to_num(np.asarray(s.covariates["distance"], float), nan=1e3)
    t = np.nan_to_num(np.asarray(s.covariates["time"], float), nan=1e4)
    x = np.where(is_distance, d[:, None], t[:, None])
    z = (x - peaks) / widths
    counts = rng.poisson(base_hz * np.exp(gains * np.exp(-0.5 * z * z)) * s.bin_size)
    ids = tuple(("d" if is_distance[i] else "t") + f"{i:02d}" for i in range(n))
    truth = dict(zip(ids, np.where(is_distance, "distance", "time")))
    return s.replace(counts=sp.csc_array(counts.astype(np.int32)), unit_ids=ids), truth


def test_narrow_trial_clock_fields_keep_a_single_label():
    session, truth = _session()
    labels = {}
    for knots in ("quantile", "even"):
        cells = run_population(session, None, jobs=2, variables=("distance", "time"),
                               knots=knots, progress=False).cells
        labels[knots] = dict(zip(cells["unit"], cells["variables"]))
    wrong = {u: v for u, v in labels["quantile"].items() if v != truth[u]}
    assert len(wrong) <= 1, wrong
    even_exact = sum(labels["even"][u] == "distance" for u in truth if u.startswith("d"))
    assert even_exact <= N_DISTANCE - 2, labels["even"]
