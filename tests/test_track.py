"""Track sessions: geometry, laps, running direction, jumps, the direction term, flags."""

from __future__ import annotations

import numpy as np
import pytest

from encodex.compare.concurvity import ambiguity_flags, ambiguous_combinations
from encodex.compare.selection import select_variables
from encodex.design import build_design, default_bases
from encodex.design.bases import DirectionCurveBasis, IntervalBasis
from encodex.errors import EncodexError, InputError, SettingsError
from encodex.io import Signal, make_recording, read_recording, write_bundle
from encodex.io.track import TrackLayout, layout_from_text, layout_text, project_onto_path
from encodex.session import build_session
from encodex.track_session import find_laps


def test_projection_onto_an_l_shaped_path():
    layout = TrackLayout("linear", path=((0, 0), (1, 0), (1, 0.5)))
    assert layout.length_m == pytest.approx(1.5)
    xy = np.array([[0.3, 0.02], [0.5, -0.05], [1.04, 0.2], [1.2, 0.6], [np.nan, 0.0]])
    along, off = project_onto_path(xy, layout)
    np.testing.assert_allclose(along[:4], [0.3, 0.5, 1.2, 1.5], atol=1e-12)
    np.testing.assert_allclose(off[:4], [0.02, 0.05, 0.04, np.hypot(0.2, 0.1)], atol=1e-12)
    assert np.isnan(along[4]) and np.isnan(off[4])


def test_circular_path_closes_and_wraps():
    square = TrackLayout("circular", path=((0, 0), (0.5, 0), (0.5, 0.5), (0, 0.5)))
    assert square.length_m == pytest.approx(2.0)
    along, _ = project_onto_path(np.array([[0.0, 0.25], [0.01, -0.01]]), square)
    np.testing.assert_allclose(along, [1.75, 0.01], atol=1e-12)
    with pytest.raises(SettingsError, match="length"):
        TrackLayout("circular")
    with pytest.raises(SettingsError, match="shape"):
        TrackLayout("oval", length_m=1.0)


def test_layout_text_round_trip_and_refusal():
    for layout in (TrackLayout("circular", length_m=2.5), TrackLayout("linear", length_m=1.2)):
        assert layout_from_text(layout_text(layout)) == layout
    assert layout_from_text("(0, 0) is a corner of the arena; x, y") is None
    with pytest.raises(InputError, match="length"):
        layout_from_text("circular track")


def _shuttle(n_runs=6, length=1.0, v=0.25, rate=50.0, stop_s=1.0):
    """Back-and-forth runs at constant speed with stops at the ends."""
    xs = []
    for k in range(n_runs):
        run = np.arange(0, length, v / rate)
        run = run if k % 2 == 0 else length - run
        xs += [np.full(int(stop_s * rate), run[0]), run]
    x = np.concatenate(xs + [np.full(int(stop_s * rate), xs[-1][-1])])
    return np.arange(x.size) / rate, x


def test_shuttle_laps_directions_and_no_heading():
    t, x = _shuttle()
    laps = find_laps(t, x, TrackLayout("linear"))
    assert laps.shape == (6, 2)  # one traversal per run, none for the stops
    rec = make_recording(t, x, {"a": [1.0, 5.0, 9.0]}, track=TrackLayout("linear"))
    s = build_session(rec)
    d = s.covariates["direction"][s.valid]
    assert set(np.unique(d)) <= {-1.0, 0.0, 1.0} and (d > 0).any() and (d < 0).any()
    # constant running speed 0.25 m/s away from the turns
    sp = s.covariates["speed"][s.valid & (np.abs(s.covariates["direction"]) > 0)]
    assert np.median(sp) == pytest.approx(0.25, abs=0.005)
    assert "heading" in s.unavailable_variables(0) and "heading" not in s.covariates
    assert s.summary["track"]["trials_from"] == "laps"
    assert s.available_variables(0) == ("position", "speed", "distance", "time", "direction")
    # the open field's two-stage speed has no meaning on a one-dimensional velocity
    with pytest.raises(SettingsError, match="velocity_smoothing_s applies to open-field"):
        build_session(rec, velocity_smoothing_s=0.1)


def test_circular_laps_and_periodic_position():
    rate, v, length = 50.0, 0.4, 2.0
    t = np.arange(0, 16, 1 / rate)
    x = np.mod(0.1 + v * t, length)  # 3.2 turns
    laps = find_laps(t, np.unwrap(x, period=length), TrackLayout("circular", length_m=length))
    assert laps.shape == (2, 2)  # complete laps between the three crossings of 0
    np.testing.assert_allclose(np.diff(laps, axis=1).ravel(), length / v, atol=0.03)
    rec = make_recording(t, x, {"a": [1.0, 2.0]}, track=TrackLayout("circular", length_m=length))
    s = build_session(rec)
    assert s.kinds["position"] == "circular:2.0"
    ok = s.valid
    # the wrap from 2 m to 0 m is not a jump: speed stays 0.4 m/s
    assert np.nanmax(s.covariates["speed"][ok]) == pytest.approx(v, abs=1e-6)
    assert s.summary["track"]["n_jumps"] == 0
    basis = default_bases({"position": s.covariates["position"][ok]}, ["position"],
                          kinds=s.kinds)["position"]
    assert basis.period == length


