"""User-defined variables: egocentric bearing, Session.with_variable, NWB/npz extra series."""

import numpy as np
import pytest

from encodex.design import CircularBasis, IntervalBasis, build_design, default_bases
from encodex.errors import FileFormatError, InputError, SettingsError
from encodex.fit import fit_poisson
from encodex.io import Signal, make_recording, read_recording, write_bundle, write_nwb
from encodex.session import build_session, egocentric_bearing, load_session
from encodex.simulate import simulate_recording
from encodex.variables import VARIABLES, label

HALF_PI = np.pi / 2


def _err(a, b):
    return np.abs(np.angle(np.exp(1j * (np.asarray(a) - np.asarray(b)))))


def test_egocentric_bearing_by_hand():
    pos = np.array([[0.0, 0.0], [0.0, 0.0], [0.0, 0.0], [0.0, 0.0], [1.0, 1.0], [0.5, 0.5]])
    heading = np.array([0.0, 0.0, HALF_PI, 0.0, np.pi, 0.3])
    goals = [(1.0, 0.0), (0.0, 1.0), (0.0, 1.0), (-1.0, 0.0), (1.0, 0.0), (0.5, 0.5)]
    expect = [0.0, HALF_PI, 0.0, np.pi, HALF_PI, np.nan]
    # (1, 1) facing -x: the goal (1, 0) is at -y, i.e. to the animal's left (pi/2)
    got = [egocentric_bearing(pos[i:i + 1], heading[i:i + 1], g)[0] for i, g in enumerate(goals)]
    np.testing.assert_allclose(np.nan_to_num(got, nan=-1), np.nan_to_num(expect, nan=-1),
                               atol=1e-12)
    # goal to the right: 3*pi/2, in [0, 2*pi)
    r = egocentric_bearing([[0.0, 0.0]], [0.0], (0.0, -1.0))
    assert r[0] == pytest.approx(1.5 * np.pi)
    h = egocentric_bearing(np.array([[0.0, 0.0], [np.nan, 0.0]]), [0.0, 0.0], (1.0, 1.0))
    assert np.isnan(h[1]) and np.isfinite(h[0])


def test_egocentric_bearing_errors():
    with pytest.raises(InputError, match="shape"):
        egocentric_bearing(np.zeros(3), np.zeros(3), (0, 0))
    with pytest.raises(InputError, match="heading has"):
        egocentric_bearing(np.zeros((3, 2)), np.zeros(2), (0, 0))
    with pytest.raises(InputError, match="goal_xy"):
        egocentric_bearing(np.zeros((3, 2)), np.zeros(3), (0, np.nan))


@pytest.fixture(scope="module")
def sim_session():
    rec, _ = simulate_recording(seed=7, n_cells=2, duration_s=240.0, environments=("a",))
    return build_session(rec)


def test_with_variable_stores_kind_and_masks_unknown_bins(sim_session):
    s = sim_session
    bearing = egocentric_bearing(s.covariates["position"], s.covariates["heading"], (0.8, 0.2))
    s2 = s.with_variable("goal_bearing", bearing, kind="circular")
    assert s2.variable_kinds == {"goal_bearing": "circular"}
    assert s2.kinds["goal_bearing"] == "circular" and s2.kinds["position"] == "planar"
    assert s2.available_variables(0) == VARIABLES + ("goal_bearing",)
    assert label(s2.available_variables(0)) .endswith("+time+goal_bearing")
    assert "goal_bearing" not in s.covariates  # the original is untouched
    assert not (s2.valid & ~np.isfinite(s2.covariates["goal_bearing"])).any()
    np.testing.assert_array_equal(s2.valid, s.valid & np.isfinite(bearing))
    assert s2.summary["extra_variables"]["goal_bearing"]["kind"] == "circular"
    rows = np.asarray(s2.valid)
    cov = {v: np.asarray(s2.covariates[v])[rows] for v in ("speed", "goal_bearing")}
    bases = default_bases(cov, kinds=s2.kinds)
    assert isinstance(bases["goal_bearing"], CircularBasis)
    assert isinstance(bases["speed"], IntervalBasis)
    r = s2.restrict(0)
    assert r.variable_kinds == {"goal_bearing": "circular"}
    assert np.isfinite(r.covariates["goal_bearing"]).all()


