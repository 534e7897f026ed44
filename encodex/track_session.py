"""Sessions on a linear or circular track, or in a virtual corridor.

:func:`build_track_session` bins a recording whose position is one-dimensional (metres along
a track, :class:`encodex.io.track.TrackLayout`) into an :class:`encodex.session.Session`
with the covariates

* ``position``: metres along the track, shape (n_bins,) (circular: in [0, length));
* ``direction``: running direction, +1 towards larger position, -1 back, 0 where the track
  speed is below ``direction_speed`` (still: no direction);
* ``speed``, ``distance``, ``time``: as in an arena, but from the distance physically run
  when the recording has one (virtual environments, ``Recording.run_distance``);

and no ``heading``: on a track, running direction replaces it.

Jumps of the position (a virtual corridor resetting to its start after each lap, a teleport)
are detected as steps faster than ``jump_speed`` between consecutive samples. Position is
never interpolated across a jump and velocity is computed within the stretches between jumps,
so a jump never becomes speed or distance (the bin at each jump has no velocity and is
masked, reason ``track_jump``).

Trials are the file's trials when it has them; otherwise (or with ``lap_trials=True``) laps:
on a linear track each traversal from one end zone to the other (the outer tenth of the
track at each end), in a corridor with jumps each stretch between jumps, on a circular track
each pass round the loop (crossing position 0).
"""

from __future__ import annotations

import numpy as np

from encodex.errors import InputError, SettingsError
from encodex.io.recording import Recording
from encodex.io.track import TrackLayout, project_onto_path
from encodex.variables import VARIABLES, canonical_order, periodic_kind

#: Track speed below which the animal has no running direction, m/s. Rodents on tracks run at
#: 0.1-0.6 m/s; below 5 cm/s (with the 0.2 s velocity smoothing) they are grooming, rearing
#: or turning round at an end, and the sign of the velocity is tracking jitter.
DEFAULT_DIRECTION_SPEED = 0.05
#: A step between consecutive samples faster than this is a jump (lap reset, teleport), m/s.
#: Running rodents stay below 1.5 m/s; a virtual reset covers the corridor in one frame.
DEFAULT_JUMP_SPEED = 3.0
#: Fraction of a linear track at each end that counts as its end zone for traversals.
END_ZONE_FRACTION = 0.1


def _check_track_settings(direction_speed, jump_speed):
    if not (np.isfinite(direction_speed) and direction_speed >= 0):
        raise SettingsError(f"direction_speed must be >= 0 m/s, got {direction_speed}; default "
                            f"{DEFAULT_DIRECTION_SPEED}")
    if not (np.isfinite(jump_speed) and jump_speed > 0):
        raise SettingsError(f"jump_speed must be > 0 m/s, got {jump_speed}; default "
                            f"{DEFAULT_JUMP_SPEED}")


def on_track(recording: Recording, track: TrackLayout, max_off_track_m: float | None = None
             ) -> Recording:
    """The recording with its 2-D tracking projected onto a track.

    Parameters
    ----------
    recording : Recording
        With (n, 2) position, metres.
    track : TrackLayout
        With its ``path`` (polyline in the room, metres).
    max_off_track_m : float, optional
        Samples farther than this from the path become lost samples (NaN); None keeps all.

    Returns
    -------
    Recording
        Position along the track, shape (n, 1); ``provenance["track_projection"]`` gives the
        median and 95th percentile distance of the samples from the path.
    """
    if recording.track is not None:
        raise SettingsError("this recording is already on a track; do not project it again")
    along, off = project_onto_path(recording.position, track)
    prov = dict(recording.provenance)
    fin = off[np.isfinite(off)]
    if fin.size:
        prov["track_projection"] = (f"median {np.median(fin):.3g} m, 95th percentile "
                                    f"{np.percentile(fin, 95):.3g} m from the path")
    if max_off_track_m is not None:
        along[off > max_off_track_m] = np.nan
    import dataclasses

    return dataclasses.replace(recording, position=along[:, None], track=track, heading=None,
                               provenance=prov)


def _continuous(ts, x, track, jump_speed):
    """Unwrapped position of the finite samples and their stretch index between jumps."""
    ok = np.isfinite(x)
    tg, xg = ts[ok], x[ok]
    if track.circular:
        xg = np.unwrap(xg, period=track.length_m)
    step = np.abs(np.diff(xg)) / np.diff(tg)
    jump = step > jump_speed
    seg = np.concatenate([[0], np.cumsum(jump)])
    # A jump happens at the first sample after it; bin centres sit between samples when the
    # tracking is regular, so a lap boundary never falls on a bin centre by rounding.
    jump_times = tg[1:][jump]
    return tg, xg, seg, jump_times


