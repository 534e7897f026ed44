"""Ground truth: labels recovered on simulated track sessions (encodex.simulate_track).

Source of the check values: the simulator's own ground truth (the cells' simulated tuning).
Tolerances are those of the issue's targets, loosened for the small sessions run here
(8 cells, 240 s instead of 40 cells, 900 s; benchmarks/track_recovery.py measures at full
size): a wrong direction term (e.g. without the sign, or evaluated on the wrong position)
leaves direction cells labelled ``position`` and fails the first check; distance and time
taken from the virtual position instead of the distance run make the gain corridor's
distance cells come out as position cells and fail the second.
"""

from __future__ import annotations

import numpy as np

import encodex
from encodex.session import build_session
from encodex.simulate_track import simulate_track_recording


def _labels(scenario, seed):
    rec, truth = simulate_track_recording(scenario, seed=seed, n_cells=8, duration_s=240)
    res = encodex.run_population(build_session(rec), jobs=1)
    c = res.cells.merge(truth[["unit", "variables"]], on="unit", suffixes=("", "_true"))
    return c["variables"].replace("", "none").to_numpy(), c["variables_true"].to_numpy()


def test_circular_track_direction_cells_and_untuned_cells():
    got, true = _labels("circular", seed=6)
    assert np.mean(got == true) >= 0.8
    has_dir = np.array(["direction" in t for t in true])
    assert has_dir.sum() >= 2
    # 240 s hold few passes each way: a weak one-way field may stay unlabelled, but the
    # direction term must show in most direction cells and in no other cell
    assert np.mean(["direction" in g for g in got[has_dir]]) >= 0.5
    assert not any("direction" in g for g in got[~has_dir])
    # Untuned cells: each is labelled with probability at most alpha = 0.05, so requiring all
    # of them to stay "none" would fail a correct test on about one seed in five (5 cells);
    # two or more labelled has probability 0.023 at alpha (binomial). (Seed 6 labels one, at
    # p = 0.023, with the clipped sign-flip test; benchmarks/track_recovery.py measures the
    # rate on hundreds of untuned track cells.)
    untuned = got[true == "none"]
    assert untuned.size >= 4 and np.sum(untuned != "none") <= 1


def test_gain_corridor_tells_position_from_distance():
    got, true = _labels("gain_corridor", seed=5)
    assert np.mean(got == true) >= 0.8
    for kind in ("position", "distance"):
        sel = true == kind
        assert sel.sum() >= 1 and np.mean(got[sel] == kind) >= 0.5