def test_with_variable_resamples_times_and_values(sim_session):
    s = sim_session
    # an angle turning at 1 rad/s, sampled at 10 Hz, crossing 0 = 2*pi many times
    t = np.arange(s.time[0] - 1.0, s.time[-1] + 1.0, 0.1)
    s2 = s.with_variable("turn", (t, np.mod(t, 2 * np.pi)), kind="circular")
    v = np.asarray(s2.covariates["turn"])
    assert _err(v, s.time).max() < 1e-9  # interpolated along the circle, not across 0
    # an interval variable with a hole longer than max_gap_s: unknown inside the hole
    t2 = t[(t < 50.0) | (t > 52.0)]
    s3 = s.with_variable("level", (t2, 0.1 * t2), kind="interval")
    lv = np.asarray(s3.covariates["level"])
    hole = (s.time > 50.05) & (s.time < 51.95)
    assert np.isnan(lv[hole]).all()
    ok = ~np.isnan(lv)
    np.testing.assert_allclose(lv[ok], 0.1 * s.time[ok], atol=1e-9)
    assert s3.summary["masked_bins"]["extra_unknown"] == int((~ok).sum())


def test_with_variable_ranges(sim_session):
    s = sim_session
    x = np.linspace(-1.0, 11.0, s.n_bins)
    s2 = s.with_variable("level", x, range=(0.0, 10.0))
    v = np.asarray(s2.covariates["level"])
    assert np.isnan(v[(x < 0) | (x > 10)]).all() and np.isfinite(v[(x >= 0) & (x <= 10)]).all()
    assert s2.variable_ranges == {"level": (0.0, 10.0)}
    deg = np.full(s.n_bins, 90.0)
    deg[:10] = 270.0
    s3 = s.with_variable("cue_angle", deg, kind="circular", range=(0.0, 360.0))
    a = np.asarray(s3.covariates["cue_angle"])
    assert a[10] == pytest.approx(HALF_PI) and a[0] == pytest.approx(1.5 * np.pi)


def test_with_variable_errors(sim_session):
    s = sim_session
    v = np.zeros(s.n_bins)
    with pytest.raises(InputError, match="built into encodex"):
        s.with_variable("speed", v)
    with pytest.raises(InputError, match="built into encodex"):
        s.with_variable("phase", v)
    with pytest.raises(InputError, match="identifier"):
        s.with_variable("goal bearing", v)
    with pytest.raises(InputError, match="kind"):
        s.with_variable("x1", v, kind="planar")
    with pytest.raises(InputError, match="bins"):
        s.with_variable("x1", v[:-1])
    with pytest.raises(InputError, match="strictly increasing"):
        s.with_variable("x1", (np.array([0.0, 0.0, 1.0]), np.zeros(3)))
    with pytest.raises(InputError, match="upper > lower"):
        s.with_variable("x1", v, range=(1.0, 0.0))
    s2 = s.with_variable("x1", v + np.arange(s.n_bins))
    with pytest.raises(InputError, match="already has"):
        s2.with_variable("x1", v)
    # a constant user variable is unavailable, with the reason
    s3 = s.with_variable("flat", v)
    assert "flat" not in s3.available_variables(0)
    assert "constant" in s3.unavailable_variables(0)["flat"]


