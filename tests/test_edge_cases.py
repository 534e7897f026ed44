"""Numerical edge cases through the comparison stage (population runner on a built session).

Hand-made behaviour in a 1 m box with run and stop periods (compass heading), and cells at
the edges of what the engine meets: a place field in a rarely visited corner, a cell that
fires only while the animal is still, spikes only in one heading bin (perfectly separable
data, where an unpenalised Poisson fit diverges), 0.01 Hz and 100 Hz firing, and a second
environment in which the animal does not move (position and speed constant: dropped for that
environment with a stated reason). Every result must be finite, fits converged or carrying a
reason, and labels sensible for the way the spikes were made.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from encodex.io import make_recording
from encodex.population import run_population
from encodex.session import build_session

RATE_HZ = 20.0
MOVE_S = 300.0
STILL_S = 90.0
BIN = 0.1
SETTINGS = dict(variables=("position", "heading", "speed"), folds=6, chunks_per_fold=2,
                seed=1, min_spikes=1)
CORNER = np.array([0.06, 0.06])


def _behaviour(rng):
    """Run/stop random walk in [0, 1]^2 m, then a stretch without any movement."""
    n = int(MOVE_S * RATE_HZ)
    t = np.arange(n) / RATE_HZ
    # Alternating run (3-8 s) and stop (2-5 s) periods.
    gate = np.zeros(n)
    i, run = 0, True
    while i < n:
        length = int(rng.uniform(3, 8) * RATE_HZ) if run else int(rng.uniform(2, 5) * RATE_HZ)
        gate[i:i + length] = 1.0 if run else 0.0
        i += length
        run = not run
    direction = np.cumsum(rng.normal(0, 0.15, n))
    speed = 0.25 * gate
    step = np.column_stack([np.cos(direction), np.sin(direction)]) * (speed / RATE_HZ)[:, None]
    xy = 0.6 + np.cumsum(step, axis=0)
    xy = np.abs(np.mod(xy + 1.0, 2.0) - 1.0)  # reflect into the box
    heading = np.mod(direction + rng.normal(0, 0.2, n), 2 * np.pi)
    # The still environment: exactly constant position, the head still turns.
    m = int(STILL_S * RATE_HZ)
    t2 = MOVE_S + 1.0 + np.arange(m) / RATE_HZ
    xy2 = np.tile([0.3, 0.7], (m, 1))
    h2 = np.mod(np.cumsum(rng.normal(0, 0.1, m)), 2 * np.pi)
    return (np.concatenate([t, t2]), np.vstack([xy, xy2]), np.concatenate([heading, h2]),
            np.concatenate([gate, np.zeros(m)]))


def _spikes_from_rate(rng, t, rate):
    """Poisson spikes of a rate given at tracking samples (piecewise constant)."""
    counts = rng.poisson(rate / RATE_HZ)
    return np.sort(np.repeat(t, counts) + rng.uniform(0, 1 / RATE_HZ, counts.sum()))


@pytest.fixture(scope="module")
def result():
    rng = np.random.default_rng(20)
    t, xy, heading, gate = _behaviour(rng)
    n_move = int(MOVE_S * RATE_HZ)
    moving = np.arange(t.size) < n_move
    d2 = np.sum((xy - CORNER) ** 2, axis=1)
    still = moving & (gate == 0)
    rates = {
        "corner": 0.3 + 25.0 * np.exp(-d2 / (2 * 0.05 ** 2)) * moving,
        "still_only": np.where(still, 6.0, 0.0),
        "one_heading_bin": np.where(moving & (heading < np.pi / 8), 12.0, 0.0),
        "slow_0.01hz": np.full(t.size, 0.01),
        "fast_100hz_flat": np.full(t.size, 100.0),
        "fast_100hz_heading": 100.0 * np.exp(0.6 * np.cos(heading - 2.0)) / np.i0(0.6),
    }
    spikes = {u: _spikes_from_rate(rng, t, r) for u, r in rates.items()}
    # The 0.01 Hz cell may draw no spike at all in 390 s: keep it, with at least one spike.
    if spikes["slow_0.01hz"].size == 0:
        spikes["slow_0.01hz"] = np.array([100.0])
    rec = make_recording(t, xy, spikes, heading=heading,
                         epochs=[(0.0, MOVE_S, "open"), (MOVE_S + 0.5, t[-1] + 0.01, "still")])
    session = build_session(rec, bin_size=BIN)
    res = run_population(session, None, **SETTINGS)
    return session, res, xy[:n_move]


def _row(res, unit, env="open"):
    c = res.cells
    r = c[(c["unit"] == unit) & (c["environment"] == env)]
    assert len(r) == 1
    return r.iloc[0]


def _finite_fit(res, unit, env="open"):
    fit = res.fits[(env, unit)]
    assert np.isfinite(fit.theta).all()
    assert np.isfinite(fit.covariance).all()
    assert np.isfinite(fit.loglik) and np.isfinite(fit.deviance)
    assert fit.converged or fit.reason.strip()
    for name in fit.names:
        r = fit.response(name)
        assert np.isfinite(r.log_modulation).all() and np.isfinite(r.se).all()
    return fit


def test_every_row_is_finite_and_complete(result):
    session, res, _ = result
    cells = res.cells
    assert len(cells) == session.n_units * 2
    for _, c in cells.iterrows():
        assert c["status"] in ("ok", "too few spikes", "too few bins", "no variables"), dict(c)
        if c["status"] != "ok":
            assert c["reason"], dict(c)
            continue
        for col in ("mean_rate_hz", "bits_per_spike", "p_value", "pseudo_r2",
                    "deviance_explained"):
            assert math.isfinite(c[col]), (col, dict(c))
    # Fold fits that stop early must say so in the cell's reason.
    for _, c in cells[cells["reason"].str.contains("did not converge", na=False)].iterrows():
        assert "fold fits did not converge (" in c["reason"]


def test_held_out_scores_are_finite_when_a_fold_fit_diverges(result):
    _, res, _ = result
    m = res.models
    assert np.isfinite(m["loglik_test"].to_numpy(float)).all()
    for col in ("bits_per_spike", "pseudo_r2", "deviance_explained"):
        bad = ~np.isfinite(m[col].to_numpy(float))
        assert (m.loc[bad, "n_spikes_test"] == 0).all(), col


def test_corner_field_visited_a_handful_of_times(result):
    _, res, xy = result
    near = np.sum((xy - CORNER) ** 2, axis=1) < 0.1 ** 2
    entries = int(np.sum(near[1:] & ~near[:-1]) + near[0])
    assert 1 <= entries <= 25 and near.mean() < 0.03  # the field really is rarely visited
    c = _row(res, "corner")
    assert c["status"] == "ok"
    assert c["variables"] in ("none", "position"), c["variables"]
    if c["variables"] == "position":
        fit = _finite_fit(res, "corner")
        r = fit.response("position")
        gx, gy = r.grid
        iy, ix = np.unravel_index(np.argmax(r.log_modulation), r.log_modulation.shape)
        assert abs(gx[ix] - CORNER[0]) < 0.2 and abs(gy[iy] - CORNER[1]) < 0.2


def test_cell_firing_only_while_still_carries_speed(result):
    _, res, _ = result
    c = _row(res, "still_only")
    assert c["status"] == "ok" and "speed" in c["variables"].split("+"), dict(c)
    fit = _finite_fit(res, "still_only")
    r = fit.response("speed")
    # Highest gain at the slowest speeds, far lower when running.
    slow = r.log_modulation[r.grid <= np.quantile(r.grid, 0.1)].mean()
    fast = r.log_modulation[r.grid >= np.quantile(r.grid, 0.9)].mean()
    assert slow - fast > 2.0


def test_perfectly_separable_heading_gives_finite_fit(result):
    _, res, _ = result
    c = _row(res, "one_heading_bin")
    assert c["status"] == "ok" and "heading" in c["variables"].split("+"), dict(c)
    fit = _finite_fit(res, "one_heading_bin")
    r = fit.response("heading")
    assert np.abs(fit.theta).max() < 1e3
    inside = (r.grid > 0.02) & (r.grid < np.pi / 8 - 0.02)
    outside = (r.grid > np.pi / 2) & (r.grid < 3 * np.pi / 2)
    assert r.log_modulation[inside].min() - r.log_modulation[outside].max() > 2.0


def test_rates_of_one_hundredth_and_one_hundred_hz(result):
    _, res, _ = result
    slow = _row(res, "slow_0.01hz")
    assert slow["n_spikes"] < 20
    assert slow["variables"] in ("none", ""), dict(slow)
    if slow["status"] != "ok":
        assert slow["reason"]
    flat = _row(res, "fast_100hz_flat")
    assert flat["status"] == "ok" and flat["variables"] == "none", dict(flat)
    assert 90 < flat["mean_rate_hz"] < 110
    tuned = _row(res, "fast_100hz_heading")
    assert tuned["status"] == "ok" and tuned["variables"] == "heading", dict(tuned)
    fit = _finite_fit(res, "fast_100hz_heading")
    r = fit.response("heading")
    assert abs(np.angle(np.exp(1j * (r.grid[np.argmax(r.log_modulation)] - 2.0)))) < 0.3


def test_constant_variables_dropped_in_one_environment_with_a_reason(result):
    session, res, _ = result
    info = res.run["environments"]["still"]
    assert "position" not in info["variables"] and "speed" not in info["variables"]
    assert "heading" in info["variables"]
    assert "constant" in info["unavailable"]["position"]
    assert "constant" in info["unavailable"]["speed"]
    assert set(res.run["environments"]["open"]["variables"]) == {"position", "heading",
                                                                  "speed"}
    still = res.cells[res.cells["environment"] == "still"]
    for _, c in still.iterrows():
        for v in ("position", "speed"):
            assert v not in str(c["variables"]).split("+")
            assert np.isnan(c[f"gain_{v}"])
    # The cell tuned to heading at 100 Hz keeps its label where only heading varies.
    assert _row(res, "fast_100hz_heading", "still")["variables"] == "heading"
