"""encodex.io.Signal and the Recording fields that hold an LFP and user variables."""

import numpy as np
import pytest

from encodex.errors import InputError
from encodex.io import Recording, Signal, make_recording


def test_signal_validates_and_freezes():
    s = Signal([0.0, 0.1, 0.2], [1.0, np.inf, 3.0])
    assert np.isnan(s.values[1])  # non-finite samples become unknown
    assert not s.values.flags.writeable and not s.times.flags.writeable
    assert s.rate_hz == pytest.approx(10.0)
    c = Signal([0.0, 1.0], [-np.pi / 2, 7.0], kind="circular")
    np.testing.assert_allclose(c.values, [1.5 * np.pi, 7.0 - 2 * np.pi])  # wrapped
    with pytest.raises(InputError, match="3 samples but 2 timestamps"):
        Signal([0.0, 1.0], [1.0, 2.0, 3.0])
    with pytest.raises(InputError, match="increasing"):
        Signal([0.0, 2.0, 1.0], [1.0, 2.0, 3.0])
    with pytest.raises(InputError, match="at least 2"):
        Signal([0.0], [1.0])
    with pytest.raises(InputError, match="kind"):
        Signal([0.0, 1.0], [1.0, 2.0], kind="planar")


def _base(**kw):
    ts = np.arange(0, 2, 0.02)
    return make_recording(ts, np.column_stack([ts / 4, ts / 5]), {"u": [0.5, 1.0]}, **kw)


def test_recording_carries_lfp_and_extra():
    sig = Signal([0.0, 1.0, 2.0], [0.0, 1.0, 2.0])
    rec = _base(lfp=sig, extra={"goal_bearing": Signal([0.0, 2.0], [0.0, 1.0], "circular")})
    assert rec.lfp is sig and rec.extra["goal_bearing"].kind == "circular"
    plain = _base()
    assert plain.lfp is None and plain.extra == {}


def test_recording_refuses_bad_extras():
    sig = Signal([0.0, 1.0], [0.0, 1.0])
    with pytest.raises(InputError, match="built into encodex"):
        _base(extra={"heading": sig})
    with pytest.raises(InputError, match="identifier"):
        _base(extra={"2nd goal": sig})
    with pytest.raises(InputError, match="Signal"):
        _base(extra={"goal": (np.zeros(2), np.zeros(2))})
    rec = _base()
    with pytest.raises(InputError, match="lfp must be"):
        Recording(rec.timestamps, rec.position, rec.unit_ids, rec.spike_times,
                  lfp=np.zeros(10))


def test_parse_extra_option():
    from encodex.errors import SettingsError
    from encodex.io import parse_extra_option

    assert parse_extra_option("goal_bearing=processing/behavior/goal_bearing:circular") == (
        "goal_bearing", "processing/behavior/goal_bearing", "circular")
    assert parse_extra_option(" pupil = processing/behavior/pupil ") == (
        "pupil", "processing/behavior/pupil", None)
    assert parse_extra_option("x=acquisition/x:interval")[2] == "interval"
    for bad in ("pupil", "=processing/x", "a b=processing/x", "x=processing/x:planar",
                "x="):
        with pytest.raises(SettingsError, match="NAME=OBJECT_PATH"):
            parse_extra_option(bad)
