"""Simulator options: LFP with phase-locked cells, steady runner; the defaults are unchanged."""

import numpy as np
import pytest

from encodex.errors import SettingsError
from encodex.rhythm import lfp_phase
from encodex.simulate import _simulate_lfp, simulate_recording


def test_lfp_option_leaves_the_rest_of_the_simulation_unchanged():
    a, ta = simulate_recording(seed=4, n_cells=3, duration_s=30.0, environments=("a",))
    b, tb = simulate_recording(seed=4, n_cells=3, duration_s=30.0, environments=("a",),
                               lfp_rate_hz=250.0, n_phase_cells=2)
    assert a.lfp is None and b.lfp is not None
    np.testing.assert_array_equal(a.position, b.position)
    for x, y in zip(a.spike_times, b.spike_times[:3]):
        np.testing.assert_array_equal(x, y)
    assert b.unit_ids == a.unit_ids + ("c003", "c004")
    phase_rows = tb[tb.variables == "phase"]
    assert list(phase_rows.unit) == ["c003", "c004"]
    assert phase_rows.pref_phase_rad.between(0, 2 * np.pi).all()
    assert phase_rows.phase_kappa.between(0.8, 1.5).all()
    assert tb.loc[tb.variables != "phase", "pref_phase_rad"].isna().all()
    assert "pref_phase_rad" not in ta.columns


def test_simulated_lfp_phase_is_the_theta_phase():
    rng = np.random.default_rng(0)
    t, v, phase = _simulate_lfp(rng, 60.0, 250.0, 8.0)
    tt, pp = lfp_phase(t, v)
    ok = np.isfinite(pp)
    err = np.angle(np.exp(1j * (pp[ok] - phase[ok])))
    assert abs(np.mean(err)) < 0.02  # no lag
    assert np.sqrt(np.mean(err**2)) < 0.12  # noise and the slow component cost little
    assert 1e-5 < np.std(v) < 1e-3  # about 100 microvolts


def test_phase_locked_spikes_prefer_their_phase():
    rec, truth = simulate_recording(seed=2, n_cells=1, duration_s=120.0, environments=("a",),
                                    lfp_rate_hz=250.0, n_phase_cells=1)
    row = truth[truth.variables == "phase"].iloc[0]
    st = rec.spikes[row.unit]
    rng = np.random.default_rng([2, 8])
    t, _, phase = _simulate_lfp(rng, float(rec.timestamps[-1]), 250.0, 8.0)
    sp = np.interp(st, t, phase)
    resultant = np.mean(np.exp(1j * (sp - row.pref_phase_rad)))
    assert abs(np.angle(resultant)) < 0.15
    # von Mises mean resultant length I1(k)/I0(k): 0.37-0.6 for kappa 0.8-1.5
    assert 0.3 < abs(resultant) < 0.7


def test_steady_runner_keeps_a_nearly_constant_speed():
    rec, _ = simulate_recording(seed=1, n_cells=1, duration_s=60.0, environments=("a",),
                                steady_speed_m_s=0.2, dropouts=False, tracking_noise_m=0.0)
    v = np.hypot(*np.diff(rec.position, axis=0).T) / np.diff(rec.timestamps)
    inner = v[50:-50]
    assert np.median(inner) == pytest.approx(0.2, rel=0.1)
    # 3% speed fluctuations (wall reflections aside): a stop-and-run animal spans a factor
    # of ten or more between these percentiles
    assert np.percentile(inner, 90) / np.percentile(inner, 10) < 1.2
    with pytest.raises(SettingsError, match="steady_speed"):
        simulate_recording(seed=1, n_cells=1, duration_s=20.0, steady_speed_m_s=-1.0)
    with pytest.raises(SettingsError, match="lfp_rate_hz"):
        simulate_recording(seed=1, n_cells=1, duration_s=20.0, n_phase_cells=2)
