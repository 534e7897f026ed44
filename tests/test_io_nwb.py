"""NWB reader and writer: conventions, search, object paths, timing forms, bad files."""

import datetime as dt

import h5py
import numpy as np
import pytest
from pynwb import NWBHDF5IO, NWBFile
from pynwb.behavior import CompassDirection, Position, SpatialSeries

from encodex.errors import FileFormatError, InputError, SettingsError
from encodex.io import make_recording, read_nwb, read_recording, write_nwb

T = np.arange(500) / 50.0  # 10 s at 50 Hz
XY = np.column_stack([0.2 + 0.05 * T, 0.5 + 0.02 * np.sin(T)])


def _nwbfile():
    return NWBFile(
        session_description="test file",
        identifier="test",
        session_start_time=dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc),
    )


def _series(name, data, unit, **timing):
    if not timing:
        timing = {"timestamps": T}
    return SpatialSeries(name=name, data=data, unit=unit, reference_frame="corner", **timing)


def _write(path, f):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(f)
    return path


def _units(f, trains):
    for i, st in enumerate(trains):
        f.add_unit(spike_times=st, id=10 + i)


def test_round_trip_and_provenance(tmp_path):
    rec = make_recording(
        T, XY, {"n1": [1.0, 2.5], "n2": [0.1, 3.3, 9.0]},
        heading=np.mod(T, 2 * np.pi), trials=[[0.0, 4.0], [4.0, 9.5]],
        epochs=[(0.0, 5.0, "box"), (5.0, 10.0, "ring")],
    )
    path = write_nwb(rec, tmp_path / "r.nwb")
    back = read_recording(path)
    assert back.unit_ids == ("n1", "n2")
    np.testing.assert_allclose(back.timestamps, T, rtol=0, atol=1e-9)
    np.testing.assert_allclose(back.position, XY)
    np.testing.assert_allclose(back.heading, rec.heading)
    np.testing.assert_allclose(back.trials, rec.trials)
    assert back.epochs == rec.epochs
    assert back.provenance["position"] == "processing/behavior/Position/position"
    assert back.provenance["heading"] == "processing/behavior/CompassDirection/heading"


def test_search_other_module_cm_unit_rate_timing_and_tags(tmp_path):
    f = _nwbfile()
    mod = f.create_processing_module("tracking", "camera tracking")
    mod.add(Position(spatial_series=_series("xy_cm", XY * 100, "centimeters",
                                            starting_time=2.0, rate=50.0)))
    _units(f, [[2.5, 3.0], [4.0]])
    f.add_epoch(start_time=2.0, stop_time=6.0, tags=["arena"])
    f.add_epoch(start_time=6.0, stop_time=11.0, tags=["track", "extra"])
    rec = read_nwb(_write(tmp_path / "s.nwb", f))
    np.testing.assert_allclose(rec.position, XY)
    np.testing.assert_allclose(rec.timestamps, 2.0 + T)
    assert rec.provenance["position"] == "processing/tracking/Position/xy_cm"
    assert rec.provenance["heading"].startswith("none")
    assert rec.heading is None
    assert rec.unit_ids == ("10", "11")  # ids kept as given
    assert [e[2] for e in rec.epochs] == ["arena", "track"]
    assert rec.trials.shape == (0, 2)


def test_user_named_paths_and_degrees(tmp_path):
    f = _nwbfile()
    beh = f.create_processing_module("behavior", "behaviour")
    beh.add(Position(spatial_series=_series("decoy", XY + 5.0, "meters")))
    other = f.create_processing_module("video", "second camera")
    other.add(Position(spatial_series=_series("better", XY, "meters")))
    other.add(CompassDirection(spatial_series=_series("hd", np.full(T.size, 90.0), "degrees")))
    _units(f, [[1.0]])
    path = _write(tmp_path / "u.nwb", f)
    rec = read_nwb(path)
    np.testing.assert_allclose(rec.position, XY + 5.0)  # convention: behavior module first
    rec = read_recording(path, position="processing/video/Position/better",
                         heading="processing/video/CompassDirection")
    np.testing.assert_allclose(rec.position, XY)
    np.testing.assert_allclose(rec.heading, np.pi / 2)
    assert rec.provenance["position"] == "processing/video/Position/better"
    assert rec.provenance["heading"] == "processing/video/CompassDirection/hd"
    with pytest.raises(FileFormatError) as exc:
        read_nwb(path, position="processing/video/Position/nothing")
    assert "better" in str(exc.value)  # lists what is there
    with pytest.raises(SettingsError):
        read_nwb(path, speed="processing/video")