def _on_bins(centres, tg, xg, seg):
    """Position at bin centres, interpolated within stretches only, and each bin's stretch."""
    k = np.clip(np.searchsorted(tg, centres, side="right") - 1, 0, tg.size - 2)
    same = seg[k] == seg[k + 1]
    frac = np.clip((centres - tg[k]) / (tg[k + 1] - tg[k]), 0.0, 1.0)
    # a centre halfway between two samples takes the earlier one, whatever the rounding of
    # the clock (timestamps written as start + rate differ by ~1e-14 s)
    near = np.where(frac <= 0.5 + 1e-6, k, k + 1)
    pos = np.where(same, xg[k] + frac * (xg[k + 1] - xg[k]), xg[near])
    bin_seg = np.where(same, seg[k], seg[near])
    return pos, bin_seg


def find_laps(t, x, track: TrackLayout, jump_times=()) -> np.ndarray:
    """Laps (trials) of a track: (start, stop) times in seconds, shape (n_laps, 2).

    Parameters
    ----------
    t : ndarray, shape (n,)
        Sample times, seconds (finite samples only).
    x : ndarray, shape (n,)
        Position along the track, metres; circular tracks unwrapped (continuous).
    track : TrackLayout
    jump_times : sequence of float
        Times of position jumps (lap resets), seconds.

    Returns
    -------
    ndarray, shape (n_laps, 2)
        Linear track with jumps: each stretch between jumps. Linear track without: each
        traversal, from the last sample in one end zone to the first sample in the other.
        Circular track: each interval between crossings of position 0 (multiples of the
        length) by the unwrapped position.
    """
    t = np.asarray(t, dtype=float)
    x = np.asarray(x, dtype=float)
    jump_times = np.asarray(jump_times, dtype=float)
    if track.circular:
        turn = np.floor(x / track.length_m)
        cross = np.flatnonzero(np.diff(turn) != 0)
        edges = 0.5 * (t[cross] + t[cross + 1])
        return np.column_stack([edges[:-1], edges[1:]]) if edges.size > 1 else np.zeros((0, 2))
    if jump_times.size:
        edges = np.concatenate([[t[0]], jump_times, [t[-1]]])
        laps = np.column_stack([edges[:-1], edges[1:]])
        return laps[laps[:, 1] > laps[:, 0]]
    lo, hi = float(np.min(x)), float(np.max(x))
    margin = END_ZONE_FRACTION * (hi - lo)
    zone = np.where(x <= lo + margin, -1, np.where(x >= hi - margin, 1, 0))
    laps = []
    last_zone, last_exit = 0, None
    for i in np.flatnonzero(zone != 0):
        z = zone[i]
        if z == last_zone:
            last_exit = i
            continue
        if last_zone != 0 and last_exit is not None and i > last_exit:
            laps.append((t[last_exit], t[i]))
        last_zone, last_exit = z, i
    return np.array(laps, dtype=float).reshape(-1, 2)


def _track_recording(recording: Recording, track: TrackLayout | None,
                     max_off_track_m: float | None) -> Recording:
    """The recording along its track: projected onto ``track`` first when one is given."""
    if track is not None:
        recording = on_track(recording, track, max_off_track_m)
    if recording.track is None:
        raise SettingsError("track options were given for a recording without a track; pass "
                            "track=TrackLayout(...)")
    return recording


def _track_position(ts, x, centres, tg, xg, seg, max_gap_s):
    """Unwrapped track position on the bins (NaN outside and in long gaps), and jump bins.

    Position is interpolated within the stretches between jumps only; a bin whose stretch
    differs from the previous bin's is where a jump happened.
    """
    from encodex import session as S

    ok = np.isfinite(x)
    median_dt = float(np.median(np.diff(ts)))
    pos_u, bin_seg = _on_bins(centres, tg, xg, seg)
    outside = (centres < tg[0]) | (centres > tg[-1])
    gap_mask, n_long, n_short = S._long_gap_mask(ts, ok, centres, max_gap_s, median_dt)
    pos_u[outside | gap_mask] = np.nan
    at_jump = np.concatenate([[False], np.diff(bin_seg) != 0])
    return S._BinnedTracking(pos_u, outside, gap_mask, n_long, n_short), at_jump


