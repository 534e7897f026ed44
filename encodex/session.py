"""Binned sessions: a regular time grid with behavioural covariates, spike counts and masks.

:func:`build_session` turns a raw :class:`encodex.io.Recording` into a :class:`Session`, the
object every later stage reads (see "Contracts between stages" in DEVELOPERS.md).

How each covariate is made (all on the bin grid, bin centres ``t0 + (k + 1/2) * bin_size``):

* position: tracked samples linearly interpolated to bin centres. Tracking gaps (runs of NaN
  samples, or missing samples) no longer than ``max_gap_s`` are bridged; bins inside longer
  gaps are masked (reason ``tracking_gap``).
* speed: the velocity (central differences of position on the grid) is smoothed with a
  Gaussian kernel of standard deviation ``speed_smoothing_s`` (normalised over the bins where
  velocity is known), and speed is its norm, m/s. Smoothing the velocity rather than the
  position keeps a constant velocity exactly constant up to the edges of every tracked
  stretch.
* heading: the file's head direction (compass), interpolated on the circle; with no compass,
  the direction of the smoothed velocity where speed >= ``heading_speed_threshold`` and NaN
  (masked, reason ``heading_undefined``) elsewhere. Always wrapped to [0, 2*pi).
* distance: path length since the start of the bin's trial, the integral of speed
  (trapezoid rule); NaN outside trials and for the rest of a trial after a masked gap, since
  the path through a long gap is unknown (reason ``distance_after_gap``).
* time: seconds since the start of the bin's trial; NaN outside trials.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.ndimage import gaussian_filter1d

from encodex.errors import InputError, SettingsError
from encodex.io.recording import Recording, wrap_angle
from encodex.variables import VARIABLES

#: Default bin width, s.
DEFAULT_BIN_SIZE = 0.02
#: Default Gaussian standard deviation of the speed smoothing, s. 0.2 s averages out the
#: frame-to-frame jitter of video tracking (a few mm per frame at 25-60 Hz, which would
#: otherwise read as 0.05-0.2 m/s of spurious speed when the animal sits still) while keeping
#: the stop/run transitions of a rodent, which take about half a second or more.
DEFAULT_SPEED_SMOOTHING_S = 0.2
#: Default longest tracking gap bridged by interpolation, s. Half a second is a couple of
#: strides at running speed: the linear bridge stays within a few cm of the true path.
DEFAULT_MAX_GAP_S = 0.5
#: Default speed below which movement direction is undefined (no compass heading), m/s.
DEFAULT_HEADING_SPEED_THRESHOLD = 0.03
#: Name of the single environment of a recording without epochs.
WHOLE_RECORDING = "all"

_MASK_REASONS = (
    "outside_tracking",
    "tracking_gap",
    "heading_undefined",
    "outside_trials",
    "distance_after_gap",
    "outside_epochs",
    "below_min_speed",
)


@dataclass(frozen=True, eq=False)
class Session:
    """A recording on a regular time grid, ready for model fitting.

    Attributes
    ----------
    bin_size : float
        Bin width, seconds.
    time : ndarray, shape (n_bins,)
        Bin centres, seconds.
    covariates : Mapping[str, ndarray]
        ``position`` (n_bins, 2) metres, ``heading`` radians in [0, 2*pi), ``speed`` m/s,
        ``distance`` metres since trial start, ``time`` seconds since trial start. NaN where
        unknown.
    counts : scipy.sparse.csc_array, shape (n_bins, n_units), int32
        Spike counts per bin and unit.
    unit_ids : tuple of str
    valid : ndarray of bool, shape (n_bins,)
        Usable bins: every available covariate known and no mask applies.
    trial : ndarray of int, shape (n_bins,)
        Trial index of each bin, -1 outside trials.
    environment : ndarray of int, shape (n_bins,)
        Index into ``environments``, -1 outside any epoch.
    environments : tuple of str
    summary : Mapping
        Plain (JSON-ready) record of how the session was built: ``masked_bins`` by reason,
        ``dropped_spikes``, ``objects`` read, ``unavailable`` variables with reasons per
        environment, ``settings``.
    """

    bin_size: float
    time: np.ndarray
    covariates: Mapping[str, np.ndarray]
    counts: sp.csc_array
    unit_ids: tuple[str, ...]
    valid: np.ndarray
    trial: np.ndarray
    environment: np.ndarray
    environments: tuple[str, ...]
    summary: Mapping

    @property
    def n_bins(self) -> int:
        """Number of bins."""
        return int(self.time.size)

    @property
    def n_units(self) -> int:
        """Number of units."""
        return len(self.unit_ids)

    def unit_index(self, unit: int | str) -> int:
        """Column of a unit given by position or by id."""
        if isinstance(unit, (int, np.integer)):
            if not -self.n_units <= unit < self.n_units:
                raise SettingsError(
                    f"unit index {unit} out of range for {self.n_units} units; use 0.."
                    f"{self.n_units - 1}"
                )
            return int(unit) % self.n_units
        try:
            return self.unit_ids.index(str(unit))
        except ValueError:
            raise SettingsError(
                f"unknown unit {unit!r}; pick one of session.unit_ids"
            ) from None

    def unit_counts(self, i: int | str) -> np.ndarray:
        """Spike counts of one unit (index or id) in every bin, as int64 (n_bins,)."""
        j = self.unit_index(i)
        col = self.counts[:, [j]].toarray().ravel()
        return col.astype(np.int64)

    def _env_index(self, environment: int | str) -> int:
        if isinstance(environment, (int, np.integer)):
            if not 0 <= environment < len(self.environments):
                raise SettingsError(
                    f"environment index {environment} out of range; use 0.."
                    f"{len(self.environments) - 1}"
                )
            return int(environment)
        try:
            return self.environments.index(str(environment))
        except ValueError:
            raise SettingsError(
                f"unknown environment {environment!r}; pick one of "
                f"{', '.join(self.environments)}"
            ) from None

    def unavailable_variables(self, environment: int | str) -> dict[str, str]:
        """Variables that cannot be analysed in an environment, with the reason of each."""
        name = self.environments[self._env_index(environment)]
        return dict(self.summary["unavailable"][name])

    def available_variables(self, environment: int | str) -> tuple[str, ...]:
        """Built-in variables (canonical order) that can be analysed in an environment.

        A variable is unavailable when the recording lacks it (distance and time with no
        trials) or when it is constant over the environment's valid bins; the reasons are
        in ``summary["unavailable"]``.
        """
        missing = self.unavailable_variables(environment)
        return tuple(v for v in VARIABLES if v not in missing)

    def restrict(self, environment: int | str) -> Session:
        """Session holding only the valid bins of one environment.

        The returned session has ``environments == (name,)``, every bin valid and
        ``environment`` all 0; bin times, trial indices and the summary are kept.
        """
        k = self._env_index(environment)
        name = self.environments[k]
        rows = np.flatnonzero(self.valid & (self.environment == k))
        cov = {key: _frozen(np.asarray(v)[rows]) for key, v in self.covariates.items()}
        summary = dict(self.summary)
        summary["restricted_to"] = name
        summary["n_bins_restricted"] = int(rows.size)
        return Session(
            bin_size=self.bin_size,
            time=_frozen(self.time[rows]),
            covariates=cov,
            counts=sp.csc_array(self.counts[rows, :]),
            unit_ids=self.unit_ids,
            valid=_frozen(np.ones(rows.size, dtype=bool)),
            trial=_frozen(self.trial[rows]),
            environment=_frozen(np.zeros(rows.size, dtype=np.int64)),
            environments=(name,),
            summary=summary,
        )

    def replace(self, **changes) -> Session:
        """Copy with some fields replaced (a thin wrapper over dataclasses.replace)."""
        return dataclasses.replace(self, **changes)


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


# --------------------------------------------------------------------------- kernels


def _long_gap_mask(ts, ok, centres, max_gap_s, median_dt):
    """Bins whose centres fall inside a tracking gap longer than max_gap_s.

    A gap is the time between two consecutive good samples, whether the samples between
    them are NaN or simply absent (a jump in the timestamps).
    """
    good = np.flatnonzero(ok)
    tg = ts[good]
    dt = np.diff(tg)
    # A gap of duration dt means (dt - one sample period) of missing tracking.
    long = (dt - median_dt) > max_gap_s + 1e-12
    mask = np.zeros(centres.size, dtype=bool)
    n_short = int(np.count_nonzero((dt > 1.5 * median_dt) & ~long))
    for a, b in zip(tg[:-1][long], tg[1:][long]):
        lo, hi = np.searchsorted(centres, [a, b], side="right")
        mask[lo:hi] = True
    return mask, int(np.count_nonzero(long)), n_short


def _interp_linear(tq, ts, values):
    return np.interp(tq, ts, values)


def _interp_circular(tq, ts, angles):
    """Interpolate angles (rad) on the circle: unwrap, interpolate linearly, wrap."""
    return wrap_angle(np.interp(tq, ts, np.unwrap(angles)))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """[start, stop) index pairs of the True runs of a boolean array."""
    m = np.concatenate([[False], mask, [False]]).astype(np.int8)
    d = np.diff(m)
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _smoothed_velocity(pos: np.ndarray, bin_size: float, sigma_s: float) -> np.ndarray:
    """Gaussian-smoothed velocity (m/s) on the grid; NaN where position is NaN.

    Velocity is computed by central differences within each stretch of known position
    (one-sided at the stretch ends) and smoothed by normalised convolution, so unknown bins
    neither contribute nor get values.
    """
    n = pos.shape[0]
    vel = np.full((n, 2), np.nan)
    known = np.isfinite(pos[:, 0])
    for a, b in _runs(known):
        if b - a >= 2:
            vel[a:b] = np.gradient(pos[a:b], bin_size, axis=0)
        # single isolated bins keep NaN velocity: speed is undefined there
    have = np.isfinite(vel[:, 0])
    if sigma_s <= 0:
        return vel
    sigma_bins = sigma_s / bin_size
    w = gaussian_filter1d(have.astype(float), sigma_bins, mode="constant", truncate=4.0)
    out = np.empty_like(vel)
    filled = np.where(have[:, None], vel, 0.0)
    for c in range(2):
        num = gaussian_filter1d(filled[:, c], sigma_bins, mode="constant", truncate=4.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[:, c] = num / w
    out[~have] = np.nan
    return out


def _assign_intervals(centres: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Index of the [start, stop) interval holding each centre, -1 if none (disjoint)."""
    idx = np.full(centres.size, -1, dtype=np.int64)
    if bounds.shape[0] == 0:
        return idx
    order = np.argsort(bounds[:, 0], kind="stable")
    starts = bounds[order, 0]
    stops = bounds[order, 1]
    k = np.searchsorted(starts, centres, side="right") - 1
    inside = (k >= 0) & (centres < stops[np.clip(k, 0, None)])
    idx[inside] = order[k[inside]]
    return idx