def test_missing_position_names_where_it_looked(tmp_path):
    f = _nwbfile()
    f.create_processing_module("ecephys", "nothing behavioural")
    _units(f, [[1.0]])
    with pytest.raises(FileFormatError) as exc:
        read_nwb(_write(tmp_path / "m.nwb", f))
    msg = str(exc.value)
    assert "no position" in msg and "processing/ecephys" in msg and "acquisition" in msg
    assert "position=" in msg


def test_missing_units_table(tmp_path):
    f = _nwbfile()
    f.create_processing_module("behavior", "b").add(Position(spatial_series=_series("p", XY, "m")))
    with pytest.raises(FileFormatError) as exc:
        read_nwb(_write(tmp_path / "nu.nwb", f))
    assert "units" in str(exc.value)


def test_epochs_without_names(tmp_path):
    f = _nwbfile()
    f.create_processing_module("behavior", "b").add(Position(spatial_series=_series("p", XY, "m")))
    _units(f, [[1.0]])
    f.add_epoch(start_time=0.0, stop_time=5.0)
    with pytest.raises(FileFormatError) as exc:
        read_nwb(_write(tmp_path / "e.nwb", f))
    assert "environment column" in str(exc.value)


def test_not_nwb_truncated_and_plain_hdf5(tmp_path):
    text = tmp_path / "notes.nwb"
    text.write_text("this is not an HDF5 file")
    with pytest.raises(FileFormatError) as exc:
        read_recording(text)
    assert "not a readable NWB" in str(exc.value)

    rec = make_recording(T, XY, {"a": [1.0]})
    good = write_nwb(rec, tmp_path / "good.nwb")
    cut = tmp_path / "cut.nwb"
    cut.write_bytes(good.read_bytes()[:2000])
    with pytest.raises(FileFormatError):
        read_recording(cut)

    plain = tmp_path / "plain.nwb"
    with h5py.File(plain, "w") as h:
        h["x"] = np.arange(3)
    with pytest.raises(FileFormatError) as exc:
        read_recording(plain)
    assert "not NWB" in str(exc.value)

    with pytest.raises(InputError):
        read_recording(tmp_path / "absent.nwb")
    other = tmp_path / "data.csv"
    other.write_text("1,2")
    with pytest.raises(FileFormatError):
        read_recording(other)


def test_spike_times_read_in_one_bulk_read(tmp_path, monkeypatch):
    rng = np.random.default_rng(0)
    trains = {f"u{i}": np.sort(rng.uniform(0, 10, 20)) for i in range(40)}
    path = write_nwb(make_recording(T, XY, trains), tmp_path / "bulk.nwb")
    reads = []
    original = h5py.Dataset.__getitem__

    def spy(self, key):
        reads.append(self.name)
        return original(self, key)

    monkeypatch.setattr(h5py.Dataset, "__getitem__", spy)
    rec = read_nwb(path)
    assert rec.n_units == 40
    np.testing.assert_allclose(rec.spikes["u7"], trains["u7"])
    assert reads.count("/units/spike_times") == 1
    assert reads.count("/units/spike_times_index") == 1


def test_written_file_passes_nwbinspector(tmp_path):
    from nwbinspector import Importance, inspect_nwbfile

    rec = make_recording(
        T, XY, {"a": [1.0153, 2.2871], "b": [3.4467]}, heading=np.mod(T, 2 * np.pi),
        trials=[[0.0, 5.0]], epochs=[(0.0, 9.0, "box")],
    )
    path = write_nwb(rec, tmp_path / "inspect.nwb", spike_time_resolution_s=1 / 30000)
    found = list(inspect_nwbfile(nwbfile_path=str(path)))
    critical = [m for m in found if m.importance == Importance.CRITICAL]
    assert critical == []
    # only metadata suggestions remain (no experimenter or institution in simulated files)
    assert {m.importance for m in found} <= {Importance.BEST_PRACTICE_SUGGESTION}


