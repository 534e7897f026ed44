"""Ground-truth simulator of track and virtual-corridor sessions (invented scenarios).

Four scenarios, one environment each (named after the scenario):

* ``"shuttle"``: a 1.5 m linear track; the animal runs from end to end and back (speed
  log-normal around 0.3 m/s per traversal, fluctuating within it, a pause in a fifth of the
  traversals), stopping 1-3 s at each end. Each traversal is a trial (written as the file's
  trials), so distance since the trial start is a function of position and direction: a
  confounded design.
* ``"circular"``: a circular track 2 m round; each trial the animal sets off from where it
  stopped, in either direction (even odds), runs 1.5-4.5 m (a pause in half of the trials)
  and stops 2-4 s outside trials. Position, direction, distance and time are separable.
* ``"gain_corridor"``: a 2 m virtual corridor; at its end the animal stops 1-2 s at a reward
  and is moved back to the start (a jump of the virtual position; each lap is a trial). The
  virtual position advances by ``gain`` times the distance run on the ball: gain 1 in the
  first half of the session, 0.5 in the second, so virtual position and distance run are
  separable. The distance run is written as a cumulative signal (``run_distance``).
* ``"corridor"``: the same corridor with gain 1 throughout: position and distance since
  the lap start coincide (a confounded design).

Cells: position (Gaussian field, sigma 8-15 cm, 6-10x peak gain, the same in both
directions), position+direction (a field in one running direction only, or at different
places in the two directions; tracks where the animal runs both ways), speed (log-linear up to
0.5 m/s), distance (Gaussian bump 0.4-1.6 m after the trial start, sigma 0.2-0.3 m as in the
arena simulator), time (Gaussian bump 2-6 s after the trial start, sigma 1-1.5 s) and
untuned cells, scaled to a mean rate of 1-4 Hz. Spikes by thinning
(Lewis and Shedler 1979, Naval Research Logistics Quarterly 26:403-413) as in
:mod:`encodex.simulate`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from encodex.errors import SettingsError
from encodex.io.recording import Recording, Signal, make_recording
from encodex.io.track import TrackLayout
from encodex.variables import label

TRACK_SCENARIOS = ("shuttle", "circular", "gain_corridor", "corridor")
_DT = 0.01
_TRACK_CELLS = {
    "shuttle": ((("position",), 0.2), (("position", "direction"), 0.25), (("speed",), 0.1),
                (("distance",), 0.1), (("time",), 0.1), ((), 0.25)),
    "circular": ((("position",), 0.2), (("position", "direction"), 0.25), (("speed",), 0.1),
                 (("distance",), 0.1), (("time",), 0.1), ((), 0.25)),
    "gain_corridor": ((("position",), 0.3), (("speed",), 0.1), (("distance",), 0.2),
                      (("time",), 0.1), ((), 0.3)),
}
_TRACK_CELLS["corridor"] = _TRACK_CELLS["gain_corridor"]


def _run_speeds(rng, dist_m, v_mean):
    """Speeds (m/s) of one run of ``dist_m`` metres: ramp up, fluctuate, slow to a halt."""
    out, done, t, ou = [], 0.0, 0.0, 0.0
    while done < dist_m:
        ou += -ou * _DT / 0.7 + 0.2 * np.sqrt(2 * _DT / 0.7) * rng.standard_normal()
        ramp = min(1.0, 0.15 + t / 0.6)
        taper = min(1.0, 0.15 + (dist_m - done) / 0.15)
        v = max(0.02, v_mean * ramp * taper * (1.0 + ou))
        v = min(v, (dist_m - done) / _DT)
        out.append(v)
        done += v * _DT
        t += _DT
    return np.array(out)


def _pause(rng, lo, hi):
    return np.zeros(int(rng.uniform(lo, hi) / _DT))


def _run_with_pause(rng, dist_m, v_mean, p_pause):
    if rng.random() < p_pause:
        cut = rng.uniform(0.25, 0.75) * dist_m
        return np.concatenate([_run_speeds(rng, cut, v_mean), _pause(rng, 0.5, 2.5),
                               _run_speeds(rng, dist_m - cut, v_mean)])
    return _run_speeds(rng, dist_m, v_mean)


def _behaviour(rng, scenario, duration_s):
    """Per-step arrays: virtual position (unwrapped), signed velocity, physical speed,
    trial index (-1 outside), and trial bounds (s)."""
    n_max = int(duration_s / _DT)
    vel, phys, trial = [], [], []
    bounds, k, x0 = [], 0, 0.0
    length = 1.5 if scenario == "shuttle" else 2.0
    sign = 1.0
    while sum(map(len, vel)) < n_max:
        v_mean = float(np.exp(rng.normal(np.log(0.3), 0.35)))
        if scenario == "shuttle":
            stop = _pause(rng, 1.0, 3.0)
            run = _run_with_pause(rng, length - 0.04, v_mean, 0.2)
            parts = [(stop, 0.0, -1), (run, sign, k)]
            sign = -sign
        elif scenario == "circular":
            stop = _pause(rng, 2.0, 4.0)
            sign = 1.0 if rng.random() < 0.5 else -1.0
            run = _run_with_pause(rng, rng.uniform(1.5, 4.5), v_mean, 0.5)
            parts = [(stop, 0.0, -1), (run, sign, k)]
        else:
            t_now = sum(map(len, vel)) * _DT
            gain = 0.5 if (scenario == "gain_corridor" and t_now >= duration_s / 2) else 1.0
            start = _pause(rng, 0.0, 1.5)
            run = _run_with_pause(rng, length / gain, v_mean, 0.3) * gain
            reward = _pause(rng, 1.0, 2.0)
            seq = np.concatenate([start, run, reward])
            parts = [(seq, 1.0, k)]
            phys_seq = np.concatenate([start, run / gain, reward])
        for i, (s, sg, tr) in enumerate(parts):
            vel.append(sg * s)
            trial.append(np.full(s.size, tr))
            phys.append(phys_seq if scenario in ("gain_corridor", "corridor") else s)
        k += 1
    vel = np.concatenate(vel)[:n_max]
    phys = np.concatenate(phys)[:n_max]
    trial = np.concatenate(trial)[:n_max]
    return vel, phys, trial, length


def _laps_and_position(scenario, vel, trial, length):
    """Virtual position (wrapped or reset per lap) and the time of each step in its trial."""
    if scenario in ("gain_corridor", "corridor"):
        pos = np.zeros(vel.size)
        for k in np.unique(trial):
            rows = np.flatnonzero(trial == k)
            pos[rows] = np.minimum(np.cumsum(vel[rows]) * _DT, length)
        return pos
    pos = 0.02 + np.cumsum(vel) * _DT
    return np.mod(pos, length) if scenario == "circular" else pos


def _trial_clocks(trial, phys):
    dist = np.full(trial.size, np.nan)
    elapsed = np.full(trial.size, np.nan)
    for k in np.unique(trial[trial >= 0]):
        rows = np.flatnonzero(trial == k)
        dist[rows] = np.cumsum(phys[rows]) * _DT
        elapsed[rows] = np.arange(rows.size) * _DT
    return dist, elapsed


def _draw(rng, variables, length, circular=False):
    p = {"field_x": rng.uniform(0.15, 0.85) * length, "field_sigma_m": rng.uniform(0.08, 0.15),
         "field_gain": np.log(rng.uniform(6, 10)), "field_x_back": np.nan, "one_way": np.nan,
         "speed_slope": rng.uniform(1.1, 1.6) * (1 if rng.random() < 0.75 else -1),
         "distance_peak_m": rng.uniform(0.4, 1.6), "distance_width_m": rng.uniform(0.2, 0.3),
         "distance_gain": np.log(rng.uniform(4, 7)), "time_peak_s": rng.uniform(2.0, 6.0),
         "time_width_s": rng.uniform(1.0, 1.5), "time_gain": np.log(rng.uniform(4, 7))}
    if "direction" in variables:
        p["one_way"] = float(rng.random() < 0.5)
        if not p["one_way"]:
            # the field of the other direction lies 0.3-0.7 of the track length away (on a
            # linear track within its inner 70%, on the far side of the first field)
            shift = rng.uniform(0.3, 0.7) * length
            if circular:
                p["field_x_back"] = np.mod(p["field_x"] + shift, length)
            else:
                up = p["field_x"] + shift * 0.7
                down = p["field_x"] - shift * 0.7
                p["field_x_back"] = up if up <= 0.85 * length else max(down, 0.15 * length)
    return p


def _field(x, centre, sigma, length, circular):
    d = x - centre
    if circular:
        d = np.mod(d + length / 2, length) - length / 2
    return np.exp(-0.5 * (d / sigma) ** 2)


def _track_log_gain(variables, p, x, direction, speed, dist, elapsed, length, circular):
    g = np.zeros(x.size)
    if "position" in variables:
        f = _field(x, p["field_x"], p["field_sigma_m"], length, circular)
        if "direction" in variables:
            if p["one_way"]:
                f = np.where(direction > 0, f, 0.0)
            else:
                back = _field(x, p["field_x_back"], p["field_sigma_m"], length, circular)
                f = np.where(direction > 0, f, np.where(direction < 0, back, 0.5 * (f + back)))
        g += p["field_gain"] * f
    if "speed" in variables:
        g += p["speed_slope"] * np.minimum(speed, 0.5) / 0.5
    if "distance" in variables:
        z = (np.nan_to_num(dist, nan=1e3) - p["distance_peak_m"]) / p["distance_width_m"]
        g += p["distance_gain"] * np.exp(-0.5 * z * z)
    if "time" in variables:
        z = (np.nan_to_num(elapsed, nan=1e4) - p["time_peak_s"]) / p["time_width_s"]
        g += p["time_gain"] * np.exp(-0.5 * z * z)
    return g


def simulate_track_recording(scenario: str = "shuttle", seed: int = 0, n_cells: int = 40,
                             duration_s: float = 600.0,
                             mean_rate_hz: tuple[float, float] = (1.0, 4.0),
                             tracking_noise_m: float = 0.002,
                             tracking_rate_hz: float = 50.0) -> tuple[Recording, pd.DataFrame]:
    """Simulate a track or virtual-corridor session and its ground truth.

    Parameters
    ----------
    scenario : {"shuttle", "circular", "gain_corridor", "corridor"}
        See the module docstring.
    seed : int
        Seed of every random draw.
    n_cells : int
        Number of cells (ids ``t000``, ``t001``, ...).
    duration_s : float
        Session length, seconds (at least 120).
    mean_rate_hz : (float, float)
        Range of the mean firing rates, Hz.
    tracking_noise_m : float
        Standard deviation of the tracking jitter along the track, metres.
    tracking_rate_hz : float
        Tracking (and run-distance) sampling rate, Hz.

    Returns
    -------
    recording : Recording
        Position along the track (``recording.track`` set); trials written for the shuttle
        and circular scenarios; the corridors carry ``run_distance`` and no trials (laps are
        found from the jumps of the virtual position).
    truth : pandas.DataFrame
        ``unit, environment, variables`` (canonical label, ``none`` untuned), ``mean_rate_hz``,
        ``n_spikes`` and the tuning parameters.
    """
    if scenario not in TRACK_SCENARIOS:
        raise SettingsError(f"unknown track scenario {scenario!r}; use one of "
                            f"{', '.join(TRACK_SCENARIOS)}")
    if not duration_s >= 120:
        raise SettingsError(f"duration_s must be at least 120 s, got {duration_s}")
    rng = np.random.default_rng([seed, 13])
    vel, phys, trial, length = _behaviour(rng, scenario, duration_s)
    circular = scenario == "circular"
    corridor = scenario in ("gain_corridor", "corridor")
    pos = _laps_and_position(scenario, vel, trial, length)
    t = np.arange(vel.size) * _DT
    from scipy.ndimage import gaussian_filter1d

    v_s = gaussian_filter1d(vel, 0.2 / _DT)
    direction = np.where(np.abs(v_s) >= 0.05, np.sign(v_s), 0.0)
    speed = gaussian_filter1d(phys, 0.2 / _DT)
    dist, elapsed = _trial_clocks(trial, phys)

    types = _TRACK_CELLS[scenario]
    names = [v for v, _ in types]
    share = np.array([s for _, s in types])
    counts = np.floor(share / share.sum() * n_cells).astype(int)
    counts[-1] += n_cells - counts.sum()
    kinds = [names[i] for i, c in enumerate(counts) for _ in range(c)]
    rng.shuffle(kinds)
    trains, rows = {}, []
    for i, variables in enumerate(kinds):
        uid = f"t{i:03d}"
        p = _draw(rng, variables, length, circular)
        g = np.exp(_track_log_gain(variables, p, pos, direction, speed, dist, elapsed, length,
                                   circular))
        target = rng.uniform(*mean_rate_hz)
        from encodex.simulate import _thin

        spikes = _thin(rng, t, target * g / g.mean())
        if spikes.size == 0:
            spikes = np.array([t[-1] / 2])
        trains[uid] = spikes
        row = {"unit": uid, "environment": scenario, "variables": label(variables),
               "mean_rate_hz": target, "n_spikes": int(spikes.size)}
        used = set(variables)
        for key, val in p.items():
            base = key.split("_")[0]
            keep = {"field": "position", "one": "direction", "speed": "speed",
                    "distance": "distance", "time": "time"}.get(base)
            row[key] = val if keep in used else np.nan
        rows.append(row)

    step = int(round(1.0 / (tracking_rate_hz * _DT)))
    idx = np.arange(0, t.size, step)
    ts = t[idx]
    x = pos[idx] + tracking_noise_m * rng.standard_normal(idx.size)
    if circular:
        x = np.mod(x, length)
    else:
        x = np.clip(x, 0.0, length)
    layout = TrackLayout("circular" if circular else "linear", length_m=length)
    trials = None
    if not corridor:
        ks = np.unique(trial[trial >= 0])
        trials = np.array([[t[trial == k][0], t[trial == k][-1] + _DT] for k in ks])
    run_distance = None
    if corridor:
        cum = np.cumsum(phys) * _DT
        run_distance = Signal(ts, cum[idx], "interval", "processing/behavior/run_distance",
                              "meters")
    rec = make_recording(ts, x, trains, trials=trials,
                         epochs=[(float(ts[0]), float(ts[-1]) + 1e-3, scenario)],
                         provenance={"source": f"simulated {scenario} track"},
                         track=layout, run_distance=run_distance)
    return rec, pd.DataFrame(rows)


def simulate_track_to_files(out_dir, scenario: str = "shuttle", seed: int = 0, **kw) -> dict:
    """Simulate a track session and write ``track_<scenario>.nwb`` and its truth CSV.

    Parameters
    ----------
    out_dir : str or Path
        Folder (created when missing).
    scenario, seed, **kw
        As for :func:`simulate_track_recording`.

    Returns
    -------
    dict
        Paths under ``"nwb"`` and ``"truth"``.
    """
    from pathlib import Path

    from encodex.errors import OutputError
    from encodex.io import write_nwb

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create {out} ({exc.strerror}); choose a writable folder")
    rec, truth = simulate_track_recording(scenario, seed=seed, **kw)
    nwb = write_nwb(rec, out / f"track_{scenario}.nwb",
                    session_description=f"Simulated {scenario} track session (encodex)",
                    spike_time_resolution_s=1.0 / 30000.0)
    path = out / f"track_{scenario}_truth.csv"
    truth.to_csv(path, index=False)
    return {"nwb": nwb, "truth": path}