def _trial_clock(centres, trial, trials, speed, bin_size):
    """Elapsed time (s) and travelled distance (m) since the start of each bin's trial."""
    n = centres.size
    elapsed = np.full(n, np.nan)
    dist = np.full(n, np.nan)
    after_gap = np.zeros(n, dtype=bool)
    if trials.shape[0] == 0:
        return elapsed, dist, after_gap
    inside = trial >= 0
    elapsed[inside] = centres[inside] - trials[trial[inside], 0]
    # Trials are disjoint intervals, so each trial's bins form one contiguous run.
    change = np.flatnonzero(np.diff(trial)) + 1
    starts = np.concatenate([[0], change])
    stops = np.concatenate([change, [n]])
    for a, b in zip(starts, stops):
        if trial[a] < 0:
            continue
        s = speed[a:b]
        d = np.empty(b - a)
        d[0] = s[0] * elapsed[a]
        if b - a > 1:
            d[1:] = d[0] + np.cumsum(0.5 * (s[1:] + s[:-1]) * bin_size)
        # NaN speed propagates through the cumulative sum: after the first unknown bin the
        # path length is unknown for the rest of the trial.
        bad = ~np.isfinite(d)
        if bad.any():
            first = int(np.argmax(bad))
            after_gap[a + first : b] = True
            d[first:] = np.nan
        dist[a:b] = d
    return elapsed, dist, after_gap