def _track_velocity(pos_u, at_jump, bin_size, speed_smoothing_s):
    """Smoothed velocity along the track, m/s, computed within the stretches between jumps.

    The first bin of a stretch breaks the run, so a jump never becomes speed or distance.
    """
    from encodex import session as S

    broken = pos_u.copy()
    broken[at_jump] = np.nan
    return S._smoothed_velocity(np.column_stack([broken, np.where(np.isfinite(broken), 0.0,
                                                                  np.nan)]),
                                bin_size, speed_smoothing_s)[:, 0]


def _track_speed(recording, centres, vel, pos_unknown, bin_size, speed_smoothing_s,
                 max_gap_s):
    """Speed on the bins (m/s), the bins where the distance run is unknown, and its source.

    From the distance physically run when the recording has one (a virtual corridor's
    position need not follow the running), otherwise from the track velocity.
    """
    from encodex import session as S

    run_unknown = np.zeros(centres.size, dtype=bool)
    if recording.run_distance is None:
        return np.abs(vel), run_unknown, "track position"
    rd = recording.run_distance
    dist_bins = S._resample(centres, rd.times, rd.values, "interval", max_gap_s)
    run_unknown = ~np.isfinite(dist_bins) & ~pos_unknown
    pv = S._smoothed_velocity(np.column_stack([dist_bins, np.where(
        np.isfinite(dist_bins), 0.0, np.nan)]), bin_size, speed_smoothing_s)[:, 0]
    return np.abs(pv), run_unknown, f"distance run ({rd.source or 'run_distance'})"


def _track_note(layout, jump_times, use_laps, trials, speed_source) -> dict:
    """``summary["track"]`` of a track session: layout, jumps, where trials and speed came from."""
    return {**layout.to_dict(), "n_jumps": int(jump_times.size),
            "trials_from": "laps" if use_laps else "file",
            "n_laps": int(trials.shape[0]) if use_laps else None, "speed_source": speed_source}


def _track_trials(recording, lap_trials, tg, xg, layout, jump_times):
    """Trials of a track session, (n, 2) s: the file's, or laps; and whether they are laps."""
    file_trials = recording.trials
    use_laps = (file_trials.shape[0] == 0) if lap_trials is None else bool(lap_trials)
    trials = find_laps(tg, xg, layout, jump_times) if use_laps else file_trials
    return trials, use_laps


