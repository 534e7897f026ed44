"""Ground-truth simulator: a foraging animal in an open box and a population of tuned cells.

The scenario (invented for encodex): an animal forages in a square open box (side
``box_size_m``, default 1 m, origin at a corner, coordinates in [0, side]) in one or more
environments recorded one after the other, separated by a break in a holding cage (no
tracking). Each environment is split into back-to-back trials (a food cue restarts the
trial), so travelled distance and elapsed time restart at every trial start. The animal
alternates stops (mean 2 s) and runs (mean 5 s, speed log-normal around 0.18 m/s with
fluctuations), so distance and time since trial start decouple. The head turns around the
direction of travel, and keeps turning while the animal is stopped.

Cells are position (Gaussian place field), heading (von Mises), speed (log-linear up to
0.4 m/s), distance (Gaussian bump in distance since trial start), time (Gaussian bump in
time since trial start), pairs of these (multiplicative), or untuned. Between environments
place fields remap, some cells change type and some fall silent. The rate of each cell is
scaled to a mean rate drawn in ``mean_rate_hz`` (default 1-4 Hz) in each environment.

Optionally (``lfp_rate_hz``) the recording carries one LFP channel with a theta rhythm
(frequency wandering around ``theta_hz``, amplitude fluctuating, plus a slow 1-3 Hz
component and white noise), and ``n_phase_cells`` extra cells fire at a preferred theta
phase (von Mises in the phase of the theta component: 0 at its peaks, pi at its troughs).
Optionally (``steady_speed_m_s``) the animal runs without stops at a nearly constant speed,
so that travelled distance and elapsed time since trial start become nearly proportional.
Both options draw from their own random streams: the rest of a simulation is unchanged.

Spikes are drawn from the inhomogeneous Poisson process by thinning [1]_: candidate events of
a homogeneous process at the peak rate are kept with probability rate(t)/peak, the rate
being linearly interpolated between the 10 ms behaviour samples; spike times are then
continuous (no time grid).

References
----------
.. [1] Lewis, P. A. W. and Shedler, G. S. (1979). Simulation of nonhomogeneous Poisson
   processes by thinning. Naval Research Logistics Quarterly 26, 403-413.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d
from scipy.signal import lfilter

from encodex.errors import OutputError, SettingsError
from encodex.io.recording import Recording, Signal, wrap_angle
from encodex.variables import label

#: Internal time step of the behaviour and the rate, s.
_DT = 0.01
#: Acquisition rate to which spike times are quantised, Hz (a common extracellular rate).
SPIKE_SAMPLING_HZ = 30000.0
#: Cell types and their share of the population (in the first environment).
CELL_TYPES: tuple[tuple[tuple[str, ...], float], ...] = (
    (("position",), 0.22),
    (("heading",), 0.12),
    (("speed",), 0.10),
    (("distance",), 0.10),
    (("time",), 0.10),
    (("position", "heading"), 0.06),
    (("position", "speed"), 0.06),
    (("heading", "speed"), 0.05),
    (("speed", "time"), 0.05),
    ((), 0.14),
)


@dataclass(frozen=True)
class _Behaviour:
    t: np.ndarray  # internal time grid, s
    pos: np.ndarray  # (n, 2) m
    heading: np.ndarray  # rad, [0, 2pi)
    speed: np.ndarray  # m/s
    distance: np.ndarray  # m since trial start (NaN outside trials)
    elapsed: np.ndarray  # s since trial start
    env: np.ndarray  # environment index, -1 in breaks
    trials: np.ndarray  # (n_trials, 2)
    epochs: tuple  # (start, stop, name)


def _ou(rng, n, tau_s, sd):
    """Stationary Ornstein-Uhlenbeck samples on the internal grid (AR(1) recursion)."""
    a = np.exp(-_DT / tau_s)
    e = rng.standard_normal(n) * sd * np.sqrt(1.0 - a * a)
    e[0] = rng.standard_normal() * sd
    return lfilter([1.0], [1.0, -a], e)


def _simulate_behaviour(rng, duration_s, environments, box, break_s, trial_range,
                        steady_speed=None, slowdown=None):
    n_env = len(environments)
    total = n_env * duration_s + (n_env - 1) * break_s
    n = int(round(total / _DT)) + 1  # include the end point so tracking covers every epoch
    t = np.arange(n) * _DT

    env = np.full(n, -1, dtype=np.int64)
    epochs = []
    trials = []
    for k, name in enumerate(environments):
        a = k * (duration_s + break_s)
        b = a + duration_s
        env[(t >= a) & (t < b)] = k
        epochs.append((a, b, name))
        s = a
        while s < b - 1e-9:
            d = rng.uniform(*trial_range)
            e = s + d
            if b - e < 0.5 * trial_range[0]:
                e = b  # fold a short remainder into the last trial
            trials.append((s, min(e, b)))
            s = min(e, b)
    trials = np.array(trials)
    # Alternating stop / run bouts (exponential durations with a floor).
    n_bouts = int(total / 3.0) + 20
    stop_d = np.maximum(rng.exponential(2.0, n_bouts), 0.3)
    run_d = np.maximum(rng.exponential(5.0, n_bouts), 0.5)
    bounds = np.cumsum(np.column_stack([stop_d, run_d]).ravel())
    bout = np.searchsorted(bounds, t, side="right")
    running = (bout % 2) == 1
    run_speed = np.exp(np.log(0.18) + 0.4 * rng.standard_normal(n_bouts * 2 + 1))[bout]
    # Vigour differs between trials (motivation, satiety): a per-trial speed factor makes
    # distance and time since trial start decouple across trials, not only within them.
    vigour = np.ones(n)
    for a, b in trials:
        vigour[(t >= a) & (t < b)] = np.exp(0.35 * rng.standard_normal())
    raw = running * run_speed * vigour * np.exp(_ou(rng, n, 1.0, 0.25))
    if steady_speed is not None:
        # A steady runner (after the default draws, so that the other options keep their
        # random streams): no stops, no vigour changes, 3% fluctuations.
        raw = steady_speed * np.exp(_ou(rng, n, 1.0, 0.03))
    if slowdown is not None:
        # Behaviour that changes over the session: running speed falls linearly from its
        # usual level at the start of each environment to ``slowdown`` times it at the end
        # (deterministic, so the random streams of the other options are unchanged).
        for a, b, _ in epochs:
            inside = (t >= a) & (t < b)
            raw[inside] *= 1.0 - (1.0 - slowdown) * (t[inside] - a) / (b - a)
    speed = gaussian_filter1d(raw, 0.25 / _DT, mode="nearest")  # finite accelerations
    speed = np.clip(speed, 0.0, None)

    # Direction of travel: a smooth random turning; folded (mirror) walls keep it in the box.
    omega = _ou(rng, n, 0.5, 1.5)
    theta = rng.uniform(0, 2 * np.pi) + np.cumsum(omega) * _DT
    start = rng.uniform(0.3 * box, 0.7 * box, 2)
    step_xy = speed[:, None] * np.column_stack([np.cos(theta), np.sin(theta)]) * _DT
    free = start + np.cumsum(step_xy, axis=0)
    m = np.mod(free, 2 * box)
    pos = box - np.abs(m - box)
    sign = np.where(m < box, 1.0, -1.0)
    move_dir = np.arctan2(sign[:, 1] * np.sin(theta), sign[:, 0] * np.cos(theta))
    heading = wrap_angle(move_dir + _ou(rng, n, 1.5, 0.4))
    speed = np.hypot(*(np.gradient(pos, _DT, axis=0).T))  # speed of the folded path

    distance = np.full(n, np.nan)
    elapsed = np.full(n, np.nan)
    for a, b in trials:
        i0, i1 = np.searchsorted(t, [a, b])
        elapsed[i0:i1] = t[i0:i1] - a
        distance[i0:i1] = np.concatenate([[0.0], np.cumsum(speed[i0 : i1 - 1]) * _DT])
    return _Behaviour(t, pos, heading, speed, distance, elapsed, env, trials, tuple(epochs))


def _ou_dt(rng, n, dt, tau_s, sd):
    """Stationary Ornstein-Uhlenbeck samples at step ``dt`` (AR(1) recursion)."""
    a = np.exp(-dt / tau_s)
    e = rng.standard_normal(n) * sd * np.sqrt(1.0 - a * a)
    e[0] = rng.standard_normal() * sd
    return lfilter([1.0], [1.0, -a], e)


def _simulate_lfp(rng, t_end, rate_hz, theta_hz):
    """LFP (volts) and the unwrapped phase (rad) of its theta component on a regular grid.

    Theta frequency wanders (OU, 1 s, 0.4 Hz sd) around ``theta_hz``; its amplitude
    fluctuates by about 25%; a slow 1-3 Hz component and white noise are added. Scale: about
    100 microvolts of theta.
    """
    dt = 1.0 / rate_hz
    n = int(np.floor(t_end / dt)) + 1
    t = np.arange(n) * dt
    freq = theta_hz + _ou_dt(rng, n, dt, 1.0, 0.4)
    phase = rng.uniform(0, 2 * np.pi) + 2 * np.pi * np.cumsum(freq) * dt
    amp = np.clip(1.0 + _ou_dt(rng, n, dt, 2.0, 0.25), 0.3, None)
    slow_f = 2.0 + _ou_dt(rng, n, dt, 3.0, 0.4)
    slow = 0.5 * np.cos(rng.uniform(0, 2 * np.pi) + 2 * np.pi * np.cumsum(slow_f) * dt)
    noise = 0.3 * rng.standard_normal(n)
    lfp = 1e-4 * (amp * np.cos(phase) + slow + noise)
    return t, lfp, phase


def _phase_locked_spikes(rng, epochs, t_lfp, phase, rate_hz, pref, kappa):
    """Spikes of a von Mises phase-locked cell (mean rate ``rate_hz``) within the epochs."""
    from scipy.special import i0

    peak = rate_hz * np.exp(kappa) / i0(kappa)
    out = []
    for a, b, _ in epochs:
        n = rng.poisson(peak * (b - a))
        cand = np.sort(rng.uniform(a, b, n))
        ph = np.interp(cand, t_lfp, phase)
        lam = rate_hz * np.exp(kappa * np.cos(ph - pref)) / i0(kappa)
        out.append(cand[rng.random(n) * peak < lam])
    keep = np.concatenate(out)
    return np.unique(np.round(keep * SPIKE_SAMPLING_HZ) / SPIKE_SAMPLING_HZ)


def _assign_types(rng, n_cells):
    shares = np.array([w for _, w in CELL_TYPES])
    raw = shares * n_cells
    counts = np.floor(raw).astype(int)
    rest = n_cells - counts.sum()
    counts[np.argsort(-(raw - counts), kind="stable")[:rest]] += 1
    types = [CELL_TYPES[i][0] for i, c in enumerate(counts) for _ in range(c)]
    order = rng.permutation(n_cells)
    return [types[i] for i in order]


def _draw_params(rng, box):
    return {
        "field_x": rng.uniform(0.15, 0.85) * box,
        "field_y": rng.uniform(0.15, 0.85) * box,
        "field_sigma_m": rng.uniform(0.08, 0.12) * box,
        "field_gain": np.log(rng.uniform(8.0, 12.0)),
        "pref_heading_rad": rng.uniform(0, 2 * np.pi),
        "heading_kappa": rng.uniform(0.8, 1.2),
        "speed_slope": np.log(rng.uniform(3.0, 5.0)) * (1 if rng.random() < 0.75 else -1),
        "distance_peak_m": rng.uniform(0.4, 2.0),
        "distance_width_m": rng.uniform(0.2, 0.3),
        "distance_gain": np.log(rng.uniform(5.0, 8.0)),
        "time_peak_s": rng.uniform(3.0, 15.0),
        "time_width_s": rng.uniform(1.5, 2.5),
        "time_gain": np.log(rng.uniform(5.0, 8.0)),
    }


def _log_modulation(variables, p, beh, rows):
    g = np.zeros(rows.size)
    if "position" in variables:
        d2 = (beh.pos[rows, 0] - p["field_x"]) ** 2 + (beh.pos[rows, 1] - p["field_y"]) ** 2
        g += p["field_gain"] * np.exp(-d2 / (2 * p["field_sigma_m"] ** 2))
    if "heading" in variables:
        g += p["heading_kappa"] * np.cos(beh.heading[rows] - p["pref_heading_rad"])
    if "speed" in variables:
        g += p["speed_slope"] * np.minimum(beh.speed[rows], 0.4) / 0.4
    if "distance" in variables:
        d = np.nan_to_num(beh.distance[rows], nan=1e3)  # outside trials: far from any bump
        z = (d - p["distance_peak_m"]) / p["distance_width_m"]
        g += p["distance_gain"] * np.exp(-0.5 * z * z)
    if "time" in variables:
        z = (np.nan_to_num(beh.elapsed[rows], nan=1e4) - p["time_peak_s"]) / p["time_width_s"]
        g += p["time_gain"] * np.exp(-0.5 * z * z)
    return g


def _thin(rng, t_rows, rate):
    """Spike times of an inhomogeneous Poisson process by thinning (Lewis and Shedler 1979)."""
    peak = float(rate.max())
    if peak <= 0:
        return np.zeros(0)
    a, b = t_rows[0], t_rows[-1] + _DT
    n = rng.poisson(peak * (b - a))
    cand = np.sort(rng.uniform(a, b, n))
    lam = np.interp(cand, t_rows, rate)
    keep = cand[rng.random(n) * peak < lam]
    # Real spike times are stamped on the acquisition clock: quantise to its samples.
    return np.unique(np.round(keep * SPIKE_SAMPLING_HZ) / SPIKE_SAMPLING_HZ)


def _check_simulation_settings(n_cells, duration_s, environments, tracking_rate_hz,
                               n_phase_cells, lfp_rate_hz, theta_hz, slowdown,
                               steady_speed_m_s) -> int:
    """Refuse impossible settings; return the tracking subsampling step (internal samples).

    Checked before any random draw, so that a refused call consumes nothing.
    """
    if n_cells < 1:
        raise SettingsError(f"n_cells must be at least 1, got {n_cells}")
    if duration_s < 10:
        raise SettingsError(f"duration_s must be at least 10 s per environment, got {duration_s}")
    if not environments or len(set(environments)) != len(environments):
        raise SettingsError("environments must be a non-empty tuple of distinct names")
    step = int(round(1.0 / (tracking_rate_hz * _DT)))
    if step < 1 or abs(step * tracking_rate_hz * _DT - 1.0) > 1e-9:
        raise SettingsError(
            f"tracking_rate_hz {tracking_rate_hz} must divide 100 Hz evenly; use 25, 50 or 100"
        )
    if n_phase_cells and lfp_rate_hz is None:
        raise SettingsError("n_phase_cells needs an LFP: give lfp_rate_hz (e.g. 250)")
    if n_phase_cells < 0:
        raise SettingsError(f"n_phase_cells must be >= 0, got {n_phase_cells}")
    if lfp_rate_hz is not None and not (np.isfinite(lfp_rate_hz) and lfp_rate_hz >= 4 * theta_hz
                                        and theta_hz > 0):
        raise SettingsError(
            f"lfp_rate_hz {lfp_rate_hz} must be at least 4 times theta_hz {theta_hz}; use 250"
        )
    if slowdown is not None and not (0 < slowdown <= 1.0):
        raise SettingsError(f"slowdown must lie in (0, 1] (got {slowdown}); e.g. 0.5")
    if steady_speed_m_s is not None and not (0 < steady_speed_m_s < 2.0):
        raise SettingsError(f"steady_speed_m_s must lie in (0, 2) m/s, got {steady_speed_m_s}")
    return step


def _later_environment(rng, first, variables, p, p_silent, p_change, box):
    """Tuning of a cell in an environment after the first: (variables, params, silent).

    Draws, in this order, whether the cell falls silent or changes type (and its new type),
    then the remapped place field; seeded simulations depend on that order.
    """
    silent = False
    u = rng.random()
    if u < p_silent:
        silent = True
    elif u < p_silent + p_change:
        others = [v for v, _ in CELL_TYPES if v != first]
        variables = others[rng.integers(len(others))]
    else:
        variables = first
    # place fields remap between environments; other tunings keep their shape
    p = dict(p, field_x=rng.uniform(0.15, 0.85) * box, field_y=rng.uniform(0.15, 0.85) * box)
    return variables, p, silent


def _truth_record(uid, name, variables, first, silent, p, mean_rate, spikes) -> dict:
    """Ground-truth row of one cell in one environment: its label and the parameters used.

    Parameters of variables the cell does not carry there are NaN, so that a column is only
    ever read for cells it describes.
    """
    rec = {
        "unit": uid,
        "environment": name,
        "variables": label(() if silent else variables),
        "silent": silent,
        "changed": bool(silent or set(variables) != set(first)),
        "mean_rate_hz": mean_rate,
        "n_spikes": int(spikes.size),
    }
    for key, val in p.items():
        rec[key] = np.nan
    used = set(() if silent else variables)
    if "position" in used:
        rec.update(field_x=p["field_x"], field_y=p["field_y"],
                   field_sigma_m=p["field_sigma_m"], field_gain=p["field_gain"])
    if "heading" in used:
        rec.update(pref_heading_rad=p["pref_heading_rad"], heading_kappa=p["heading_kappa"])
    if "speed" in used:
        rec.update(speed_slope=p["speed_slope"])
    if "distance" in used:
        rec.update(distance_peak_m=p["distance_peak_m"],
                   distance_width_m=p["distance_width_m"], distance_gain=p["distance_gain"])
    if "time" in used:
        rec.update(time_peak_s=p["time_peak_s"], time_width_s=p["time_width_s"],
                   time_gain=p["time_gain"])
    return rec


def _simulate_cells(rng, beh, unit_ids, types, environments, box, mean_rate_hz, p_change,
                    p_silent):
    """Spike trains (per cell, per environment) and ground-truth rows of the tuned cells.

    Cell by cell, then environment by environment: parameters, mean rate, then for each
    later environment the change of tuning, then the spikes. Seeded simulations depend on
    this order of draws.
    """
    rows_by_env = [np.flatnonzero(beh.env == k) for k in range(len(environments))]
    trains = [[] for _ in unit_ids]
    records = []
    for i, uid in enumerate(unit_ids):
        p = _draw_params(rng, box)
        rate_target = rng.uniform(*mean_rate_hz)
        variables = types[i]
        first = variables
        for k, name in enumerate(environments):
            silent = False
            if k > 0:
                variables, p, silent = _later_environment(rng, first, variables, p, p_silent,
                                                          p_change, box)
            rows = rows_by_env[k]
            if silent:
                spikes = np.zeros(0)
                mean_rate = 0.0
            else:
                g = np.exp(_log_modulation(variables, p, beh, rows))
                rate = rate_target * g / g.mean()
                spikes = _thin(rng, beh.t[rows], rate)
                mean_rate = rate_target
            trains[i].append(spikes)
            records.append(_truth_record(uid, name, variables, first, silent, p, mean_rate,
                                         spikes))
    return trains, records


def _tracking(rng, beh, step, tracking_noise_m, box, dropouts):
    """Tracked samples: subsampled behaviour with jitter, lost in breaks and dropouts.

    Returns timestamps (s), position (n, 2) m and compass heading (rad), NaN where lost.
    """
    idx = np.arange(0, beh.t.size, step)
    ts = beh.t[idx]
    pos = beh.pos[idx] + tracking_noise_m * rng.standard_normal((idx.size, 2))
    pos = np.clip(pos, 0.0, box)
    heading = beh.heading[idx].copy()
    lost = beh.env[idx] < 0
    if dropouts:
        for a, b, _ in beh.epochs:
            n_short = rng.poisson((b - a) / 60.0)
            starts = rng.uniform(a + 1, b - 1, n_short)
            lens = rng.uniform(0.05, 0.3, n_short)
            long_start = rng.uniform(a + 0.2 * (b - a), a + 0.8 * (b - a))
            starts = np.append(starts, long_start)
            lens = np.append(lens, rng.uniform(1.5, 3.0))
            for s, d in zip(starts, lens):
                lost |= (ts >= s) & (ts < s + d)
    pos[lost] = np.nan
    heading[lost] = np.nan
    return ts, pos, heading


def _lfp_and_phase_cells(seed, beh, lfp_rate_hz, theta_hz, n_phase_cells, n_cells,
                         mean_rate_hz, records):
    """LFP signal and the theta-phase-locked cells, from their own random stream.

    Adds the phase columns to the existing ``records`` and appends the phase cells' rows;
    returns the LFP, the phase cells' ids and their spike trains.
    """
    # Own stream: adding an LFP leaves every other draw of the simulation unchanged.
    lrng = np.random.default_rng([seed, 8])
    t_lfp, v_lfp, theta_phase = _simulate_lfp(lrng, float(beh.t[-1]), lfp_rate_hz, theta_hz)
    lfp = Signal(t_lfp, v_lfp, "interval", "simulated LFP", "volts")
    for rec in records:
        rec.update(pref_phase_rad=np.nan, phase_kappa=np.nan)
    unit_ids, spike_trains = (), []
    for j in range(n_phase_cells):
        uid = f"c{n_cells + j:03d}"
        pref = lrng.uniform(0, 2 * np.pi)
        kappa = lrng.uniform(0.8, 1.5)
        r = lrng.uniform(*mean_rate_hz)
        st = _phase_locked_spikes(lrng, beh.epochs, t_lfp, theta_phase, r, pref, kappa)
        unit_ids = unit_ids + (uid,)
        spike_trains.append(st)
        for a, b, name in beh.epochs:
            rec = {"unit": uid, "environment": name, "variables": "phase",
                   "silent": False, "changed": False, "mean_rate_hz": r,
                   "n_spikes": int(np.count_nonzero((st >= a) & (st < b)))}
            rec.update({k: np.nan for k in records[0] if k not in rec})
            rec.update(pref_phase_rad=pref, phase_kappa=kappa)
            records.append(rec)
    return lfp, unit_ids, spike_trains


def simulate_recording(
    seed: int = 0,
    n_cells: int = 60,
    duration_s: float = 600.0,
    environments: tuple[str, ...] = ("room_a", "room_b"),
    box_size_m: float = 1.0,
    tracking_rate_hz: float = 50.0,
    mean_rate_hz: tuple[float, float] = (1.0, 4.0),
    trial_duration_s: tuple[float, float] = (20.0, 60.0),
    break_s: float = 30.0,
    p_change: float = 0.15,
    p_silent: float = 0.08,
    tracking_noise_m: float = 0.001,
    dropouts: bool = True,
    with_compass: bool = True,
    steady_speed_m_s: float | None = None,
    lfp_rate_hz: float | None = None,
    theta_hz: float = 8.0,
    n_phase_cells: int = 0,
    slowdown: float | None = None,
) -> tuple[Recording, pd.DataFrame]:
    """Simulate a recording with known ground truth (see the module docstring).

    Parameters
    ----------
    seed : int
        Seed of the random generator; equal seeds give identical output.
    n_cells : int
        Number of units.
    duration_s : float
        Duration of each environment, seconds.
    environments : tuple of str
        Environment names, recorded in this order.
    box_size_m : float
        Side of the square box, metres.
    tracking_rate_hz : float
        Tracking sample rate, Hz (must divide 100 Hz evenly: 10, 20, 25, 50 or 100).
    mean_rate_hz : (float, float)
        Range of the mean firing rates, Hz.
    trial_duration_s : (float, float)
        Range of trial durations, seconds.
    break_s : float
        Untracked break between environments, seconds.
    p_change : float
        Probability that a cell changes type in each later environment.
    p_silent : float
        Probability that a cell is silent in each later environment.
    tracking_noise_m : float
        Standard deviation of the tracking jitter, metres.
    dropouts : bool
        Add tracking dropouts: about one short (0.05-0.3 s) per minute and one long
        (1.5-3 s) per environment.
    with_compass : bool
        Include the head direction in the recording. Without it, sessions use the movement
        direction (heading cells are still tuned to the head direction).
    steady_speed_m_s : float, optional
        Run without stops at this speed (3% fluctuations, no per-trial vigour): distance and
        time since trial start become nearly proportional (inseparable). Default: the
        stop-and-run behaviour above.
    lfp_rate_hz : float, optional
        Add one LFP channel sampled at this rate, Hz (e.g. 250 or 1000) with a theta rhythm
        (``Recording.lfp``, volts). Default: no LFP.
    theta_hz : float
        Mean theta frequency, Hz (default 8).
    slowdown : float, optional
        The animal slows down over each environment: running speed falls linearly to this
        fraction (0-1) of its usual level at the environment's end (e.g. 0.5). Default: no
        change over the session.
    n_phase_cells : int
        Extra cells (ids after the others) locked to the theta phase, von Mises with
        kappa 0.8-1.5 and a uniform preferred phase, in every environment (needs
        ``lfp_rate_hz``). Their truth rows have ``variables == "phase"`` and the columns
        ``pref_phase_rad``, ``phase_kappa`` (present whenever there is an LFP).

    Returns
    -------
    recording : encodex.io.Recording
        Tracking (with compass heading), spikes, trials and epochs.
    truth : pandas.DataFrame
        One row per unit and environment: ``unit, environment, variables`` (canonical label,
        ``"none"`` for untuned or silent cells), ``silent``, ``changed`` (differs from the
        first environment), ``mean_rate_hz`` (of the generating rate), ``n_spikes`` and the
        tuning parameters (NaN where unused).
    """
    step = _check_simulation_settings(n_cells, duration_s, environments, tracking_rate_hz,
                                      n_phase_cells, lfp_rate_hz, theta_hz, slowdown,
                                      steady_speed_m_s)
    # One stream, drawn in a fixed order (behaviour, cell types, cells, tracking): equal seeds
    # give identical output, and seeded studies depend on that order.
    rng = np.random.default_rng(seed)
    beh = _simulate_behaviour(
        rng, duration_s, tuple(environments), box_size_m, break_s, trial_duration_s,
        steady_speed=steady_speed_m_s, slowdown=slowdown,
    )
    types = _assign_types(rng, n_cells)
    unit_ids = tuple(f"c{i:03d}" for i in range(n_cells))
    trains, records = _simulate_cells(rng, beh, unit_ids, types, environments, box_size_m,
                                      mean_rate_hz, p_change, p_silent)
    ts, pos, heading = _tracking(rng, beh, step, tracking_noise_m, box_size_m, dropouts)
    lfp = None
    spike_trains = [np.concatenate(tr) for tr in trains]
    if lfp_rate_hz is not None:
        lfp, phase_ids, phase_trains = _lfp_and_phase_cells(
            seed, beh, lfp_rate_hz, theta_hz, n_phase_cells, n_cells, mean_rate_hz, records)
        unit_ids = unit_ids + phase_ids
        spike_trains += phase_trains
    recording = Recording(
        timestamps=ts,
        position=pos,
        unit_ids=unit_ids,
        spike_times=tuple(spike_trains),
        heading=heading if with_compass else None,
        trials=beh.trials,
        epochs=beh.epochs,
        provenance={"source": f"encodex.simulate seed={seed}"},
        lfp=lfp,
    )
    truth = pd.DataFrame.from_records(records)
    return recording, truth


def simulate_to_files(
    out_dir, seed: int = 0, stem: str = "simulated_session", **kw
) -> dict[str, Path]:
    """Simulate a recording and write it as NWB, npz bundle and ground-truth CSV.

    Parameters
    ----------
    out_dir : str or Path
        Folder to write into (created when missing).
    seed : int
    stem : str
        File name stem: ``<stem>.nwb``, ``<stem>.npz``, ``<stem>_truth.csv``.
    **kw
        Options of :func:`simulate_recording`.

    Returns
    -------
    dict
        Paths under keys ``"nwb"``, ``"npz"``, ``"truth"``.
    """
    from encodex.io import write_bundle, write_nwb

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(
            f"cannot create {out}: {exc.strerror}; choose a writable folder"
        ) from None
    recording, truth = simulate_recording(seed=seed, **kw)
    paths = {
        "nwb": write_nwb(
            recording,
            out / f"{stem}.nwb",
            session_description=(
                f"Simulated open-box foraging session (encodex.simulate, seed {seed})"
            ),
            identifier=f"encodex-sim-{seed}",
            spike_time_resolution_s=1.0 / SPIKE_SAMPLING_HZ,
        ),
        "npz": write_bundle(recording, out / f"{stem}.npz"),
        "truth": out / f"{stem}_truth.csv",
    }
    truth.to_csv(paths["truth"], index=False)
    return paths


# --- cells on a binned trajectory ------------------------------------------------------------
#: Kinds of rate modulation that carry no behavioural information (see :func:`binned_counts`).
NULL_KINDS: tuple[str, ...] = ("poisson", "bursty", "drift")
#: Rate drift of the "drift" kind: a factor of two per this many seconds (log-linear).
DRIFT_DOUBLING_S = 1200.0
#: Standard deviation of the wandering log rate of ``binned_counts(..., drift_tau_s=...)``.
WANDER_SD = 0.5


def draw_cell_params(rng: np.random.Generator, covariates) -> dict:
    """Tuning parameters of one cell, placed within the range of the given behaviour.

    Same shapes as :func:`simulate_recording` (Gaussian place field, von Mises heading,
    log-linear speed, Gaussian bumps in distance and time since trial start), but the place
    field centre is drawn among the visited positions, and the distance and time peaks
    between the 20th and 70th percentiles of the visited values, so that the parameters fit
    any trajectory (an arena of any size, a user's own recording).

    Parameters
    ----------
    rng : numpy Generator
    covariates : mapping
        Binned covariates (``position`` (n, 2) m, ``distance`` m, ``time`` s since trial
        start); missing ones are left at the simulator's defaults.
    """
    pos = covariates.get("position")
    side = 1.0
    if pos is not None:
        pos = np.asarray(pos, dtype=float)
        ok = np.isfinite(pos).all(axis=1)
        side = float(np.ptp(pos[ok], axis=0).mean()) if ok.any() else 1.0
    p = _draw_params(rng, side)
    if pos is not None and ok.any():
        p["field_x"], p["field_y"] = pos[ok][rng.integers(ok.sum())]
    for var, peak, width in (("distance", "distance_peak_m", "distance_width_m"),
                             ("time", "time_peak_s", "time_width_s")):
        v = covariates.get(var)
        if v is None:
            continue
        v = np.asarray(v, dtype=float)
        v = v[np.isfinite(v)]
        if v.size:
            lo, hi = np.percentile(v, [20, 70])
            p[peak] = rng.uniform(lo, hi)
            # Widths in proportion to the visited range, as in the built-in arena.
            p[width] = p[width] * max(np.percentile(v, 90), 1e-9) / (2.0 if var == "distance"
                                                                     else 20.0)
    return p


def binned_counts(covariates, clock_s: np.ndarray, bin_size: float, variables,
                  rng: np.random.Generator, strength: float = 1.0, mean_rate_hz: float = 2.0,
                  modulation: str = "poisson", params: dict | None = None,
                  drift_tau_s: float | None = None,
                  strengths: dict | None = None) -> np.ndarray:
    """Spike counts of one simulated cell on a binned trajectory.

    Parameters
    ----------
    covariates : mapping
        Binned covariates of the usable bins (``position`` (n, 2) m, ``heading`` rad,
        ``speed`` m/s, ``distance`` m and ``time`` s since trial start).
    clock_s : ndarray, shape (n,)
        Time of each bin on the environment's clock, seconds.
    bin_size : float
        Seconds.
    variables : iterable of str
        Variables the cell carries (empty: untuned).
    rng : numpy Generator
    strength : float
        Tuning strength: the log gain of :func:`simulate_recording`'s tuning curves is
        multiplied by it (1: the built-in cells; 0.5: half the modulation depth in log rate).
    mean_rate_hz : float
        Mean rate over the bins, Hz.
    modulation : {"poisson", "bursty", "drift"}
        What else moves the rate (:data:`NULL_KINDS`): nothing ("poisson"); a doubly
        stochastic log rate, an Ornstein-Uhlenbeck process with time constant 2 s and sd 0.7
        ("bursty": spikes clump in episodes of a few seconds, unrelated to behaviour); or a
        slow drift, the rate doubling (or halving, sign drawn) every
        :data:`DRIFT_DOUBLING_S` s on the environment's clock ("drift").
    params : dict, optional
        Tuning parameters (default :func:`draw_cell_params`).
    drift_tau_s : float, optional
        With ``modulation="drift"``: instead of the steady doubling, the log rate wanders as an
        Ornstein-Uhlenbeck process with this time constant (s) and sd
        :data:`WANDER_SD` (the rate within 0.6-1.6x its median about two thirds of the
        time), drawn after the tuning parameters.
    strengths : dict, optional
        Tuning strength of single variables (name -> multiplier), overriding ``strength`` for
        them: e.g. ``{"speed": 0.25}`` with ``strength=1`` makes speed modulate the rate a
        quarter as deeply as the other variables (the log gains add over variables).

    Returns
    -------
    ndarray of int64, shape (n,)
        Poisson counts of the binned rate.
    """
    if modulation not in NULL_KINDS:
        raise SettingsError(f"modulation must be one of {NULL_KINDS} (got {modulation!r})")
    if not (mean_rate_hz > 0 and bin_size > 0 and strength >= 0):
        raise SettingsError("mean_rate_hz and bin_size must be > 0 and strength >= 0")
    clock = np.asarray(clock_s, dtype=float)
    n = clock.size
    variables = tuple(variables)
    p = draw_cell_params(rng, covariates) if params is None else params
    log_rate = np.zeros(n)
    if variables:
        beh = _Behaviour(clock, _cov(covariates, "position", (n, 2)),
                         _cov(covariates, "heading", n), _cov(covariates, "speed", n),
                         _cov(covariates, "distance", n), _cov(covariates, "time", n),
                         np.zeros(n, dtype=np.int64), np.zeros((0, 2)), ())
        if strengths:
            for v in variables:
                log_rate += strengths.get(v, strength) * _log_modulation((v,), p, beh,
                                                                         np.arange(n))
        else:
            log_rate += strength * _log_modulation(variables, p, beh, np.arange(n))
    if modulation == "bursty":
        log_rate += _ou_dt(rng, n, bin_size, 2.0, 0.7)
    elif modulation == "drift" and drift_tau_s is not None:
        log_rate += _ou_dt(rng, n, bin_size, float(drift_tau_s), WANDER_SD)
    elif modulation == "drift":
        sign = 1.0 if rng.random() < 0.5 else -1.0
        log_rate += sign * np.log(2.0) * (clock - clock[0]) / DRIFT_DOUBLING_S
    rate = np.exp(log_rate - log_rate.max())
    rate *= mean_rate_hz / rate.mean()
    return rng.poisson(rate * bin_size).astype(np.int64)


def _cov(covariates, name, shape):
    v = covariates.get(name)
    return np.full(shape, np.nan) if v is None else np.asarray(v, dtype=float)
