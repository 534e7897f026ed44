"""build_session: the Session contract, gaps, masks, trials, environments, spike binning."""

import numpy as np
import pytest
import scipy.sparse as sp

from encodex.errors import InputError, SettingsError
from encodex.io import make_recording
from encodex.session import WHOLE_RECORDING, build_session
from encodex.variables import VARIABLES

RATE = 50.0


def _line(duration=20.0, v=(0.05, 0.0), start=(0.1, 0.2)):
    t = np.arange(int(duration * RATE) + 1) / RATE
    pos = np.column_stack([start[0] + v[0] * t, start[1] + v[1] * t])
    return t, pos


def test_contract_shapes_types_and_counts():
    t, pos = _line()
    rng = np.random.default_rng(3)
    spikes = {"a": np.sort(rng.uniform(0, 20, 300)), "b": np.sort(rng.uniform(0, 20, 50))}
    rec = make_recording(t, pos, spikes, heading=np.full(t.size, 7.0 - 2 * np.pi),
                         trials=[[0.0, 10.0], [10.0, 20.0]],
                         epochs=[(0.0, 12.0, "a_box"), (12.0, 20.0, "b_box")])
    s = build_session(rec, bin_size=0.025)
    n = s.n_bins
    assert n == 800 and s.bin_size == 0.025
    np.testing.assert_allclose(s.time[:2], [0.0125, 0.0375])
    assert isinstance(s.counts, sp.csc_array) and s.counts.dtype == np.int32
    assert s.counts.shape == (n, 2)
    assert set(s.covariates) == {"position", "heading", "speed", "distance", "time"}
    assert s.covariates["position"].shape == (n, 2)
    for k in ("heading", "speed", "distance", "time"):
        assert s.covariates[k].shape == (n,)
    h = s.covariates["heading"]
    assert np.all((h >= 0) & (h < 2 * np.pi))
    np.testing.assert_allclose(h, 7.0 - 2 * np.pi)
    edges = np.arange(n + 1) * 0.025
    for i, u in enumerate(("a", "b")):
        expect = np.histogram(spikes[u], edges)[0]
        got = s.unit_counts(u)
        assert got.dtype == np.int64
        np.testing.assert_array_equal(got, expect)
        np.testing.assert_array_equal(s.unit_counts(i), expect)
    assert s.valid.dtype == bool and s.valid.all()
    assert s.environments == ("a_box", "b_box")
    assert np.all(s.environment[s.time < 12.0] == 0) and np.all(s.environment[s.time > 12] == 1)
    assert np.all(s.trial[s.time < 10.0] == 0) and np.all(s.trial[s.time > 10.0] == 1)
    with pytest.raises(ValueError):
        s.valid[0] = False  # frozen arrays


def test_distance_and_time_restart_at_trial_start():
    t, pos = _line(v=(0.05, 0.0))
    rec = make_recording(t, pos, {"a": [1.0]}, heading=np.zeros(t.size),
                         trials=[[0.0, 8.0], [8.0, 20.0]])
    s = build_session(rec, bin_size=0.02)
    el, d = s.covariates["time"], s.covariates["distance"]
    second = s.trial == 1
    first_bin = np.flatnonzero(second)[0]
    assert el[first_bin] == pytest.approx(0.01)
    assert d[first_bin] == pytest.approx(0.05 * 0.01)
    np.testing.assert_allclose(el[second], s.time[second] - 8.0)
    np.testing.assert_allclose(d[second], 0.05 * (s.time[second] - 8.0), rtol=1e-9)
    assert d[first_bin - 1] == pytest.approx(0.05 * (8.0 - 0.01))


