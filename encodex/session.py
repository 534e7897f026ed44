"""Binned sessions: a regular time grid with behavioural covariates, spike counts and masks.

:func:`build_session` turns a raw :class:`encodex.io.Recording` into a :class:`Session`, the
object every later stage reads (see "Contracts between stages" in DEVELOPERS.md).

How each covariate is made (all on the bin grid, bin centres ``t0 + (k + 1/2) * bin_size``):

* position: tracked samples linearly interpolated to bin centres. Tracking gaps (runs of NaN
  samples, or missing samples) no longer than ``max_gap_s`` are bridged; bins inside longer
  gaps are masked (reason ``tracking_gap``).
* speed, in two stages (m/s): the velocity (central differences of position on the grid) is
  smoothed with a Gaussian kernel of standard deviation ``velocity_smoothing_s``, which
  averages out tracking jitter; its norm is then smoothed with a Gaussian kernel of standard
  deviation ``speed_smoothing_s``. Both kernels are normalised over the bins where the value
  is known. Why two stages: smoothing the velocity *vector* averages opposite directions
  wherever the path turns, so the longer the vector kernel, the more a turning animal looks
  slow; paths turn most at the walls, so that error is a function of position, and a speed
  cell then looks as if it carried position too (benchmarks/speed_at_walls.py: 0.2 s on the
  vector read 33% slow within 2 cm of a wall and 13 of 60 redrawn speed cells gained
  position; 0.1 s then 0.2 s on the norm: 12% and 0 of 60). Smoothing the velocity rather
  than the position keeps a constant velocity exactly constant up to the edges of every
  tracked stretch.
* heading: the file's head direction (compass), interpolated on the circle; with no compass,
  the direction of the smoothed velocity where speed >= ``heading_speed_threshold`` and NaN
  (masked, reason ``heading_undefined``) elsewhere. Always wrapped to [0, 2*pi).
* distance: path length since the start of the bin's trial, the integral of speed
  (trapezoid rule); NaN outside trials and for the rest of a trial after a masked gap, since
  the path through a long gap is unknown (reason ``distance_after_gap``).
* time: seconds since the start of the bin's trial; NaN outside trials.
* phase (when the recording carries an LFP channel): the instantaneous phase of a band of
  the LFP (:mod:`encodex.rhythm`), the circular mean of its samples in each bin; NaN (masked,
  reason ``phase_unknown``) outside the trace and near its edges.
* user variables (``Recording.extra`` or :meth:`Session.with_variable`): resampled onto the
  bin centres (on the circle when circular); NaN (masked, reason ``extra_unknown``) where
  unknown. Their basis kind is kept in ``Session.variable_kinds``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.ndimage import gaussian_filter1d

from encodex.errors import InputError, SettingsError
from encodex.io.recording import SIGNAL_KINDS, Recording, _check_extra_name, wrap_angle
from encodex.variables import KINDS, VARIABLES, canonical_order

#: Default bin width, s.
DEFAULT_BIN_SIZE = 0.02
#: Default Gaussian standard deviation of the speed smoothing, s. 0.2 s averages out the
#: frame-to-frame jitter of video tracking (a few mm per frame at 25-60 Hz, which would
#: otherwise read as 0.05-0.2 m/s of spurious speed when the animal sits still) while keeping
#: the stop/run transitions of a rodent, which take about half a second or more.
DEFAULT_SPEED_SMOOTHING_S = 0.2
#: Default Gaussian standard deviation of the velocity smoothing before its norm is taken, s.
#: Long enough to average a few frames of tracking jitter (its speed bias at rest: about
#: 0.004 m/s at 1 mm of jitter, 0.02 m/s at 1 cm, measured at 50 Hz), short enough that a
#: turning path keeps its speed (a turn at 2 rad/s reads 2% slow, against 8% at 0.2 s).
DEFAULT_VELOCITY_SMOOTHING_S = 0.1
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
#: Default band of the rhythm phase, Hz (theta; see encodex.rhythm.DEFAULT_BAND).
DEFAULT_PHASE_BAND = (6.0, 10.0)


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
    variable_kinds : Mapping[str, str]
        Basis kind (``"interval"`` or ``"circular"``) of every covariate beyond the five
        built-ins and ``phase`` (user-defined variables); empty by default. :attr:`kinds`
        gives the kind of every covariate.
    variable_ranges : Mapping[str, tuple of float]
        Range (lower, upper) given for user interval variables, in their unit; bins outside
        were masked. Variables without a given range take it from the data.
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
    variable_kinds: Mapping[str, str] = field(default_factory=dict)
    variable_ranges: Mapping[str, tuple[float, float]] = field(default_factory=dict)

    @property
    def kinds(self) -> dict[str, str]:
        """Basis kind of every covariate: ``planar``, ``circular`` or ``interval``.

        Pass it to :func:`encodex.design.default_bases` (``kinds=session.kinds``) so that
        user-defined variables get the right basis.
        """
        return {name: self.variable_kinds.get(name, KINDS.get(name, "interval"))
                for name in self.covariates}

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
        """Variables (canonical order) that can be analysed in an environment.

        The built-ins, then ``phase`` when the session has it, then user-defined variables.
        A variable is unavailable when the recording lacks it (distance and time with no
        trials) or when it is constant over the environment's valid bins; the reasons are
        in ``summary["unavailable"]``.
        """
        missing = self.unavailable_variables(environment)
        names = canonical_order(set(VARIABLES) | set(self.covariates))
        return tuple(v for v in names if v not in missing)

    def with_variable(self, name: str, values, kind: str = "interval",
                      range: tuple[float, float] | None = None) -> Session:
        """Copy of the session with one more covariate, a user-defined variable.

        Parameters
        ----------
        name : str
            Variable name: a plain identifier other than the built-in names (it sorts after
            the built-ins and ``phase`` in labels, alphabetically among user variables).
        values : ndarray of shape (n_bins,), or (times, values)
            Either one value per bin of this session (NaN where unknown), or samples with
            their own clock (times in s, strictly increasing), resampled onto the bin centres
            (linearly; on the circle when circular). Resampling leaves NaN outside the
            samples' span and in gaps between samples longer than the session's
            ``max_gap_s``.
        kind : {"interval", "circular"}
            Basis kind. ``"circular"`` values are angles in radians (wrapped to [0, 2*pi)),
            unless ``range`` gives the period.
        range : (float, float), optional
            Interval: the basis range in the variable's unit; bins with values outside it are
            masked (default: the data range). Circular: the values' period, e.g. (0, 1) for a
            fraction of a cycle or (0, 360) for degrees, mapped linearly onto [0, 2*pi).

        Returns
        -------
        Session
            With ``covariates[name]``, ``variable_kinds[name] = kind``, bins where the value
            is unknown (or out of range) masked (reason ``extra_unknown``) and
            ``summary["unavailable"]`` updated.

        Raises
        ------
        encodex.errors.InputError
            Bad name, length, kind or range.

        Examples
        --------
        >>> bearing = egocentric_bearing(session.covariates["position"],
        ...                              session.covariates["heading"], goal_xy=(0.8, 0.2))
        >>> session = session.with_variable("goal_bearing", bearing, kind="circular")
        """
        _check_extra_name(name)
        if name in self.covariates:
            raise InputError(f"the session already has a variable {name!r}; choose another name")
        values = _user_values(self, name, values, kind, range)
        return _add_covariate(self, name, values, kind, range)

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
            variable_kinds=dict(self.variable_kinds),
            variable_ranges=dict(self.variable_ranges),
        )

    def replace(self, **changes) -> Session:
        """Copy with some fields replaced (a thin wrapper over dataclasses.replace)."""
        return dataclasses.replace(self, **changes)


def egocentric_bearing(position, heading, goal_xy) -> np.ndarray:
    """Egocentric bearing of a goal point: its direction relative to the animal's heading.

    Parameters
    ----------
    position : ndarray, shape (n, 2)
        Animal position (x, y), metres.
    heading : ndarray, shape (n,)
        Heading, radians (0 along +x, counter-clockwise).
    goal_xy : (float, float)
        Goal location (x, y), metres, in the same frame as ``position``.

    Returns
    -------
    ndarray, shape (n,)
        Bearing in radians in [0, 2*pi): 0 when the goal is straight ahead, pi/2 when it is
        to the left (counter-clockwise), pi behind, 3*pi/2 to the right; NaN where position or
        heading is NaN or the animal stands on the goal.

    Notes
    -----
    ``atan2(gy - y, gx - x) - heading``, wrapped (the allocentric direction of the goal minus
    the head direction).
    """
    pos = np.asarray(position, dtype=float)
    h = np.asarray(heading, dtype=float).ravel()
    if pos.ndim != 2 or pos.shape[1] != 2:
        raise InputError(f"position must have shape (n, 2) in metres, got {pos.shape}")
    if h.size != pos.shape[0]:
        raise InputError(
            f"heading has {h.size} values but position has {pos.shape[0]}; give one each"
        )
    goal = np.asarray(goal_xy, dtype=float).ravel()
    if goal.size != 2 or not np.all(np.isfinite(goal)):
        raise InputError(f"goal_xy must be one finite (x, y) point in metres, got {goal_xy!r}")
    dx, dy = goal[0] - pos[:, 0], goal[1] - pos[:, 1]
    out = wrap_angle(np.arctan2(dy, dx) - h)
    out[(dx == 0) & (dy == 0)] = np.nan
    return out


def _resample(tq, ts, values, kind, max_gap_s):
    """Signal samples onto query times: linear (circular: unwrapped); NaN outside and in gaps."""
    ok = np.isfinite(values)
    out = np.full(tq.size, np.nan)
    if ok.sum() < 2:
        return out
    tg, vg = ts[ok], values[ok]
    if kind == "circular":
        out = wrap_angle(np.interp(tq, tg, np.unwrap(vg)))
    else:
        out = np.interp(tq, tg, vg)
    out[(tq < tg[0]) | (tq > tg[-1])] = np.nan
    median_dt = float(np.median(np.diff(ts)))
    gap, _, _ = _long_gap_mask(ts, ok, tq, max_gap_s, median_dt)
    out[gap] = np.nan
    return out


def _user_values(session, name, values, kind, range_):
    if kind not in SIGNAL_KINDS:
        raise InputError(f"kind {kind!r} of {name!r} is unknown; use 'interval' or 'circular'")
    if isinstance(values, tuple) and len(values) == 2:
        t = np.asarray(values[0], dtype=float).ravel()
        v = np.asarray(values[1], dtype=float).ravel()
        if t.size != v.size or t.size < 2:
            raise InputError(
                f"variable {name!r}: (times, values) need equal lengths of at least 2, got "
                f"{t.size} and {v.size}"
            )
        if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
            raise InputError(
                f"variable {name!r}: times must be finite and strictly increasing (s); sort "
                "the samples"
            )
        v = _map_range(name, v, kind, range_)
        gap = float(session.summary.get("settings", {}).get("max_gap_s", DEFAULT_MAX_GAP_S))
        return _resample(np.asarray(session.time), t, v, kind, gap)
    v = np.asarray(values, dtype=float)
    if v.ndim == 2 and v.shape[1] == 1:
        v = v[:, 0]
    if v.shape != (session.n_bins,):
        raise InputError(
            f"variable {name!r} has shape {v.shape} but the session has {session.n_bins} bins; "
            "give one value per bin or a (times, values) pair to resample"
        )
    return _map_range(name, v, kind, range_)


def _map_range(name, v, kind, range_):
    v = np.where(np.isfinite(v), v, np.nan)
    if range_ is None:
        return wrap_angle(v) if kind == "circular" else v
    try:
        lo, hi = (float(r) for r in range_)
    except (TypeError, ValueError):
        raise InputError(f"range of {name!r} must be (lower, upper), got {range_!r}") from None
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise InputError(f"range of {name!r} must be finite with upper > lower, got {range_!r}")
    if kind == "circular":
        return wrap_angle((v - lo) / (hi - lo) * 2.0 * np.pi)
    out = v.copy()
    out[(v < lo) | (v > hi)] = np.nan
    return out


def _add_covariate(session, name, values, kind, range_, reason="extra_unknown"):
    """New session with a covariate added, its unknown bins masked, the summary updated."""
    values = _frozen(np.asarray(values, dtype=float))
    unknown = ~np.isfinite(values)
    valid = np.asarray(session.valid) & ~unknown
    summary = dict(session.summary)
    masked = dict(summary.get("masked_bins", {}))
    masked[reason] = int(masked.get(reason, 0)) + int(unknown.sum())
    masked["total"] = int((~valid).sum())
    summary["masked_bins"] = masked
    summary["n_valid_bins"] = int(valid.sum())
    env = np.asarray(session.environment)
    summary["valid_bins_by_environment"] = {
        e: int(np.sum(valid & (env == k))) for k, e in enumerate(session.environments)}
    cov = dict(session.covariates)
    cov[name] = values
    summary["unavailable"] = _unavailability(
        cov, valid, env, session.environments, int(summary.get("n_trials", 0)) > 0)
    extras = dict(summary.get("extra_variables", {}))
    extras[name] = {"kind": kind, "range": None if range_ is None else list(map(float, range_)),
                    "unknown_bins": int(unknown.sum())}
    summary["extra_variables"] = extras
    kinds = dict(session.variable_kinds)
    ranges = dict(session.variable_ranges)
    if name not in KINDS:
        kinds[name] = kind
        if range_ is not None and kind == "interval":
            ranges[name] = (float(range_[0]), float(range_[1]))
    return dataclasses.replace(session, covariates=cov, valid=_frozen(valid), summary=summary,
                               variable_kinds=kinds, variable_ranges=ranges)


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
    return _normalised_smooth(vel, bin_size, sigma_s)


def _normalised_smooth(values: np.ndarray, bin_size: float, sigma_s: float) -> np.ndarray:
    """Gaussian smoothing (s.d. ``sigma_s``, s) of the columns of ``values`` over known bins.

    The kernel is normalised over the bins where the value is known (finite), so unknown bins
    neither contribute nor get values; ``sigma_s <= 0`` returns the input.
    """
    if sigma_s <= 0:
        return values
    flat = values.reshape(values.shape[0], -1)
    have = np.isfinite(flat[:, 0])
    sigma_bins = sigma_s / bin_size
    w = gaussian_filter1d(have.astype(float), sigma_bins, mode="constant", truncate=4.0)
    out = np.empty_like(flat)
    filled = np.where(have[:, None], flat, 0.0)
    for c in range(flat.shape[1]):
        num = gaussian_filter1d(filled[:, c], sigma_bins, mode="constant", truncate=4.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[:, c] = num / w
    out[~have] = np.nan
    return out.reshape(values.shape)


def _two_stage_speed(raw_vel: np.ndarray, bin_size: float, velocity_smoothing_s: float,
                     speed_smoothing_s: float) -> np.ndarray:
    """Speed (m/s): the norm of the velocity smoothed at ``velocity_smoothing_s``, smoothed
    at ``speed_smoothing_s`` (see the module docstring for why two stages)."""
    vel = _normalised_smooth(raw_vel, bin_size, velocity_smoothing_s)
    return _normalised_smooth(np.hypot(vel[:, 0], vel[:, 1]), bin_size, speed_smoothing_s)


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


def _check_settings(bin_size, speed_smoothing_s, max_gap_s, min_speed, heading_speed_threshold,
                    velocity_smoothing_s):
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
    if not (np.isfinite(velocity_smoothing_s) and velocity_smoothing_s >= 0):
        raise SettingsError(
            f"velocity_smoothing_s must be >= 0 s, got {velocity_smoothing_s}; default "
            f"{DEFAULT_VELOCITY_SMOOTHING_S}"
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


#: Said when the 2-D position of an environment varies along one axis only: a track.
_TRACK_HINT = ("; if this is a linear track, read the position along it (--track linear, "
               "or track='linear' in Python; see docs/data_conventions.md)")


def _unavailability(cov, valid, environment, environments, has_trials):
    """Unavailable variables per environment (built-ins, phase, user variables), with reasons."""
    out: dict[str, dict[str, str]] = {}
    names = list(VARIABLES) + [v for v in canonical_order(cov) if v not in VARIABLES]
    for k, name in enumerate(environments):
        rows = valid & (environment == k)
        reasons: dict[str, str] = {}
        n = int(rows.sum())
        for var in names:
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
                    reasons[var] = (f"position constant along {'/'.join(flat)} in {name}"
                                    + (_TRACK_HINT if len(flat) == 1 else ""))
            elif _is_constant(v):
                reasons[var] = f"{var} constant in {name}"
        out[name] = reasons
    return out


def _phase_and_user_variables(recording, centres, t0, bin_size, max_gap_s, phase_band,
                              phase_order, masks):
    """Rhythm phase and user variables on the bins; adds their masks to ``masks``."""
    n_bins = centres.size
    extra_cov: dict[str, np.ndarray] = {}
    phase_info = None
    if recording.lfp is not None:
        from encodex import rhythm

        rhythm.check_bin_size(bin_size, phase_band)
        pt, pp = rhythm.lfp_phase(recording.lfp.times, recording.lfp.values, phase_band,
                                  phase_order)
        phase = rhythm.phase_on_bins(pt, pp, t0, bin_size, n_bins)
        extra_cov["phase"] = phase
        masks["phase_unknown"] = ~np.isfinite(phase)
        phase_info = {"band_hz": [float(b) for b in phase_band], "order": int(phase_order),
                      "lfp_rate_hz": recording.lfp.rate_hz,
                      "source": recording.lfp.source}
    user_kinds = {}
    if recording.extra:
        unknown = np.zeros(n_bins, dtype=bool)
        for name, sig in recording.extra.items():
            v = _resample(centres, sig.times, sig.values, sig.kind, max_gap_s)
            extra_cov[name] = v
            user_kinds[name] = sig.kind
            unknown |= ~np.isfinite(v)
        masks["extra_unknown"] = unknown
    return extra_cov, phase_info, user_kinds


def _note_extra_variables(summary: dict, phase_info, phase_band, user_kinds, extra_cov) -> None:
    """Record rhythm phase and user variables in a session summary (arena and track alike)."""
    if phase_info is not None:
        summary["phase"] = phase_info
        summary["settings"]["phase_band"] = [float(b) for b in phase_band]
    if user_kinds:
        summary["extra_variables"] = {
            name: {"kind": kind, "range": None, "unknown_bins": int(np.sum(
                ~np.isfinite(extra_cov[name])))} for name, kind in user_kinds.items()}


@dataclass(frozen=True, eq=False)
class _BinnedTracking:
    """Tracked position on the bin grid and the bins where it is unknown."""

    position: np.ndarray  # metres on the bins, NaN where unknown
    outside: np.ndarray  # bool: bin centre outside the tracked span
    gap: np.ndarray  # bool: bin inside a gap longer than max_gap_s
    n_long: int  # gaps masked
    n_short: int  # gaps bridged by interpolation

    @property
    def unknown(self) -> np.ndarray:
        """Bins without a position (outside the tracking or in a long gap)."""
        return self.outside | self.gap


def _bin_grid(ts: np.ndarray, bin_size: float):
    """Start (s), number of bins and bin centres (s) of the grid over the tracking.

    Arena and track sessions alike; refuses recordings shorter than two bins.
    """
    t0 = float(ts[0])
    n_bins = int(np.floor((float(ts[-1]) - t0) / bin_size + 1e-9))
    if n_bins < 2:
        raise InputError(
            f"the tracking lasts {ts[-1] - t0:.4g} s, shorter than two bins of {bin_size} s; "
            "use a smaller bin_size or a longer recording"
        )
    centres = t0 + (np.arange(n_bins) + 0.5) * bin_size
    return t0, n_bins, centres


def _binned_position(ts, pos_raw, centres, max_gap_s) -> _BinnedTracking:
    """Tracked (x, y) linearly interpolated to the bin centres, NaN outside and in long gaps.

    Gaps up to ``max_gap_s`` are bridged by the interpolation; bins in longer ones have no
    position, since a straight line across them could be far from the true path.
    """
    ok = np.isfinite(pos_raw[:, 0])
    if ok.sum() < 2:
        raise InputError(
            "position has fewer than 2 finite samples; check the tracking data"
        )
    median_dt = float(np.median(np.diff(ts)))
    tg = ts[ok]
    pos = np.column_stack([_interp_linear(centres, tg, pos_raw[ok, c]) for c in range(2)])
    outside = (centres < tg[0]) | (centres > tg[-1])
    gap_mask, n_long, n_short = _long_gap_mask(ts, ok, centres, max_gap_s, median_dt)
    pos[outside | gap_mask] = np.nan
    return _BinnedTracking(pos, outside, gap_mask, n_long, n_short)


def _binned_heading(recording, centres, vel, speed, pos_unknown, max_gap_s,
                    heading_speed_threshold):
    """Heading on the bins (rad, [0, 2*pi)), the bins where it is undefined, and its source.

    The compass when the file has one (unknown in its own long gaps); otherwise the direction
    of the smoothed velocity, defined only where the animal moves at least
    ``heading_speed_threshold`` m/s (below it the direction is tracking jitter).
    """
    if recording.heading is None:
        heading = wrap_angle(np.arctan2(vel[:, 1], vel[:, 0]))
        slow = ~(speed >= heading_speed_threshold)
        heading[slow] = np.nan
        return heading, slow & ~pos_unknown, "movement direction"
    ts = recording.timestamps
    h_ok = np.isfinite(recording.heading)
    if h_ok.sum() < 2:
        raise InputError(
            "heading has fewer than 2 finite samples; drop it to use movement direction"
        )
    th = ts[h_ok]
    heading = _interp_circular(centres, th, recording.heading[h_ok])
    median_dt = float(np.median(np.diff(ts)))
    h_gap, _, _ = _long_gap_mask(ts, h_ok, centres, max_gap_s, median_dt)
    h_unknown = h_gap | (centres < th[0]) | (centres > th[-1])
    heading[h_unknown | pos_unknown] = np.nan
    return heading, h_unknown & ~pos_unknown, "compass"


def _bin_environments(recording, centres):
    """Environment index of each bin (int64, -1 outside every epoch) and the names.

    A recording without epochs is one environment, :data:`WHOLE_RECORDING`.
    """
    if not recording.epochs:
        return np.zeros(centres.size, dtype=np.int64), (WHOLE_RECORDING,)
    environments = recording.environments
    bounds = np.array([[a, b] for a, b, _ in recording.epochs])
    ep = _assign_intervals(centres, bounds)
    names = np.array([environments.index(n) for _, _, n in recording.epochs])
    return np.where(ep >= 0, names[np.clip(ep, 0, None)], -1).astype(np.int64), environments


def _trial_and_speed_masks(trial, has_trials, after_gap, pos_unknown, environment, speed,
                           min_speed) -> dict:
    """Masks after the tracking ones, shared by arena and track sessions (summary order)."""
    n_bins = trial.size
    return {
        "outside_trials": (trial < 0) if has_trials else np.zeros(n_bins, dtype=bool),
        "distance_after_gap": after_gap & (trial >= 0) & ~pos_unknown,
        "outside_epochs": environment < 0,
        "below_min_speed": (
            (speed < min_speed) if min_speed is not None else np.zeros(n_bins, dtype=bool)
        ),
    }


def _valid_bins(n_bins: int, masks: Mapping, needed) -> np.ndarray:
    """Usable bins: no mask applies and every needed covariate is known."""
    valid = np.ones(n_bins, dtype=bool)
    for m in masks.values():
        valid &= ~m
    for v in needed:
        valid &= np.isfinite(v)
    return valid


def _grid_summary(recording, valid, environment, environments, masks,
                  tracking: _BinnedTracking, spikes) -> dict:
    """Summary entries shared by arena and track sessions: bins, masks, gaps, spikes.

    ``spikes`` is ``(counts, drop_before, drop_after)`` from :func:`_bin_spikes`.
    """
    counts, drop_before, drop_after = spikes
    per_unit_total = np.asarray(counts.sum(axis=0)).ravel()
    return {
        "n_bins": int(valid.size),
        "n_valid_bins": int(valid.sum()),
        "valid_bins_by_environment": {
            name: int(np.sum(valid & (environment == k))) for k, name in enumerate(environments)
        },
        "masked_bins": {**{r: int(m.sum()) for r, m in masks.items()},
                        "total": int((~valid).sum())},
        "tracking_gaps": {"interpolated": tracking.n_short, "masked": tracking.n_long},
        "dropped_spikes": {
            "before_start": int(drop_before.sum()),
            "after_end": int(drop_after.sum()),
            "total": int(drop_before.sum() + drop_after.sum()),
        },
        "dropped_spikes_by_unit": {
            u: int(a + b)
            for u, a, b in zip(recording.unit_ids, drop_before, drop_after)
            if a + b > 0
        },
        "units_without_spikes_in_grid": [
            u for u, c in zip(recording.unit_ids, per_unit_total) if c == 0
        ],
    }


def _grid_settings(bin_size, speed_smoothing_s, max_gap_s, min_speed, **more) -> dict:
    """Settings recorded in a session summary: the grid's, then ``more`` (arena or track)."""
    return {
        "bin_size": float(bin_size),
        "speed_smoothing_s": float(speed_smoothing_s),
        "max_gap_s": float(max_gap_s),
        "min_speed": None if min_speed is None else float(min_speed),
        **more,
    }