def test_corridor_jumps_never_become_speed_or_distance():
    rate, length, gain = 50.0, 2.0, 0.5
    laps, t0, ts, xs, ds = 5, 0.0, [], [], []
    run_total = 0.0
    for k in range(laps):
        phys = np.arange(0, length / gain, 0.3 / rate)  # 0.3 m/s on the ball
        t = t0 + np.arange(phys.size) / rate
        ts.append(t)
        xs.append(np.minimum(gain * phys, length))
        ds.append(run_total + phys)
        run_total += phys[-1] + 0.3 / rate
        t0 = t[-1] + 1 / rate
    t, x, d = (np.concatenate(a) for a in (ts, xs, ds))
    rec = make_recording(t, x, {"a": [3.0, 20.0]}, track=TrackLayout("linear", length_m=length),
                         run_distance=Signal(t, d, "interval", "run", "meters"))
    s = build_session(rec)
    assert s.summary["track"]["n_jumps"] == laps - 1
    assert s.summary["masked_bins"]["track_jump"] == laps - 1
    v = s.valid
    # speed from the ball (0.3 m/s), not from the virtual position (0.15 m/s or the jumps)
    assert np.nanmax(s.covariates["speed"][v]) == pytest.approx(0.3, abs=1e-6)
    assert np.nanmax(s.covariates["distance"][v]) == pytest.approx(length / gain, abs=0.02)
    assert "direction" in s.unavailable_variables(0)  # ran one way only


def test_bundle_track_and_refusals(tmp_path):
    t, x = _shuttle(n_runs=2)
    rec = make_recording(t, x, {"a": [1.0]}, track=TrackLayout("circular", length_m=1.5))
    back = read_recording(write_bundle(rec, tmp_path / "c.npz"))
    assert back.track == rec.track and back.position.shape == (t.size, 1)
    with pytest.raises(InputError, match="shape"):
        make_recording(t, np.column_stack([x, x, x]), {"a": [1.0]},
                       track=TrackLayout("linear"))
    xy = np.column_stack([x, 0.02 + 0.01 * x])
    with pytest.raises(EncodexError, match="path"):
        read_recording(write_bundle(make_recording(t, xy, {"a": [1.0]}), tmp_path / "xy.npz"),
                       track="linear")
    flat = np.column_stack([x, np.full_like(x, 0.02)])  # y constant: the track is along x
    got = read_recording(write_bundle(make_recording(t, flat, {"a": [1.0]}),
                                      tmp_path / "flat.npz"), track="linear")
    np.testing.assert_allclose(got.position[:, 0], x)
    proj = read_recording(tmp_path / "xy.npz", track=TrackLayout(path=((0, 0), (1, 0))))
    np.testing.assert_allclose(proj.position[:, 0], x, atol=1e-12)


def test_direction_term_is_the_signed_track_curve_and_not_centred():
    x = np.linspace(0, 1, 50)
    s = np.tile([1.0, -1.0, 0.0, 1.0, -1.0], 10)
    base = IntervalBasis(8, (0.0, 1.0))
    cov = {"position": x, "direction": s}
    bases = {"position": base, "direction": DirectionCurveBasis(base)}
    design = build_design(cov, bases)
    d = design.term("direction")
    np.testing.assert_allclose(d.block.toarray(), base.evaluate(x).toarray() * s[:, None])
    assert d.Z.shape == (8, 8)  # every column kept
    assert design.term("position").Z.shape == (8, 7)
    got = default_bases(cov, ["position", "direction"], kinds={"position": "interval"})
    assert isinstance(got["direction"], DirectionCurveBasis)
    with pytest.raises(InputError, match="2-D"):
        default_bases({"position": np.c_[x, x], "direction": s}, ["direction"])


def _scorer(means):
    rng = np.random.default_rng(0)
    seen = []

    def score(model):
        seen.append(model)
        return means[model] + 0.001 * rng.standard_normal(10)

    return score, seen


def test_forward_selection_offers_position_with_direction():
    # a field in one running direction only: position alone carries a little of it
    means = {(): 0.0, ("position",): 0.02, ("speed",): 0.01,
             ("position", "direction"): 0.2, ("position", "speed"): 0.03,
             ("position", "speed", "direction"): 0.195}
    score, seen = _scorer(means)
    sel = select_variables(["position", "speed", "direction"], score)
    assert sel.chosen == ("position", "direction")
    assert sel.steps[0].best == ("position", "direction")
    assert ("direction",) not in seen and ("speed", "direction") not in seen
    ex = select_variables(["position", "speed", "direction"], _scorer(means)[0],
                          exhaustive=True)
    assert ex.chosen == ("position", "direction")