def test_short_gap_interpolated_on_the_circle_long_gap_masked():
    t, pos = _line(duration=30.0, v=(0.02, 0.01))
    heading = np.mod(0.5 * t, 2 * np.pi)  # turns through 0 / 2*pi at t = 4*pi s
    pos = pos.copy()
    heading = heading.copy()
    short = (t > 12.4) & (t < 12.7)  # 0.3 s across the wrap at 12.566 s
    long_ = (t > 20.0) & (t < 22.0)  # 2 s
    pos[short | long_] = np.nan
    heading[short | long_] = np.nan
    rec = make_recording(t, pos, {"a": [1.0]}, heading=heading)
    s = build_session(rec, bin_size=0.02, max_gap_s=0.5)
    in_short = (s.time > 12.42) & (s.time < 12.68)
    expect_h = np.mod(0.5 * s.time[in_short], 2 * np.pi)
    diff = np.angle(np.exp(1j * (s.covariates["heading"][in_short] - expect_h)))
    assert np.max(np.abs(diff)) < 1e-3
    np.testing.assert_allclose(s.covariates["position"][in_short, 0],
                               0.1 + 0.02 * s.time[in_short], atol=1e-9)
    assert s.valid[in_short].all()
    masked = ~s.valid
    # exactly the bins between the last sample before and the first sample after the gap
    assert masked.sum() == s.summary["masked_bins"]["tracking_gap"]
    gap_bins = (s.time > 20.0) & (s.time < 22.0)
    assert masked[gap_bins].all()
    assert abs(int(masked.sum()) - int(gap_bins.sum())) <= 2
    assert s.summary["tracking_gaps"] == {"interpolated": 1, "masked": 1}
    assert np.isnan(s.covariates["speed"][gap_bins]).all()


def test_long_gap_ends_distance_for_the_rest_of_the_trial():
    t, pos = _line(duration=20.0)
    pos = pos.copy()
    pos[(t > 5.0) & (t < 7.0)] = np.nan
    rec = make_recording(t, pos, {"a": [1.0]}, heading=np.zeros(t.size),
                         trials=[[0.0, 10.0], [10.0, 20.0]])
    s = build_session(rec)
    after = (s.time > 7.0) & (s.time < 10.0)
    assert np.isnan(s.covariates["distance"][after]).all()
    assert not s.valid[after].any()
    assert s.summary["masked_bins"]["distance_after_gap"] == int(after.sum()) == 150
    assert np.isfinite(s.covariates["distance"][s.trial == 1]).all()
    assert s.valid[s.trial == 1].all()


def test_movement_heading_without_compass():
    t = np.arange(1001) / RATE
    y = np.where(t < 10, 0.1 + 0.1 * t, 1.1)  # moves along +y, then sits still
    pos = np.column_stack([0.5 + 0 * t, y])
    rec = make_recording(t, pos, {"a": [1.0]})
    s = build_session(rec, speed_smoothing_s=0.1, heading_speed_threshold=0.03)
    assert s.summary["heading_source"] == "movement direction"
    moving = s.time < 9.5
    np.testing.assert_allclose(s.covariates["heading"][moving], np.pi / 2, atol=1e-9)
    still = s.time > 10.5
    assert np.isnan(s.covariates["heading"][still]).all()
    assert not s.valid[still].any()
    assert s.summary["masked_bins"]["heading_undefined"] == int((~s.valid).sum())


def test_min_speed_filter():
    t = np.arange(1001) / RATE
    x = np.where(t < 10, 0.1 + 0.1 * t, 1.1)
    rec = make_recording(t, np.column_stack([x, 0 * t + 0.3]), {"a": [1.0]},
                         heading=np.zeros(t.size))
    s = build_session(rec, min_speed=0.05)
    slow = s.covariates["speed"] < 0.05
    assert slow.sum() > 100
    assert s.summary["masked_bins"]["below_min_speed"] == int(slow.sum())
    np.testing.assert_array_equal(s.valid, ~slow)


def test_spikes_outside_recording_dropped_and_counted():
    t, pos = _line(duration=10.0)
    rec = make_recording(t, pos, {"a": [-1.0, -0.5, 1.0, 2.0, 10.5], "b": [3.0]},
                         heading=np.zeros(t.size))
    s = build_session(rec)
    assert s.summary["dropped_spikes"] == {"before_start": 2, "after_end": 1, "total": 3}
    assert s.summary["dropped_spikes_by_unit"] == {"a": 3}
    assert int(s.counts.sum()) == 3


def test_restrict_keeps_only_valid_bins_of_one_environment():
    t, pos = _line(duration=20.0)
    pos = pos.copy()
    pos[(t > 3) & (t < 5)] = np.nan
    rng = np.random.default_rng(1)
    rec = make_recording(t, pos, {"a": np.sort(rng.uniform(0, 20, 400))},
                         heading=np.zeros(t.size),
                         epochs=[(0.0, 8.0, "one"), (9.0, 20.0, "two")])
    s = build_session(rec)
    r = s.restrict("one")
    rows = s.valid & (s.environment == 0)
    assert r.n_bins == int(rows.sum()) < int((s.environment == 0).sum())
    assert r.environments == ("one",) and r.valid.all() and np.all(r.environment == 0)
    np.testing.assert_array_equal(r.time, s.time[rows])
    np.testing.assert_array_equal(r.unit_counts(0), s.unit_counts(0)[rows])
    np.testing.assert_array_equal(r.covariates["position"], s.covariates["position"][rows])
    assert r.available_variables("one") == s.available_variables("one")
    assert s.summary["masked_bins"]["outside_epochs"] == int(((s.time >= 8) & (s.time < 9)).sum())
    with pytest.raises(SettingsError):
        s.restrict("three")