def test_bare_spatial_series_in_acquisition(tmp_path):
    f = _nwbfile()
    f.add_acquisition(_series("head_xy", XY * 1000, "millimeters"))
    _units(f, [[1.0]])
    rec = read_nwb(_write(tmp_path / "bare.nwb", f))
    np.testing.assert_allclose(rec.position, XY)
    assert rec.provenance["position"] == "acquisition/head_xy"
    assert "bare" in rec.provenance["position_note"]


def test_heading_on_its_own_clock_is_resampled_on_the_circle(tmp_path):
    f = _nwbfile()
    beh = f.create_processing_module("behavior", "b")
    beh.add(Position(spatial_series=_series("p", XY, "meters")))
    th = np.arange(0, 10.0, 0.1)  # 10 Hz compass
    hd = np.mod(0.8 * th, 2 * np.pi)  # wraps through 0 at 7.85 s
    beh.add(CompassDirection(spatial_series=_series("h", hd, "radians", timestamps=th)))
    _units(f, [[1.0]])
    rec = read_nwb(_write(tmp_path / "clock.nwb", f))
    ok = np.isfinite(rec.heading)
    assert ok[T <= 9.9].all() and not ok[T > 9.9].any()
    err = np.angle(np.exp(1j * (rec.heading[ok] - 0.8 * T[ok])))
    assert np.max(np.abs(err)) < 1e-9


def test_mislabelled_units_and_empty_units_in_a_file(tmp_path):
    f = _nwbfile()
    beh = f.create_processing_module("behavior", "b")
    beh.add(Position(spatial_series=_series("p", XY * 100, "meters")))  # really centimetres
    _units(f, [[1.0]])
    with pytest.raises(InputError) as exc:
        read_nwb(_write(tmp_path / "cm.nwb", f))
    assert "convert it to metres" in str(exc.value)

    f = _nwbfile()
    beh = f.create_processing_module("behavior", "b")
    beh.add(Position(spatial_series=_series("p", XY, "meters")))
    beh.add(CompassDirection(spatial_series=_series("h", np.full(T.size, 200.0), "radians")))
    _units(f, [[1.0], []])
    path = _write(tmp_path / "empty.nwb", f)
    with pytest.raises(InputError) as exc:
        read_nwb(path, heading="processing/behavior/CompassDirection/h")
    assert "degrees" in str(exc.value)
    with pytest.raises(InputError) as exc:
        read_nwb(path, heading="processing/behavior/Position/p")  # wrong object: 2 columns
    assert "one angle per sample" in str(exc.value)
    f2 = _nwbfile()
    f2.create_processing_module("behavior", "b").add(
        Position(spatial_series=_series("p", XY, "meters")))
    _units(f2, [[1.0], []])
    path2 = _write(tmp_path / "empty2.nwb", f2)
    with pytest.raises(InputError) as exc:
        read_nwb(path2)
    assert "unit 11 has no spikes" in str(exc.value)
    rec = read_nwb(path2, drop_empty_units=True)
    assert rec.unit_ids == ("10",) and rec.provenance["dropped_empty_units"] == "11"


def test_trials_named_by_path(tmp_path):
    from pynwb.epoch import TimeIntervals

    f = _nwbfile()
    f.add_acquisition(_series("xy", XY, "meters"))
    _units(f, [[1.0]])
    runs = TimeIntervals(name="runs", description="running bouts")
    runs.add_interval(start_time=1.0, stop_time=3.0)
    runs.add_interval(start_time=4.0, stop_time=6.0)
    f.add_time_intervals(runs)
    f.add_trial(start_time=0.0, stop_time=9.0)
    path = _write(tmp_path / "runs.nwb", f)
    np.testing.assert_array_equal(read_nwb(path).trials, [[0.0, 9.0]])
    rec = read_nwb(path, trials="intervals/runs")
    np.testing.assert_array_equal(rec.trials, [[1.0, 3.0], [4.0, 6.0]])
    assert rec.provenance["trials"] == "intervals/runs"
    with pytest.raises(FileFormatError) as exc:
        read_nwb(path, trials="intervals/laps")
    assert "runs, trials" in str(exc.value)