def test_direction_does_not_ride_in_on_position():
    # the pair is best on average by a hair, but beats position in only half the folds
    base = np.linspace(0.15, 0.25, 10)
    wiggle = np.where(np.arange(10) % 2 == 0, 0.002, -0.0018)
    folds = {(): np.zeros(10), ("position",): base, ("speed",): base * 0.05,
             ("position", "direction"): base + wiggle, ("position", "speed"): base - 0.001,
             ("position", "speed", "direction"): base + wiggle - 0.001}
    sel = select_variables(["position", "speed", "direction"], lambda m: folds[m])
    assert np.mean(folds[("position", "direction")]) > np.mean(base)
    assert sel.steps[0].best == ("position",) and sel.steps[0].accepted
    assert sel.chosen == ("position",)


def _shuttle_design(traversal_trials=True):
    t, x = _shuttle(n_runs=12, length=1.5, v=0.3)
    rng = np.random.default_rng(3)
    x = np.clip(x + 0.002 * rng.standard_normal(x.size), 0, 1.5)
    rec = make_recording(t, x, {"a": [1.0]}, track=TrackLayout("linear"))
    s = build_session(rec, lap_trials=traversal_trials)
    r = s.restrict(0)
    names = [v for v in s.available_variables(0)]
    cov = {v: r.covariates[v] for v in set(names) | {"position"}}
    return build_design(cov, default_bases(cov, names, kinds=s.kinds))


def test_distance_on_a_shuttle_is_flagged_against_position_and_direction():
    design = _shuttle_design()
    assert ambiguous_combinations(design, ("distance",)) == {
        "distance": ("position+direction",)}
    # at a constant running speed, time since the traversal began is distance / speed: the
    # pair flag (time) comes first, then the combination
    assert ambiguity_flags(design, ("position", "direction")) == ("distance", "time")
    assert ambiguity_flags(design, ("distance",)) == ("time", "position+direction")
    # a place cell with the same field both ways is not a distance cell
    assert ambiguity_flags(design, ("position",)) == ()


def test_tables_count_flagged_cells_beside_the_cells():
    import pandas as pd

    from encodex.report.tables import label_counts, variable_counts

    cells = pd.DataFrame({
        "unit": ["a", "b", "c", "d"], "environment": "shuttle", "status": "ok",
        "variables": ["distance", "distance", "position+direction", "none"],
        "bits_per_spike": [0.2, 0.3, 0.5, 0.0],
        "gain_distance": [0.2, 0.3, np.nan, np.nan],
        "gain_position": [np.nan, np.nan, 0.3, np.nan],
        "gain_direction": [np.nan, np.nan, 0.2, np.nan],
        "ambiguous_with": ["position+direction", "", "distance", ""]})
    lab = label_counts(cells).set_index("label")
    assert lab.loc["distance", "n_cells"] == 2 and lab.loc["distance", "n_flagged"] == 1
    assert lab.loc["none", "n_flagged"] == 0
    var = variable_counts(cells, tested=("position", "distance", "direction")).set_index(
        "variable")
    assert var.loc["direction", "n_flagged"] == 1 and var.loc["distance", "n_flagged"] == 1


def test_track_occupancy_by_direction_and_lap():
    from encodex.track_maps import lap_index, track_edges, track_occupancy

    x = np.array([0.0, 0.07, 0.12, 0.12, 0.07, 0.0])
    d = np.array([1.0, 1.0, 1.0, -1.0, -1.0, -1.0])
    y = np.array([0, 1, 2, 0, 0, 1])
    laps = lap_index({"time": np.array([0.0, 0.02, 0.04, 0.0, 0.02, 0.04])})
    np.testing.assert_array_equal(laps, [0, 0, 0, 1, 1, 1])
    edges = track_edges(x, 0.05)
    np.testing.assert_allclose(edges, [0.0, 0.05, 0.10, 0.15])
    out = track_occupancy(x, d, y, 0.02, edges, laps)
    np.testing.assert_allclose(out["track__occupancy_s"], [[0.04, 0.04, 0.04],
                                                           [0.02, 0.02, 0.02],
                                                           [0.02, 0.02, 0.02]])
    np.testing.assert_allclose(out["track__spikes"], [[1, 1, 2], [0, 1, 2], [1, 0, 0]])
    np.testing.assert_allclose(out["track__lap_spikes"], [[0, 1, 2], [1, 0, 0]])
    np.testing.assert_allclose(out["track__lap_direction"], [1.0, -1.0])
    np.testing.assert_allclose(track_edges(x, 0.3, length_m=2.0), np.linspace(0, 2, 8))