def build_track_session(recording: Recording, bin_size: float, speed_smoothing_s: float,
                        max_gap_s: float, min_speed: float | None, phase_band, phase_order,
                        direction_speed: float = DEFAULT_DIRECTION_SPEED,
                        lap_trials: bool | None = None,
                        jump_speed: float = DEFAULT_JUMP_SPEED,
                        track: TrackLayout | None = None,
                        max_off_track_m: float | None = None):
    """Bin a track recording (see the module docstring); called by ``build_session``.

    Parameters
    ----------
    recording : Recording
        Position along a track (``recording.track`` set), or 2-D tracking with ``track``
        given to project it.
    bin_size, speed_smoothing_s, max_gap_s, min_speed, phase_band, phase_order
        As in :func:`encodex.session.build_session`.
    direction_speed : float
        Track speed (m/s) below which the running direction is 0 (default 0.05).
    lap_trials : bool, optional
        True: laps are the trials even when the file has trials; False: the file's trials
        only; None (default): the file's trials, or laps when it has none.
    jump_speed : float
        Steps of the position faster than this (m/s) are jumps, not movement (default 3).
    track : TrackLayout, optional
        Project the recording's 2-D tracking onto this track first (its ``path`` needed).
    max_off_track_m : float, optional
        With ``track``: samples farther from the path become lost samples.

    Returns
    -------
    encodex.session.Session
        ``summary["track"]`` holds the layout, the number of jumps, laps and the trial source.
    """
    from encodex import session as S

    _check_track_settings(direction_speed, jump_speed)
    recording = _track_recording(recording, track, max_off_track_m)
    layout = recording.track
    ts = recording.timestamps
    t0, n_bins, centres = S._bin_grid(ts, bin_size)
    x = recording.position[:, 0]
    if np.isfinite(x).sum() < 2:
        raise InputError("track position has fewer than 2 finite samples; check the tracking")
    tg, xg, seg, jump_times = _continuous(ts, x, layout, jump_speed)
    tracking, at_jump = _track_position(ts, x, centres, tg, xg, seg, max_gap_s)
    pos_u, pos_unknown = tracking.position, tracking.unknown
    vel = _track_velocity(pos_u, at_jump, bin_size, speed_smoothing_s)
    direction = np.where(np.abs(vel) >= direction_speed, np.sign(vel), 0.0)
    direction[~np.isfinite(vel)] = np.nan
    speed, run_unknown, speed_source = _track_speed(recording, centres, vel, pos_unknown,
                                                    bin_size, speed_smoothing_s, max_gap_s)

    trials, use_laps = _track_trials(recording, lap_trials, tg, xg, layout, jump_times)
    has_trials = trials.shape[0] > 0
    trial = S._assign_intervals(centres, trials)
    elapsed, dist, after_gap = S._trial_clock(centres, trial, trials, speed, bin_size)
    environment, environments = S._bin_environments(recording, centres)

    position = np.mod(pos_u, layout.length_m) if layout.circular else pos_u
    speed_unknown = ~np.isfinite(speed) & ~pos_unknown & ~run_unknown
    masks = {
        "outside_tracking": tracking.outside,
        "tracking_gap": tracking.gap | (speed_unknown & ~at_jump),
        "track_jump": at_jump & ~pos_unknown,
        "run_distance_unknown": run_unknown,
        **S._trial_and_speed_masks(trial, has_trials, after_gap, pos_unknown, environment,
                                   speed, min_speed),
    }
    extra_cov, phase_info, user_kinds = S._phase_and_user_variables(
        recording, centres, t0, bin_size, max_gap_s, phase_band, phase_order, masks)
    needed = [position, direction, speed] + ([dist, elapsed] if has_trials else [])
    valid = S._valid_bins(n_bins, masks, needed)

    spikes = S._bin_spikes(recording, t0, bin_size, n_bins)
    covariates = {"position": position, "direction": direction, "speed": speed,
                  "distance": dist, "time": elapsed, **extra_cov}
    covariates = {k: S._frozen(np.asarray(v, dtype=float)) for k, v in covariates.items()}
    summary = {
        **S._grid_summary(recording, valid, environment, environments, masks, tracking, spikes),
        "heading_source": "none (track: running direction instead)",
        "n_trials": int(trials.shape[0]),
        "objects": dict(recording.provenance),
        "unavailable": _unavailability(covariates, valid, environment, environments,
                                       has_trials),
        "track": _track_note(layout, jump_times, use_laps, trials, speed_source),
        "settings": S._grid_settings(
            bin_size, speed_smoothing_s, max_gap_s, min_speed,
            direction_speed=float(direction_speed), jump_speed=float(jump_speed),
            lap_trials=lap_trials),
    }
    S._note_extra_variables(summary, phase_info, phase_band, user_kinds, extra_cov)
    return S.Session(
        bin_size=float(bin_size), time=S._frozen(centres), covariates=covariates,
        counts=spikes[0], unit_ids=recording.unit_ids, valid=S._frozen(valid),
        trial=S._frozen(trial), environment=S._frozen(environment.astype(np.int64)),
        environments=tuple(environments), summary=summary,
        variable_kinds={"position": periodic_kind(layout.length_m) if layout.circular
                        else "interval", **user_kinds},
    )


def _unavailability(cov, valid, environment, environments, has_trials):
    """As for an arena, with heading replaced by direction and a 1-D position."""
    from encodex.session import _is_constant

    out = {}
    names = canonical_order(set(VARIABLES) | set(cov))
    for k, env in enumerate(environments):
        rows = valid & (environment == k)
        reasons = {}
        for var in names:
            if var == "heading":
                reasons[var] = "on a track, running direction replaces heading"
            elif var in ("distance", "time") and not has_trials:
                reasons[var] = "no trials or laps in the recording"
            elif not rows.any():
                reasons[var] = "no valid bins in this environment"
            elif var == "direction":
                d = np.asarray(cov[var])[rows]
                if not ((d > 0).any() and (d < 0).any()):
                    reasons[var] = f"the animal ran in one direction only in {env}"
            elif _is_constant(np.asarray(cov[var])[rows]):
                reasons[var] = f"{var} constant in {env}"
        out[env] = reasons
    return out
