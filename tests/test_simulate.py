"""Ground-truth simulator: determinism, truth table, behaviour, tuning, spike statistics."""

import numpy as np
import pandas as pd
import pytest

from encodex.errors import SettingsError
from encodex.io import read_recording
from encodex.session import build_session
from encodex.simulate import SPIKE_SAMPLING_HZ, _thin, simulate_recording, simulate_to_files
from encodex.variables import VARIABLES, label, parse_label

DUR = 300.0


@pytest.fixture(scope="module")
def sim():
    rec, truth = simulate_recording(seed=11, n_cells=40, duration_s=DUR)
    return rec, truth, build_session(rec)


def test_deterministic_for_a_seed():
    a, ta = simulate_recording(seed=3, n_cells=5, duration_s=30.0)
    b, tb = simulate_recording(seed=3, n_cells=5, duration_s=30.0)
    c, _ = simulate_recording(seed=4, n_cells=5, duration_s=30.0)
    pd.testing.assert_frame_equal(ta, tb)
    for x, y in zip(a.spike_times, b.spike_times):
        np.testing.assert_array_equal(x, y)
    np.testing.assert_array_equal(a.position, b.position)
    assert not np.array_equal(a.spike_times[0], c.spike_times[0])


def test_truth_table(sim):
    rec, truth, _ = sim
    assert list(truth.columns[:7]) == ["unit", "environment", "variables", "silent", "changed",
                                       "mean_rate_hz", "n_spikes"]
    assert len(truth) == 40 * 2
    assert set(truth.environment) == {"room_a", "room_b"}
    for lab in truth.variables:
        assert label(parse_label(lab)) == lab  # canonical labels
    first = truth[truth.environment == "room_a"]
    present = set().union(*(set(parse_label(v)) for v in first.variables))
    assert present == set(VARIABLES)
    assert "none" in set(first.variables)
    assert any("+" in v for v in first.variables)
    assert not first.silent.any() and not first.changed.any()
    assert first.mean_rate_hz.between(1.0, 4.0).all()
    second = truth[truth.environment == "room_b"]
    assert second.changed.sum() >= 3
    silent = second[second.silent]
    assert (silent.variables == "none").all() and (silent.n_spikes == 0).all()
    assert (silent.mean_rate_hz == 0).all()
    # n_spikes matches the spikes inside each epoch
    for (a, b, name) in rec.epochs:
        for _, row in truth[truth.environment == name].iterrows():
            st = rec.spikes[row.unit]
            assert np.count_nonzero((st >= a) & (st < b)) == row.n_spikes


def test_mean_rates_match_truth(sim):
    _, truth, _ = sim
    live = truth[~truth.silent]
    expect = live.mean_rate_hz * DUR
    z = (live.n_spikes - expect) / np.sqrt(expect)
    assert np.all(np.abs(z) < 4.5)
    assert abs(z.mean()) < 0.5


def test_behaviour_is_realistic(sim):
    rec, _, s = sim
    finite = np.isfinite(rec.position[:, 0])
    assert np.all((rec.position[finite] >= 0) & (rec.position[finite] <= 1.0))
    assert np.all((rec.heading[finite] >= 0) & (rec.heading[finite] < 2 * np.pi))
    # trials tile each epoch and restart the trial clock
    for a, b, _ in rec.epochs:
        inside = rec.trials[(rec.trials[:, 0] >= a) & (rec.trials[:, 1] <= b)]
        assert inside[0, 0] == a and inside[-1, 1] == b
        np.testing.assert_allclose(inside[1:, 0], inside[:-1, 1])
    sp = s.covariates["speed"][s.valid]
    assert 0.1 < np.mean(sp < 0.03) < 0.5  # stops
    assert 0.1 < np.median(sp) < 0.3  # runs
    # distance and time since trial start decouple: at ~10 s into a trial the distance
    # travelled varies widely
    d = s.covariates["distance"][s.valid & (np.abs(s.covariates["time"] - 10) < 0.5)]
    assert np.std(d) / np.mean(d) > 0.3
    # coverage of the box
    h, _, _ = np.histogram2d(*s.covariates["position"][s.valid].T, bins=4, range=[[0, 1]] * 2)
    assert np.all(h > 0.01 * h.sum())
    # tracking gaps: breaks and dropouts
    assert s.summary["tracking_gaps"]["masked"] >= 3
    assert s.summary["tracking_gaps"]["interpolated"] >= 1


def _rate_ratio(s, unit, inside, outside):
    y = s.unit_counts(unit)
    return (y[inside].sum() / inside.sum()) / max(y[outside].sum() / outside.sum(), 1e-9)


def test_tuning_is_visible_in_the_binned_session(sim):
    _, truth, s = sim
    r = s.restrict("room_a")
    cov = r.covariates
    rows = truth[(truth.environment == "room_a")]
    checked = 0
    for _, c in rows.iterrows():
        vs = parse_label(c.variables)
        if vs == ("position",):
            d = np.hypot(cov["position"][:, 0] - c.field_x, cov["position"][:, 1] - c.field_y)
            assert _rate_ratio(r, c.unit, d < c.field_sigma_m, d > 3 * c.field_sigma_m) > 3
            checked += 1
        elif vs == ("heading",):
            y = r.unit_counts(c.unit)
            vec = np.sum(y * np.exp(1j * cov["heading"])) / y.sum()
            occ = np.mean(np.exp(1j * cov["heading"]))
            vec = vec - occ
            assert abs(np.angle(vec * np.exp(-1j * c.pref_heading_rad))) < 0.5
            checked += 1
        elif vs == ("time",):
            dt = np.abs(cov["time"] - c.time_peak_s)
            assert _rate_ratio(r, c.unit, dt < c.time_width_s, dt > 3 * c.time_width_s) > 2
            checked += 1
        elif vs == ("distance",):
            dd = np.abs(cov["distance"] - c.distance_peak_m)
            assert _rate_ratio(r, c.unit, dd < c.distance_width_m,
                               dd > 3 * c.distance_width_m) > 2
            checked += 1
        elif vs == ("speed",):
            fast, slow = cov["speed"] > 0.25, cov["speed"] < 0.03
            ratio = _rate_ratio(r, c.unit, fast, slow)
            assert ratio > 1.8 if c.speed_slope > 0 else ratio < 1 / 1.8
            checked += 1
        elif vs == ():
            d = np.hypot(cov["position"][:, 0] - 0.5, cov["position"][:, 1] - 0.5)
            assert 0.7 < _rate_ratio(r, c.unit, d < 0.2, d > 0.4) < 1.4
            checked += 1
    assert checked >= 20