def build_session(
    recording: Recording,
    bin_size: float = DEFAULT_BIN_SIZE,
    speed_smoothing_s: float = DEFAULT_SPEED_SMOOTHING_S,
    max_gap_s: float = DEFAULT_MAX_GAP_S,
    min_speed: float | None = None,
    heading_speed_threshold: float = DEFAULT_HEADING_SPEED_THRESHOLD,
    phase_band: tuple[float, float] = DEFAULT_PHASE_BAND,
    phase_order: int = 3,
    velocity_smoothing_s: float | None = None,
    **track_options,
) -> Session:
    """Bin a recording on a regular grid and compute the behavioural covariates.

    Parameters
    ----------
    recording : encodex.io.Recording
    bin_size : float
        Bin width, seconds (default 0.02).
    speed_smoothing_s : float
        Standard deviation of the Gaussian kernel smoothing the speed (the norm of the
        velocity), seconds (default 0.2: removes what jitter is left, keeps stop/run
        transitions). On a track it smooths the velocity along the track. 0 disables it.
        With no compass, heading is the direction of the velocity smoothed by this kernel.
    max_gap_s : float
        Longest tracking gap bridged by interpolation, seconds (default 0.5); bins inside
        longer gaps are masked.
    min_speed : float, optional
        Running-speed filter, m/s: bins slower than this are masked. None keeps all.
    heading_speed_threshold : float
        With no compass heading, movement direction is defined only where speed is at least
        this, m/s (default 0.03); elsewhere heading is NaN and the bin masked.
    phase_band : (float, float)
        With an LFP in the recording: band (low, high) in Hz whose instantaneous phase
        becomes the covariate ``phase`` (default theta, 6-10 Hz; see :mod:`encodex.rhythm`).
        Bins must not span more than half a cycle of ``high``.
    phase_order : int
        Butterworth order of the band-pass filter (default 3).
    velocity_smoothing_s : float, optional
        Open field: standard deviation of the Gaussian kernel smoothing the velocity before
        its norm is taken, seconds (default 0.1; see the module docstring). 0 disables it;
        ``velocity_smoothing_s=0.2, speed_smoothing_s=0`` gives the one-stage speed of
        encodex before two-stage speed. Refused on a track, whose velocity is
        one-dimensional (``speed_smoothing_s`` smooths it).
    **track_options
        For a recording on a track (``recording.track`` set, or a ``track=TrackLayout``
        here to project 2-D tracking onto it): options of
        :func:`encodex.track_session.build_track_session` (``direction_speed``,
        ``lap_trials``, ``jump_speed``, ``track``).

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
    is_track = recording.track is not None or bool(track_options)
    if is_track and velocity_smoothing_s is not None:
        raise SettingsError("velocity_smoothing_s applies to open-field tracking; on a track the "
                            "velocity is one-dimensional: set speed_smoothing_s instead")
    if velocity_smoothing_s is None:
        velocity_smoothing_s = DEFAULT_VELOCITY_SMOOTHING_S
    _check_settings(bin_size, speed_smoothing_s, max_gap_s, min_speed, heading_speed_threshold,
                    velocity_smoothing_s)
    if is_track:
        from encodex.track_session import build_track_session

        return build_track_session(
            recording, bin_size=bin_size, speed_smoothing_s=speed_smoothing_s,
            max_gap_s=max_gap_s, min_speed=min_speed, phase_band=phase_band,
            phase_order=phase_order, **track_options)
    t0, n_bins, centres = _bin_grid(recording.timestamps, bin_size)
    tracking = _binned_position(recording.timestamps, recording.position, centres, max_gap_s)
    pos, pos_unknown = tracking.position, tracking.unknown
    raw_vel = _smoothed_velocity(pos, bin_size, 0.0)
    vel = _normalised_smooth(raw_vel, bin_size, speed_smoothing_s)  # its direction: heading
    speed = _two_stage_speed(raw_vel, bin_size, velocity_smoothing_s, speed_smoothing_s)
    heading, heading_undefined, heading_source = _binned_heading(
        recording, centres, vel, speed, pos_unknown, max_gap_s, heading_speed_threshold)
    # speed unknown (isolated single bins) also makes movement heading unknown
    speed_unknown = ~np.isfinite(speed) & ~pos_unknown

    trials = recording.trials
    has_trials = trials.shape[0] > 0
    trial = _assign_intervals(centres, trials)
    elapsed, dist, after_gap = _trial_clock(centres, trial, trials, speed, bin_size)
    environment, environments = _bin_environments(recording, centres)

    masks = {
        "outside_tracking": tracking.outside,
        "tracking_gap": tracking.gap | speed_unknown,
        "heading_undefined": heading_undefined,
        **_trial_and_speed_masks(trial, has_trials, after_gap, pos_unknown, environment, speed,
                                 min_speed),
    }
    # rhythm phase and user variables: each masks the bins where it is unknown
    extra_cov, phase_info, user_kinds = _phase_and_user_variables(
        recording, centres, t0, bin_size, max_gap_s, phase_band, phase_order, masks)
    needed = [pos[:, 0], pos[:, 1], heading, speed] + ([dist, elapsed] if has_trials else [])
    valid = _valid_bins(n_bins, masks, needed)

    spikes = _bin_spikes(recording, t0, bin_size, n_bins)
    covariates = {
        "position": _frozen(pos),
        "heading": _frozen(heading),
        "speed": _frozen(speed),
        "distance": _frozen(dist),
        "time": _frozen(elapsed),
        **{k: _frozen(v) for k, v in extra_cov.items()},
    }
    summary = {
        **_grid_summary(recording, valid, environment, environments, masks, tracking, spikes),
        "heading_source": heading_source,
        "n_trials": int(trials.shape[0]),
        "objects": dict(recording.provenance),
        "unavailable": _unavailability(covariates, valid, environment, environments,
                                       has_trials),
        "settings": _grid_settings(
            bin_size, speed_smoothing_s, max_gap_s, min_speed,
            velocity_smoothing_s=float(velocity_smoothing_s),
            heading_speed_threshold=float(heading_speed_threshold)),
    }
    _note_extra_variables(summary, phase_info, phase_band, user_kinds, extra_cov)
    return Session(
        bin_size=float(bin_size), time=_frozen(centres), covariates=covariates,
        counts=spikes[0], unit_ids=recording.unit_ids, valid=_frozen(valid),
        trial=_frozen(trial), environment=_frozen(environment),
        environments=tuple(environments), summary=summary, variable_kinds=user_kinds,
    )


def load_session(
    path, object_paths: Mapping[str, str] | None = None, drop_empty_units: bool = False,
    lfp: str | None = None, lfp_channel: int = 0, extra: Mapping[str, str] | None = None,
    extra_kinds: Mapping[str, str] | None = None, track=None, run_distance: str | None = None,
    track_length_m: float | None = None, track_path=None, **kw
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
    lfp : str, optional
        NWB path of the LFP ``ElectricalSeries`` (or its ``LFP`` container) whose rhythm
        phase becomes the variable ``phase``; the band is ``phase_band=(low, high)`` Hz.
    lfp_channel : int
        Channel (column) of the LFP series, 0-based.
    extra : mapping of str to str, optional
        User variables: name -> NWB path of a ``TimeSeries``.
    extra_kinds : mapping of str to str, optional
        ``"interval"`` or ``"circular"`` per user variable (default: circular when the
        series' unit is an angle).
    track : {"linear", "circular"} or encodex.io.track.TrackLayout, optional
        The position is along a track (see :func:`encodex.io.read_recording`).
    run_distance : str, optional
        NWB path of the cumulative distance physically run, metres (default: looked for at
        ``processing/behavior/run_distance``).
    track_length_m : float, optional
        Length of the track, metres (a circular track's period), overriding the file.
    track_path : sequence of (x, y), optional
        Polyline of the track in the room, metres: 2-D tracking is projected onto it.
    **kw
        Options of :func:`build_session` (``bin_size``, ``speed_smoothing_s``,
        ``phase_band``, ...; on a track ``direction_speed``, ``lap_trials``, ``jump_speed``).
    """
    from encodex.io import read_recording

    if track_length_m is not None or track_path is not None:
        from encodex.io.track import TrackLayout

        shape = track if isinstance(track, str) else "linear"
        track = TrackLayout(shape, length_m=track_length_m,
                            path=None if track_path is None else tuple(map(tuple, track_path)))
    rec = read_recording(path, drop_empty_units=drop_empty_units, lfp=lfp,
                         lfp_channel=lfp_channel, extra=extra, extra_kinds=extra_kinds,
                         track=track, run_distance=run_distance, **dict(object_paths or {}))
    return build_session(rec, **kw)
