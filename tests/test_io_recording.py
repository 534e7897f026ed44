"""Validation of raw recordings: each kind of bad input raises a specific, one-line error."""

import numpy as np
import pytest

from encodex.errors import InputError
from encodex.io import Recording, make_recording


def _arrays(n=200, rate=50.0):
    t = np.arange(n) / rate
    pos = np.column_stack([0.1 + 0.001 * np.arange(n), 0.5 + 0.0 * t])
    return t, pos


def _rec(**kw):
    t, pos = _arrays()
    args = dict(timestamps=t, position=pos, spikes={"a": [0.5, 1.0], "b": [2.0]})
    args.update(kw)
    return make_recording(**args)


def _one_line(exc):
    msg = str(exc.value)
    assert "\n" not in msg
    assert ";" in msg  # problem; fix
    return msg


def test_valid_recording_is_frozen_and_sorted():
    rec = _rec(spikes={"a": [1.0, 0.5], "b": [2.0]}, heading=np.full(200, -0.5))
    assert rec.unit_ids == ("a", "b")
    np.testing.assert_array_equal(rec.spike_times[0], [0.5, 1.0])
    # heading given in [-pi, pi) is wrapped to [0, 2*pi)
    np.testing.assert_allclose(rec.heading, 2 * np.pi - 0.5)
    with pytest.raises(ValueError):
        rec.timestamps[0] = 5.0
    with pytest.raises(AttributeError):
        rec.unit_ids = ("z",)


def test_duplicated_timestamps():
    t, pos = _arrays()
    t[10] = t[9]
    with pytest.raises(InputError) as exc:
        _rec(timestamps=t, position=pos)
    assert "duplicated" in _one_line(exc)


def test_non_monotonic_timestamps():
    t, pos = _arrays()
    t[[10, 11]] = t[[11, 10]]
    with pytest.raises(InputError) as exc:
        _rec(timestamps=t, position=pos)
    assert "not increasing" in _one_line(exc)


def test_mismatched_lengths():
    t, pos = _arrays()
    with pytest.raises(InputError) as exc:
        _rec(timestamps=t[:-1], position=pos)
    assert "199 timestamps" in _one_line(exc)
    with pytest.raises(InputError) as exc:
        _rec(heading=np.zeros(150))
    assert "heading has 150 samples" in _one_line(exc)


def test_position_wrong_shape():
    t, pos = _arrays()
    with pytest.raises(InputError) as exc:
        _rec(position=pos[:, 0])
    assert "(n, 2)" in _one_line(exc)


def test_heading_in_degrees():
    with pytest.raises(InputError) as exc:
        _rec(heading=np.linspace(0, 359, 200))
    assert "degrees" in _one_line(exc)


def test_position_in_centimetres():
    t, pos = _arrays()
    with pytest.raises(InputError) as exc:
        _rec(position=pos * 100 * 150)
    assert "metres" in _one_line(exc)


def test_empty_unit_raises_or_is_dropped():
    with pytest.raises(InputError) as exc:
        _rec(spikes={"a": [0.5], "quiet": []})
    msg = _one_line(exc)
    assert "quiet" in msg and "drop_empty_units" in msg
    rec = _rec(spikes={"a": [0.5], "quiet": []}, drop_empty_units=True)
    assert rec.unit_ids == ("a",)
    assert rec.provenance["dropped_empty_units"] == "quiet"


def test_nan_spike_times():
    with pytest.raises(InputError) as exc:
        _rec(spikes={"a": [0.5, np.nan]})
    assert "unit a" in _one_line(exc)


def test_no_units():
    with pytest.raises(InputError):
        _rec(spikes={})


def test_overlapping_or_inverted_intervals():
    with pytest.raises(InputError) as exc:
        _rec(trials=[[0.0, 2.0], [1.0, 3.0]])
    assert "overlap" in _one_line(exc)
    with pytest.raises(InputError) as exc:
        _rec(trials=[[2.0, 1.0]])
    assert "stops before it starts" in _one_line(exc)
    with pytest.raises(InputError):
        _rec(epochs=[(0.0, 2.0, "a"), (1.5, 3.0, "b")])


def test_repeated_unit_ids():
    t, pos = _arrays()
    with pytest.raises(InputError) as exc:
        Recording(timestamps=t, position=pos, unit_ids=("a", "a"),
                  spike_times=(np.array([1.0]), np.array([2.0])))
    assert "repeated" in _one_line(exc)


def test_environments_in_order_of_first_appearance():
    rec = _rec(epochs=[(2.0, 3.0, "b"), (0.0, 1.0, "a"), (3.0, 3.5, "b")])
    assert rec.environments == ("b", "a")


def test_wrap_angle_is_half_open():
    from encodex.io.recording import wrap_angle

    out = wrap_angle([-1e-17, 2 * np.pi, -np.pi, 7.0, np.nan])
    assert np.all(out[:4] < 2 * np.pi) and np.all(out[:4] >= 0)
    np.testing.assert_allclose(out[:4], [0.0, 0.0, np.pi, 7.0 - 2 * np.pi])
    assert np.isnan(out[4])
    rec = _rec(heading=np.full(200, -1e-17))
    assert np.all(rec.heading == 0.0)
