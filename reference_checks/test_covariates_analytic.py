"""Covariates of analytic trajectories against their closed-form values.

Sources:
- Straight line at constant velocity v: speed |v|, path length |v| * t, direction atan2(vy, vx)
  (elementary kinematics, common practice, no source).
- Circle of radius R at angular velocity w: speed R * w, arc length R * w * t, direction of
  motion w * t + pi/2 for counter-clockwise motion (elementary kinematics, common practice,
  no source).
- Gaussian smoothing (standard deviation s) of a sinusoid of angular frequency w multiplies its
  amplitude by exp(-w**2 * s**2 / 2): the Fourier transform of a Gaussian is a Gaussian
  (Bracewell, R. N., The Fourier Transform and Its Applications, McGraw-Hill, 3rd ed. 2000,
  ch. 2 and 6). A smoothed circular velocity is therefore a circle of speed
  R * w * exp(-w**2 * s**2 / 2), with unchanged direction. Speed is the norm of the velocity
  smoothed at ``velocity_smoothing_s``, then smoothed at ``speed_smoothing_s``: on the circle
  that norm is already constant, so only the first kernel shrinks it.
- Central differences of a circle sampled every h: |p(t+h) - p(t-h)| / (2h) = R sin(w h) / h
  (trigonometric identity, common practice, no source).
"""

import numpy as np
import pytest

from encodex.io import make_recording
from encodex.session import build_session

TRACK_HZ = 200.0
BIN = 0.02


def _t(duration):
    return np.arange(int(round(duration * TRACK_HZ)) + 1) / TRACK_HZ


@pytest.mark.parametrize("smoothing", [0.0, 0.2, 0.5])
@pytest.mark.parametrize("velocity_smoothing", [0.0, 0.1])
def test_straight_line_constant_speed(smoothing, velocity_smoothing):
    t = _t(30.0)
    v = np.array([0.03, -0.04])  # 0.05 m/s at atan2(-4, 3)
    pos = np.array([0.2, 1.5]) + t[:, None] * v
    trials = [[0.0, 12.0], [12.0, 30.0]]
    rec = make_recording(t, pos, {"a": [1.0]}, trials=trials)
    s = build_session(rec, bin_size=BIN, speed_smoothing_s=smoothing,
                      velocity_smoothing_s=velocity_smoothing)
    assert s.valid.all()
    np.testing.assert_allclose(s.covariates["speed"], 0.05, rtol=1e-9)
    np.testing.assert_allclose(s.covariates["heading"], np.mod(np.arctan2(-4, 3), 2 * np.pi),
                               atol=1e-9)
    start = np.where(s.time < 12.0, 0.0, 12.0)
    np.testing.assert_allclose(s.covariates["time"], s.time - start, atol=1e-12)
    np.testing.assert_allclose(s.covariates["distance"], 0.05 * (s.time - start), rtol=1e-9)


def test_circle_constant_angular_velocity_unsmoothed():
    R, w = 0.4, 0.5  # m, rad/s
    t = _t(40.0)
    pos = 0.5 + R * np.column_stack([np.cos(w * t), np.sin(w * t)])
    rec = make_recording(t, pos, {"a": [1.0]}, trials=[[0.0, 40.0]])
    s = build_session(rec, bin_size=BIN, speed_smoothing_s=0.0, velocity_smoothing_s=0.0)
    inner = slice(1, -1)  # central differences everywhere but the two end bins
    expect = R * np.sin(w * BIN) / BIN
    assert expect == pytest.approx(R * w, rel=2e-5)
    np.testing.assert_allclose(s.covariates["speed"][inner], expect, rtol=1e-5)
    np.testing.assert_allclose(s.covariates["speed"][inner], R * w, rtol=5e-5)
    # arc length since trial start; the end bins' one-sided differences err by O(w*BIN)
    np.testing.assert_allclose(s.covariates["distance"][:-1], R * w * s.time[:-1], rtol=2e-4)
    d_head = np.angle(np.exp(1j * (s.covariates["heading"] - (w * s.time + np.pi / 2))))
    assert np.max(np.abs(d_head[inner])) < 1e-4


@pytest.mark.parametrize("vel_sigma, speed_sigma", [(0.2, 0.0), (1.0, 0.0), (0.1, 0.2),
                                                     (0.0, 1.0)])
def test_circle_smoothed_speed_shrinks_by_gaussian_factor(vel_sigma, speed_sigma):
    R, w = 0.4, 1.5
    t = _t(40.0)
    pos = 0.5 + R * np.column_stack([np.cos(w * t), np.sin(w * t)])
    rec = make_recording(t, pos, {"a": [1.0]})
    s = build_session(rec, bin_size=BIN, speed_smoothing_s=speed_sigma,
                      velocity_smoothing_s=vel_sigma)
    edge = 5 * max(vel_sigma, speed_sigma)
    inner = (s.time > edge) & (s.time < 40.0 - edge)
    # only the kernel on the velocity vector shrinks the speed; R * w * sin(w h) / (w h)
    # is the central-difference factor of the grid (h = one bin), 1 - 4e-5 here
    factor = np.exp(-(w * vel_sigma) ** 2 / 2) * np.sinc(w * BIN / np.pi)
    # Discrete sampled Gaussian at sigma >= 10 bins matches the continuous factor closely.
    np.testing.assert_allclose(s.covariates["speed"][inner], R * w * factor, rtol=1e-3)
    d_head = np.angle(np.exp(1j * (s.covariates["heading"] - (w * s.time + np.pi / 2))))
    assert np.max(np.abs(d_head[inner])) < 1e-4


def test_smoothed_speed_matches_direct_convolution():
    """Reference: explicit Gaussian weights with numpy.convolve (not scipy.ndimage)."""
    rng = np.random.default_rng(5)
    t = np.arange(3001) / 50.0
    pos = 0.5 + np.cumsum(rng.normal(0, 0.002, (t.size, 2)), axis=0)
    rec = make_recording(t, pos, {"a": [1.0]})
    sigma = 0.2
    vsigma = 0.1
    s = build_session(rec, bin_size=0.02, speed_smoothing_s=sigma, velocity_smoothing_s=vsigma)
    # bins are centred between samples: rebuild the grid positions the same way (linear)
    centres = s.time
    grid = np.column_stack([np.interp(centres, t, pos[:, c]) for c in range(2)])
    vel = np.gradient(grid, 0.02, axis=0)

    def kernel(sd):
        k = np.arange(-int(4 * sd / 0.02), int(4 * sd / 0.02) + 1)
        wts = np.exp(-0.5 * (k * 0.02 / sd) ** 2)
        return wts / wts.sum()

    sm = np.column_stack([np.convolve(vel[:, c], kernel(vsigma), mode="same")
                          for c in range(2)])
    speed = np.convolve(np.hypot(*sm.T), kernel(sigma), mode="same")
    inner = slice(61, -61)  # away from both kernels' edges (20 + 40 bins)
    np.testing.assert_allclose(s.covariates["speed"][inner], speed[inner], rtol=1e-6)