def _bin_spikes(recording: Recording, t0: float, bin_size: float, n_bins: int):
    """Sparse (n_bins, n_units) int32 counts and per-unit dropped-spike counts."""
    n_units = recording.n_units
    lengths = np.array([s.size for s in recording.spike_times], dtype=np.int64)
    flat = np.concatenate(recording.spike_times) if n_units else np.zeros(0)
    col = np.repeat(np.arange(n_units), lengths)
    b = np.floor((flat - t0) / bin_size).astype(np.int64)
    before = b < 0
    after = b >= n_bins
    keep = ~(before | after)
    counts = sp.csc_array(
        (np.ones(int(keep.sum()), dtype=np.int32), (b[keep], col[keep])),
        shape=(n_bins, n_units),
    )
    counts.sum_duplicates()
    counts = sp.csc_array(counts, dtype=np.int32)
    drop_before = np.bincount(col[before], minlength=n_units)
    drop_after = np.bincount(col[after], minlength=n_units)
    return counts, drop_before, drop_after


def _check_settings(bin_size, speed_smoothing_s, max_gap_s, min_speed, heading_speed_threshold):
    if not (np.isfinite(bin_size) and bin_size > 0):
        raise SettingsError(f"bin_size must be a positive number of seconds, got {bin_size}")
    if bin_size > 1.0:
        raise SettingsError(
            f"bin_size {bin_size} s is longer than 1 s; use a bin of 5-100 ms (default 0.02)"
        )
    if not (np.isfinite(speed_smoothing_s) and speed_smoothing_s >= 0):
        raise SettingsError(
            f"speed_smoothing_s must be >= 0 s, got {speed_smoothing_s}; default "
            f"{DEFAULT_SPEED_SMOOTHING_S}"
        )
    if not (np.isfinite(max_gap_s) and max_gap_s >= 0):
        raise SettingsError(f"max_gap_s must be >= 0 s, got {max_gap_s}")
    if min_speed is not None and not (np.isfinite(min_speed) and min_speed >= 0):
        raise SettingsError(f"min_speed must be None or >= 0 m/s, got {min_speed}")
    if not (np.isfinite(heading_speed_threshold) and heading_speed_threshold >= 0):
        raise SettingsError(
            f"heading_speed_threshold must be >= 0 m/s, got {heading_speed_threshold}"
        )