def test_available_variables_without_trials_and_constant_speed():
    t, pos = _line(duration=10.0)
    rec = make_recording(t, pos, {"a": [1.0]}, heading=np.mod(t, 2 * np.pi))
    s = build_session(rec)
    assert s.environments == (WHOLE_RECORDING,)
    # constant speed and constant y: position and speed are unavailable too
    assert s.available_variables(WHOLE_RECORDING) == ("heading",)
    why = s.unavailable_variables(0)
    assert why["distance"] == why["time"] == "no trials in the recording"
    assert "speed constant" in why["speed"]
    assert "along y" in why["position"]
    assert np.isnan(s.covariates["distance"]).all() and s.valid.all()


def test_all_variables_available_with_varied_behaviour():
    t = np.arange(2001) / RATE
    pos = np.column_stack([0.5 + 0.3 * np.sin(0.3 * t), 0.5 + 0.3 * np.sin(0.41 * t)])
    rec = make_recording(t, pos, {"a": [1.0]}, heading=np.mod(t, 2 * np.pi),
                         trials=[[0.0, 20.0], [20.0, 40.0]])
    s = build_session(rec)
    assert s.available_variables(0) == VARIABLES


def test_bad_settings_and_too_short():
    t, pos = _line(duration=2.0)
    rec = make_recording(t, pos, {"a": [1.0]})
    for kw in ({"bin_size": 0}, {"bin_size": -0.1}, {"bin_size": 5.0},
               {"speed_smoothing_s": -1}, {"velocity_smoothing_s": np.inf}, {"max_gap_s": np.nan}, {"min_speed": -0.1},
               {"heading_speed_threshold": -1}):
        with pytest.raises(SettingsError) as exc:
            build_session(rec, **kw)
        assert "\n" not in str(exc.value)
    short = make_recording(t[:3], pos[:3], {"a": [0.01]})
    with pytest.raises(InputError):
        build_session(short, bin_size=0.03)


def test_unit_lookup_errors():
    t, pos = _line(duration=2.0)
    s = build_session(make_recording(t, pos, {"a": [1.0]}))
    with pytest.raises(SettingsError):
        s.unit_counts("zz")
    with pytest.raises(SettingsError):
        s.unit_counts(3)


def test_missing_timestamps_count_as_gaps_and_summary_is_json():
    import json

    t, pos = _line(duration=20.0)
    keep = ~((t > 5.0) & (t < 8.0)) & ~((t > 12.0) & (t < 12.2))  # samples simply absent
    rec = make_recording(t[keep], pos[keep], {"a": [1.0, 25.0]}, heading=np.zeros(keep.sum()))
    s = build_session(rec)
    assert s.summary["tracking_gaps"] == {"interpolated": 1, "masked": 1}
    assert not s.valid[(s.time > 5.0) & (s.time < 8.0)].any()
    assert s.valid[(s.time > 12.0) & (s.time < 12.2)].all()
    text = json.dumps(s.summary)
    assert json.loads(text)["dropped_spikes"]["after_end"] == 1


def test_load_session_from_files(tmp_path):
    from encodex.io import write_bundle, write_nwb
    from encodex.session import load_session

    t, pos = _line(duration=10.0)
    rec = make_recording(t, pos, {"a": [1.0, 2.0], "q": []}, heading=np.zeros(t.size),
                         drop_empty_units=True, trials=[[0.0, 10.0]])
    nwb = write_nwb(rec, tmp_path / "x.nwb")
    npz = write_bundle(rec, tmp_path / "x.npz")
    a = load_session(nwb, bin_size=0.05)
    b = load_session(npz, bin_size=0.05)
    assert a.bin_size == b.bin_size == 0.05 and a.unit_ids == b.unit_ids == ("a",)
    np.testing.assert_array_equal(a.unit_counts(0), b.unit_counts(0))
    assert a.summary["objects"]["position"] == "processing/behavior/Position/position"
    c = load_session(nwb, object_paths={"position": "processing/behavior/Position/position"})
    assert c.n_bins == 500