def test_thinning_follows_the_rate():
    rng = np.random.default_rng(0)
    t = np.arange(0, 200.0, 0.01)
    rate = 20.0 * t / 200.0  # ramp 0 -> 20 Hz
    spikes = _thin(rng, t, rate)
    first, second = np.sum(spikes < 100), np.sum(spikes >= 100)
    assert abs(first - 500) < 4 * np.sqrt(500)
    assert abs(second - 1500) < 4 * np.sqrt(1500)
    ticks = spikes * SPIKE_SAMPLING_HZ
    np.testing.assert_allclose(ticks, np.round(ticks), atol=1e-6)
    assert np.all(np.diff(spikes) > 0)


def test_simulate_to_files(tmp_path):
    paths = simulate_to_files(tmp_path / "out", seed=2, n_cells=4, duration_s=20.0,
                              trial_duration_s=(5.0, 10.0), break_s=5.0)
    assert all(p.exists() for p in paths.values())
    truth = pd.read_csv(paths["truth"])
    assert len(truth) == 8
    nwb, npz = read_recording(paths["nwb"]), read_recording(paths["npz"])
    assert nwb.unit_ids == npz.unit_ids == tuple(truth.unit.unique())
    for a, b in zip(nwb.spike_times, npz.spike_times):
        np.testing.assert_array_equal(a, b)


def test_bad_settings():
    with pytest.raises(SettingsError):
        simulate_recording(n_cells=0)
    with pytest.raises(SettingsError):
        simulate_recording(duration_s=1.0)
    with pytest.raises(SettingsError):
        simulate_recording(environments=("a", "a"))
    with pytest.raises(SettingsError):
        simulate_recording(tracking_rate_hz=30.0)


def test_without_compass_sessions_use_movement_direction(tmp_path):
    rec, _ = simulate_recording(seed=5, n_cells=3, duration_s=60.0, with_compass=False)
    assert rec.heading is None
    s = build_session(rec)
    assert s.summary["heading_source"] == "movement direction"
    slow = s.covariates["speed"] < 0.03
    assert np.isnan(s.covariates["heading"][slow]).all()
    known = np.isfinite(s.covariates["position"][:, 0])
    expect = int(np.sum(~(s.covariates["speed"] >= 0.03) & known))
    assert s.summary["masked_bins"]["heading_undefined"] == expect > 0.05 * s.n_bins


def test_wandering_drift_moves_the_rate_over_minutes_and_is_reproducible():
    from encodex.simulate import binned_counts

    n, dt = 72_000, 0.05  # one hour
    clock = np.arange(n) * dt
    cov = {"speed": np.full(n, 0.2)}

    def log_window_rates(**kw):
        y = binned_counts(cov, clock, dt, (), np.random.default_rng(4), mean_rate_hz=4.0, **kw)
        return np.log(y.reshape(-1, 6000).sum(axis=1) / 300.0)  # 5-minute windows

    # Poisson noise alone moves the log of a 5-minute rate by ~0.03; the wander by ~0.5.
    assert np.std(log_window_rates()) < 0.1
    assert np.std(log_window_rates(modulation="drift", drift_tau_s=600.0)) > 0.2
    # Same generator state, same counts.
    a = binned_counts(cov, clock, dt, (), np.random.default_rng(4), mean_rate_hz=4.0,
                      modulation="drift", drift_tau_s=600.0)
    b = binned_counts(cov, clock, dt, (), np.random.default_rng(4), mean_rate_hz=4.0,
                      modulation="drift", drift_tau_s=600.0)
    np.testing.assert_array_equal(a, b)


def test_per_variable_strengths_scale_each_log_gain():
    from encodex.simulate import binned_counts

    n, dt = 2000, 0.05
    rng = np.random.default_rng(0)
    cov = {"speed": rng.uniform(0, 0.4, n), "heading": rng.uniform(0, 2 * np.pi, n)}
    clock = np.arange(n) * dt

    def counts(**kw):
        return binned_counts(cov, clock, dt, ("heading", "speed"), np.random.default_rng(9),
                             mean_rate_hz=3.0, **kw)

    # Equal strengths given per variable: the same counts as one strength for all.
    np.testing.assert_array_equal(counts(strength=0.5),
                                  counts(strengths={"heading": 0.5, "speed": 0.5}))
    # Speed switched off: the counts no longer follow speed.
    y = counts(strength=1.0, strengths={"speed": 0.0})
    fast = cov["speed"] > 0.3
    slow = cov["speed"] < 0.1
    z = counts(strength=1.0)
    assert abs(y[fast].mean() - y[slow].mean()) < abs(z[fast].mean() - z[slow].mean())