def _is_constant(values: np.ndarray) -> bool:
    values = values[np.isfinite(values)]
    if values.size == 0:
        return True
    span = float(values.max() - values.min())
    return span <= 1e-9 * max(1.0, float(np.abs(values).max()))


def _unavailability(cov, valid, environment, environments, has_trials):
    out: dict[str, dict[str, str]] = {}
    for k, name in enumerate(environments):
        rows = valid & (environment == k)
        reasons: dict[str, str] = {}
        n = int(rows.sum())
        for var in VARIABLES:
            if var in ("distance", "time") and not has_trials:
                reasons[var] = "no trials in the recording"
                continue
            if n == 0:
                reasons[var] = "no valid bins in this environment"
                continue
            v = np.asarray(cov[var])[rows]
            if var == "position":
                flat = [axis for axis, c in zip("xy", v.T) if _is_constant(c)]
                if flat:
                    reasons[var] = f"position constant along {'/'.join(flat)} in {name}"
            elif _is_constant(v):
                reasons[var] = f"{var} constant in {name}"
        out[name] = reasons
    return out


def build_session(
    recording: Recording,
    bin_size: float = DEFAULT_BIN_SIZE,
    speed_smoothing_s: float = DEFAULT_SPEED_SMOOTHING_S,
    max_gap_s: float = DEFAULT_MAX_GAP_S,
    min_speed: float | None = None,
    heading_speed_threshold: float = DEFAULT_HEADING_SPEED_THRESHOLD,
) -> Session:
    """Bin a recording on a regular grid and compute the behavioural covariates.

    Parameters
    ----------
    recording : encodex.io.Recording
    bin_size : float
        Bin width, seconds (default 0.02).
    speed_smoothing_s : float
        Standard deviation of the Gaussian kernel smoothing the velocity, seconds (default
        0.2: removes tracking jitter, keeps stop/run transitions). 0 disables smoothing.
    max_gap_s : float
        Longest tracking gap bridged by interpolation, seconds (default 0.5); bins inside
        longer gaps are masked.
    min_speed : float, optional
        Running-speed filter, m/s: bins slower than this are masked. None keeps all.
    heading_speed_threshold : float
        With no compass heading, movement direction is defined only where speed is at least
        this, m/s (default 0.03); elsewhere heading is NaN and the bin masked.

    Returns
    -------
    Session
        See the class docstring; ``summary`` records masked bins by reason, dropped spikes
        and the objects read.

    Raises
    ------
    encodex.errors.SettingsError
        On out-of-range settings.
    encodex.errors.InputError
        When the recording is shorter than one bin.
    """
    _check_settings(bin_size, speed_smoothing_s, max_gap_s, min_speed, heading_speed_threshold)
    ts = recording.timestamps
    t0 = float(ts[0])
    n_bins = int(np.floor((float(ts[-1]) - t0) / bin_size + 1e-9))
    if n_bins < 2:
        raise InputError(
            f"the tracking lasts {ts[-1] - t0:.4g} s, shorter than two bins of {bin_size} s; "
            "use a smaller bin_size or a longer recording"
        )
    centres = t0 + (np.arange(n_bins) + 0.5) * bin_size
    pos_raw = recording.position
    ok = np.isfinite(pos_raw[:, 0])
    if ok.sum() < 2:
        raise InputError(
            "position has fewer than 2 finite samples; check the tracking data"
        )
    median_dt = float(np.median(np.diff(ts)))

    # --- position, with gaps
    tg = ts[ok]
    pos = np.column_stack([_interp_linear(centres, tg, pos_raw[ok, c]) for c in range(2)])
    outside = (centres < tg[0]) | (centres > tg[-1])
    gap_mask, n_long, n_short = _long_gap_mask(ts, ok, centres, max_gap_s, median_dt)
    pos_unknown = outside | gap_mask
    pos[pos_unknown] = np.nan

    # --- speed
    vel = _smoothed_velocity(pos, bin_size, speed_smoothing_s)
    speed = np.hypot(vel[:, 0], vel[:, 1])

    # --- heading
    heading_undefined = np.zeros(n_bins, dtype=bool)
    if recording.heading is not None:
        h_ok = np.isfinite(recording.heading)
        if h_ok.sum() < 2:
            raise InputError(
                "heading has fewer than 2 finite samples; drop it to use movement direction"
            )
        th = ts[h_ok]
        heading = _interp_circular(centres, th, recording.heading[h_ok])
        h_gap, _, _ = _long_gap_mask(ts, h_ok, centres, max_gap_s, median_dt)
        h_unknown = h_gap | (centres < th[0]) | (centres > th[-1])
        heading[h_unknown | pos_unknown] = np.nan
        heading_undefined = h_unknown & ~pos_unknown
        heading_source = "compass"
    else:
        heading = wrap_angle(np.arctan2(vel[:, 1], vel[:, 0]))
        slow = ~(speed >= heading_speed_threshold)
        heading[slow] = np.nan
        heading_undefined = slow & ~pos_unknown
        heading_source = "movement direction"
    # speed unknown (isolated single bins) also makes movement heading unknown
    speed_unknown = ~np.isfinite(speed) & ~pos_unknown

    # --- trials and environments
    trials = recording.trials
    has_trials = trials.shape[0] > 0
    trial = _assign_intervals(centres, trials)
    elapsed, dist, after_gap = _trial_clock(centres, trial, trials, speed, bin_size)
    if recording.epochs:
        environments = recording.environments
        bounds = np.array([[a, b] for a, b, _ in recording.epochs])
        ep = _assign_intervals(centres, bounds)
        names = np.array([environments.index(n) for _, _, n in recording.epochs])
        environment = np.where(ep >= 0, names[np.clip(ep, 0, None)], -1)
    else:
        environments = (WHOLE_RECORDING,)
        environment = np.zeros(n_bins, dtype=np.int64)

    # --- masks
    masks = {
        "outside_tracking": outside,
        "tracking_gap": gap_mask | speed_unknown,
        "heading_undefined": heading_undefined,
        "outside_trials": (trial < 0) if has_trials else np.zeros(n_bins, dtype=bool),
        "distance_after_gap": after_gap & (trial >= 0) & ~pos_unknown,
        "outside_epochs": environment < 0,
        "below_min_speed": (
            (speed < min_speed) if min_speed is not None else np.zeros(n_bins, dtype=bool)
        ),
    }
    valid = np.ones(n_bins, dtype=bool)
    for m in masks.values():
        valid &= ~m
    needed = [pos[:, 0], pos[:, 1], heading, speed]
    if has_trials:
        needed += [dist, elapsed]
    for v in needed:
        valid &= np.isfinite(v)

    counts, drop_before, drop_after = _bin_spikes(recording, t0, bin_size, n_bins)

    covariates = {
        "position": _frozen(pos),
        "heading": _frozen(heading),
        "speed": _frozen(speed),
        "distance": _frozen(dist),
        "time": _frozen(elapsed),
    }
    environment = environment.astype(np.int64)
    unavailable = _unavailability(covariates, valid, environment, environments, has_trials)
    per_unit_total = np.asarray(counts.sum(axis=0)).ravel()
    dropped_by_unit = {
        u: int(a + b)
        for u, a, b in zip(recording.unit_ids, drop_before, drop_after)
        if a + b > 0
    }
    summary = {
        "n_bins": n_bins,
        "n_valid_bins": int(valid.sum()),
        "valid_bins_by_environment": {
            name: int(np.sum(valid & (environment == k))) for k, name in enumerate(environments)
        },
        "masked_bins": {**{r: int(m.sum()) for r, m in masks.items()},
                        "total": int((~valid).sum())},
        "tracking_gaps": {"interpolated": n_short, "masked": n_long},
        "dropped_spikes": {
            "before_start": int(drop_before.sum()),
            "after_end": int(drop_after.sum()),
            "total": int(drop_before.sum() + drop_after.sum()),
        },
        "dropped_spikes_by_unit": dropped_by_unit,
        "units_without_spikes_in_grid": [
            u for u, c in zip(recording.unit_ids, per_unit_total) if c == 0
        ],
        "heading_source": heading_source,
        "n_trials": int(trials.shape[0]),
        "objects": dict(recording.provenance),
        "unavailable": unavailable,
        "settings": {
            "bin_size": float(bin_size),
            "speed_smoothing_s": float(speed_smoothing_s),
            "max_gap_s": float(max_gap_s),
            "min_speed": None if min_speed is None else float(min_speed),
            "heading_speed_threshold": float(heading_speed_threshold),
        },
    }
    return Session(
        bin_size=float(bin_size),
        time=_frozen(centres),
        covariates=covariates,
        counts=counts,
        unit_ids=recording.unit_ids,
        valid=_frozen(valid),
        trial=_frozen(trial),
        environment=_frozen(environment),
        environments=tuple(environments),
        summary=summary,
    )


def load_session(
    path, object_paths: Mapping[str, str] | None = None, drop_empty_units: bool = False, **kw
) -> Session:
    """Read a recording (``.nwb`` or ``.npz``) and bin it: ``build_session(read_recording(path))``.

    Parameters
    ----------
    path : str or Path
        NWB file or npz bundle.
    object_paths : mapping, optional
        Paths of objects inside an NWB file (``position``, ``heading``, ``units``, ``trials``,
        ``epochs``), passed to :func:`encodex.io.read_recording`.
    drop_empty_units : bool
        Drop units without any spike instead of raising InputError.
    **kw
        Options of :func:`build_session` (``bin_size``, ``speed_smoothing_s``, ...).
    """
    from encodex.io import read_recording

    rec = read_recording(path, drop_empty_units=drop_empty_units, **dict(object_paths or {}))
    return build_session(rec, **kw)