def test_a_bearing_tuned_cell_is_recovered(sim_session):
    """Counts drawn from a von Mises tuning to the goal's egocentric bearing are fitted back."""
    s = sim_session
    goal = (0.8, 0.2)
    bearing = egocentric_bearing(s.covariates["position"], s.covariates["heading"], goal)
    s2 = s.with_variable("goal_bearing", bearing, kind="circular")
    rows = np.flatnonzero(s2.valid)
    b = np.asarray(s2.covariates["goal_bearing"])[rows]
    pref, kappa = 2.0, 1.2
    rate = 3.0 * np.exp(kappa * np.cos(b - pref)) / np.i0(kappa)
    y = np.random.default_rng(3).poisson(rate * s.bin_size)
    cov = {"goal_bearing": b}
    design = build_design(cov, default_bases(cov, kinds=s2.kinds))
    fit = fit_poisson(design, y, offset=np.log(s.bin_size))
    r = fit.response("goal_bearing", n=360)
    centroid = np.angle(np.sum(np.exp(r.log_modulation) * np.exp(1j * r.grid)))
    assert _err(centroid, pref) < 0.15
    assert np.ptp(r.log_modulation) == pytest.approx(2 * kappa, rel=0.3)


# --------------------------------------------------------------------------- files


def _recording_with_extra():
    ts = np.arange(0, 60, 0.02)
    pos = np.column_stack([0.5 + 0.3 * np.cos(ts / 5), 0.5 + 0.3 * np.sin(ts / 3)])
    heading = np.mod(ts / 4, 2 * np.pi)
    bearing = egocentric_bearing(pos, heading, (0.8, 0.2))
    tv = np.arange(0, 60, 0.1)
    extra = {
        "goal_bearing": Signal(ts, bearing, kind="circular", source="bearing"),
        "pupil": Signal(tv, 1.0 + 0.01 * tv, kind="interval", source="pupil", unit="mm"),
    }
    spikes = {"u0": np.sort(np.random.default_rng(1).uniform(0, 60, 300))}
    return make_recording(ts, pos, spikes, heading=heading, extra=extra)


def test_extra_series_roundtrip_nwb(tmp_path):
    rec = _recording_with_extra()
    p = write_nwb(rec, tmp_path / "x.nwb")
    back = read_recording(p, extra={"goal_bearing": "processing/behavior/goal_bearing",
                                    "pupil": "processing/behavior/pupil"})
    assert back.extra["goal_bearing"].kind == "circular"  # unit radians -> circular
    assert back.extra["pupil"].kind == "interval"
    np.testing.assert_allclose(back.extra["goal_bearing"].values, rec.extra["goal_bearing"].values)
    assert "goal_bearing" in back.provenance["extra:goal_bearing"]
    s = build_session(back)
    assert s.variable_kinds == {"goal_bearing": "circular", "pupil": "interval"}
    assert s.available_variables(0) == ("position", "heading", "speed", "goal_bearing", "pupil")
    np.testing.assert_allclose(np.asarray(s.covariates["pupil"])[s.valid],
                               1.0 + 0.01 * s.time[s.valid], atol=1e-9)
    # the kind can be forced; load_session passes the options through
    s2 = load_session(p, extra={"pupil": "processing/behavior/pupil"},
                      extra_kinds={"pupil": "circular"})
    assert s2.variable_kinds == {"pupil": "circular"}
    # without extra= nothing more is read
    assert read_recording(p).extra == {}


def test_extra_series_errors(tmp_path):
    p = write_nwb(_recording_with_extra(), tmp_path / "x.nwb")
    with pytest.raises(FileFormatError, match="not a TimeSeries"):
        read_recording(p, extra={"bad": "processing/behavior/Position"})
    with pytest.raises(FileFormatError, match="no object"):
        read_recording(p, extra={"bad": "processing/behavior/nothing"})
    with pytest.raises(SettingsError, match="no such extra variable"):
        read_recording(p, extra_kinds={"pupil": "circular"})
    with pytest.raises(InputError, match="built into encodex"):
        read_recording(p, extra={"speed": "processing/behavior/pupil"})


def test_extra_series_roundtrip_bundle(tmp_path):
    rec = _recording_with_extra()
    back = read_recording(write_bundle(rec, tmp_path / "x.npz"))
    assert {k: v.kind for k, v in back.extra.items()} == {"goal_bearing": "circular",
                                                          "pupil": "interval"}
    np.testing.assert_array_equal(back.extra["pupil"].values, rec.extra["pupil"].values)
