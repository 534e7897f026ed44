"""npz bundle: round trip, hand-made bundles, and bad files."""

import numpy as np
import pytest

from encodex.errors import FileFormatError, InputError, SettingsError
from encodex.io import make_recording, read_bundle, read_recording, write_bundle

T = np.arange(300) / 30.0
XY = np.column_stack([0.3 + 0.01 * T, 0.4 + 0.0 * T])


def test_round_trip(tmp_path):
    rec = make_recording(
        T, XY, {"x1": [0.5, 1.5], "x2": [2.0, 3.0, 4.0]}, heading=np.full(T.size, 1.0),
        trials=[[0.0, 4.0], [5.0, 9.0]], epochs=[(0.0, 5.0, "a"), (5.0, 10.0, "b")],
        provenance={"note": "made in a test"},
    )
    path = write_bundle(rec, tmp_path / "rec")
    assert path.suffix == ".npz"
    back = read_recording(path)
    assert back.unit_ids == rec.unit_ids
    for a, b in zip(back.spike_times, rec.spike_times):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(back.position, rec.position)
    np.testing.assert_array_equal(back.heading, rec.heading)
    np.testing.assert_array_equal(back.trials, rec.trials)
    assert back.epochs == rec.epochs
    assert back.provenance["note"] == "made in a test"
    # plain arrays only: loads without pickles
    with np.load(path, allow_pickle=False) as z:
        assert z["unit_ids"].dtype.kind == "U"


def test_hand_made_minimal_bundle(tmp_path):
    path = tmp_path / "hand.npz"
    np.savez(path, tracking_time=T, position=XY, unit_ids=np.array(["7", "9"]),
             spike_times=np.array([1.0, 2.0, 3.0]), spike_index=np.array([2, 3]))
    rec = read_bundle(path)
    assert rec.spikes["7"].tolist() == [1.0, 2.0]
    assert rec.spikes["9"].tolist() == [3.0]
    assert rec.heading is None and rec.epochs == () and rec.trials.shape == (0, 2)


def test_missing_key(tmp_path):
    path = tmp_path / "m.npz"
    np.savez(path, tracking_time=T, position=XY)
    with pytest.raises(FileFormatError) as exc:
        read_bundle(path)
    assert "unit_ids" in str(exc.value) and "spike_index" in str(exc.value)


def test_bad_index(tmp_path):
    path = tmp_path / "i.npz"
    np.savez(path, tracking_time=T, position=XY, unit_ids=np.array(["a", "b"]),
             spike_times=np.array([1.0, 2.0, 3.0]), spike_index=np.array([2, 5]))
    with pytest.raises(FileFormatError) as exc:
        read_bundle(path)
    assert "spike_index" in str(exc.value)


def test_mismatched_lengths_in_bundle(tmp_path):
    path = tmp_path / "l.npz"
    np.savez(path, tracking_time=T[:-5], position=XY, unit_ids=np.array(["a"]),
             spike_times=np.array([1.0]), spike_index=np.array([1]))
    with pytest.raises(InputError):
        read_bundle(path)


def test_truncated_and_pickled(tmp_path):
    rec = make_recording(T, XY, {"a": [1.0]})
    good = write_bundle(rec, tmp_path / "g.npz")
    cut = tmp_path / "cut.npz"
    cut.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(FileFormatError) as exc:
        read_bundle(cut)
    assert "truncated" in str(exc.value)
    pick = tmp_path / "p.npz"
    np.savez(pick, tracking_time=T, position=XY, unit_ids=np.array([{"a": 1}], dtype=object),
             spike_times=np.array([1.0]), spike_index=np.array([1]))
    with pytest.raises(FileFormatError) as exc:
        read_bundle(pick)
    assert "pickled" in str(exc.value)


def test_object_paths_rejected_for_bundles(tmp_path):
    path = write_bundle(make_recording(T, XY, {"a": [1.0]}), tmp_path / "o.npz")
    with pytest.raises(SettingsError):
        read_recording(path, position="processing/behavior/Position/p")
