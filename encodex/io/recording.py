"""The raw recording: tracking samples, spike times, trials and epochs as read from a file.

A :class:`Recording` holds data exactly as the file gives them (after unit conversion), with
structural checks done on construction so that every later stage can trust its shapes and
units. Turning it into a binned :class:`encodex.session.Session` is the job of
:func:`encodex.session.build_session`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from encodex.errors import InputError

#: Largest accepted extent (max - min) of either position coordinate, metres. Rodent arenas
#: and tracks are a few metres at most; a range beyond this almost always means centimetres,
#: millimetres or camera pixels were stored where metres were expected.
MAX_POSITION_EXTENT_M = 20.0

#: Heading values must lie within [-pi, 2*pi] (+ a small tolerance): both the [-pi, pi) and the
#: [0, 2*pi) conventions are accepted and wrapped; anything larger looks like degrees.
_HEADING_LIMIT = 2.0 * np.pi + 1e-6


def wrap_angle(angles) -> np.ndarray:
    """Wrap angles (rad) to [0, 2*pi), NaN kept.

    ``numpy.mod`` alone returns exactly 2*pi for tiny negative inputs (e.g. -1e-17), which
    would break the half-open interval.
    """
    out = np.mod(np.asarray(angles, dtype=float), 2.0 * np.pi)
    out[out >= 2.0 * np.pi] = 0.0
    return out


def _as_1d_float(name: str, values) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 2 and 1 in arr.shape:
        arr = arr.reshape(-1)
    if arr.ndim != 1:
        raise InputError(
            f"{name} must be one-dimensional, got shape {arr.shape}; pass a flat array"
        )
    return arr


def _check_increasing(name: str, t: np.ndarray) -> None:
    if not np.all(np.isfinite(t)):
        raise InputError(
            f"{name} contain NaN or infinite values; remove those samples or repair the clock"
        )
    d = np.diff(t)
    if np.any(d == 0):
        i = int(np.flatnonzero(d == 0)[0])
        raise InputError(
            f"{name} have duplicated values (first at index {i + 1}, t={t[i + 1]:.6g} s); "
            "drop the repeated samples"
        )
    if np.any(d < 0):
        i = int(np.flatnonzero(d < 0)[0])
        raise InputError(
            f"{name} are not increasing (index {i + 1}: {t[i + 1]:.6g} s after {t[i]:.6g} s); "
            "sort the samples by time or fix the clock"
        )


def _check_intervals(name: str, bounds: np.ndarray) -> np.ndarray:
    bounds = np.asarray(bounds, dtype=float)
    if bounds.size == 0:
        return np.zeros((0, 2))
    if bounds.ndim != 2 or bounds.shape[1] != 2:
        raise InputError(
            f"{name} must be an (n, 2) array of (start, stop) times in s, got shape "
            f"{bounds.shape}; stack start and stop columns"
        )
    if not np.all(np.isfinite(bounds)):
        raise InputError(f"{name} contain NaN or infinite times; give finite start and stop")
    bad = np.flatnonzero(bounds[:, 1] <= bounds[:, 0])
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"{name} row {i} stops before it starts ({bounds[i, 0]:.6g} s to "
            f"{bounds[i, 1]:.6g} s); swap or fix the times"
        )
    order = np.argsort(bounds[:, 0], kind="stable")
    s = bounds[order]
    overlap = np.flatnonzero(s[1:, 0] < s[:-1, 1] - 1e-9)
    if overlap.size:
        i = int(overlap[0])
        raise InputError(
            f"{name} overlap ({s[i, 0]:.6g}-{s[i, 1]:.6g} s and {s[i + 1, 0]:.6g}-"
            f"{s[i + 1, 1]:.6g} s); make the intervals disjoint"
        )
    return bounds


#: Basis kinds a user-defined variable may take.
SIGNAL_KINDS = ("interval", "circular")


@dataclass(frozen=True, eq=False)
class Signal:
    """A sampled signal with its own clock: an LFP channel or a user-defined variable.

    Parameters
    ----------
    times : ndarray, shape (n,)
        Sample times, seconds, strictly increasing.
    values : ndarray, shape (n,)
        Samples (LFP: volts; a user variable: its own unit, radians when circular); NaN
        marks unknown samples.
    kind : str
        ``"interval"`` (bounded scalar) or ``"circular"`` (angle in radians); for an LFP it
        is ignored.
    source : str
        Where it was read from (object path in the file), for the provenance.
    unit : str
        Unit of the values as declared by the file (informational).

    Raises
    ------
    encodex.errors.InputError
        On mismatched lengths, non-increasing times, or a kind other than interval/circular.
    """

    times: np.ndarray
    values: np.ndarray
    kind: str = "interval"
    source: str = ""
    unit: str = ""

    def __post_init__(self) -> None:
        what = self.source or "signal"
        t = _as_1d_float(f"timestamps of {what}", self.times)
        v = _as_1d_float(f"values of {what}", self.values)
        if t.size != v.size:
            raise InputError(
                f"{what} has {v.size} samples but {t.size} timestamps; give one time per sample"
            )
        if t.size < 2:
            raise InputError(f"{what} has {t.size} sample(s); at least 2 are needed")
        _check_increasing(f"timestamps of {what}", t)
        if self.kind not in SIGNAL_KINDS:
            raise InputError(
                f"kind {self.kind!r} of {what} is unknown; use 'interval' or 'circular'"
            )
        v = np.where(np.isfinite(v), v, np.nan)
        if self.kind == "circular":
            v = wrap_angle(v)
        t.setflags(write=False)
        v.setflags(write=False)
        object.__setattr__(self, "times", t)
        object.__setattr__(self, "values", v)

    @property
    def rate_hz(self) -> float:
        """Median sampling rate, Hz."""
        return float(1.0 / np.median(np.diff(self.times)))


@dataclass(frozen=True, eq=False)
class Recording:
    """A raw recording: tracking, spikes, trials and environments, in SI units.

    Parameters
    ----------
    timestamps : ndarray, shape (n,)
        Tracking sample times, seconds, strictly increasing.
    position : ndarray, shape (n, 2)
        Tracked (x, y) position, metres; NaN marks a lost sample.
    unit_ids : tuple of str
        Unit identifiers, kept as the file gives them.
    spike_times : tuple of ndarray
        Spike times of each unit, seconds (sorted on construction).
    heading : ndarray, shape (n,), optional
        Head direction, radians (any of [-pi, pi) or [0, 2*pi); wrapped to [0, 2*pi)).
        ``None`` when the file has none: movement direction is used instead.
    trials : ndarray, shape (n_trials, 2)
        Trial (start, stop) times, seconds. Empty when there are no trials.
    epochs : tuple of (float, float, str)
        (start s, stop s, environment name) of each epoch. Empty: the whole recording is one
        environment.
    provenance : Mapping[str, str]
        Which object of the file each part was read from (e.g. ``"position":
        "processing/behavior/Position/position"``) and other notes.
    lfp : Signal, optional
        One LFP channel (volts) from which the rhythm phase is computed; None without.
    extra : Mapping[str, Signal]
        User-defined variables by name, each with its basis kind.
    track : encodex.io.track.TrackLayout, optional
        Set when the position is one-dimensional, along a linear or circular track: then
        ``position`` has shape (n, 1), metres along the track (circular: wrapped to
        [0, length)). None for 2-D tracking.
    run_distance : Signal, optional
        Cumulative distance physically run (ball or treadmill), metres, in a virtual
        environment: speed and travelled distance are taken from it instead of from the
        virtual position. None without.

    Raises
    ------
    encodex.errors.InputError
        On duplicated or non-increasing timestamps, mismatched lengths, heading in degrees,
        position not in metres, NaN spike times, or inverted/overlapping intervals.
    """

    timestamps: np.ndarray
    position: np.ndarray
    unit_ids: tuple[str, ...]
    spike_times: tuple[np.ndarray, ...]
    heading: np.ndarray | None = None
    trials: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    epochs: tuple[tuple[float, float, str], ...] = ()
    provenance: Mapping[str, str] = field(default_factory=dict)
    lfp: Signal | None = None
    extra: Mapping[str, Signal] = field(default_factory=dict)
    track: object | None = None
    run_distance: Signal | None = None

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        if self.run_distance is not None and not isinstance(self.run_distance, Signal):
            raise InputError("run_distance must be an encodex.io.Signal of cumulative metres")
        if self.lfp is not None and not isinstance(self.lfp, Signal):
            raise InputError("lfp must be an encodex.io.Signal (times, values); wrap the trace")
        extra = dict(self.extra or {})
        for name, sig in extra.items():
            _check_extra_name(name)
            if not isinstance(sig, Signal):
                raise InputError(
                    f"extra variable {name!r} must be an encodex.io.Signal(times, values, kind)"
                )
        set_(self, "extra", extra)
        t = _as_1d_float("tracking timestamps", self.timestamps)
        if t.size < 2:
            raise InputError(
                f"tracking has {t.size} sample(s); at least 2 are needed to define a recording"
            )
        _check_increasing("tracking timestamps", t)
        pos = np.asarray(self.position, dtype=float)
        if self.track is not None:
            pos = _track_position(pos, self.track, t.size)
        elif pos.ndim != 2 or pos.shape[1] != 2:
            raise InputError(
                f"position must have shape (n, 2) in metres, got {pos.shape}; pass x and y "
                "columns, or for a position along a track pass track=TrackLayout(...)"
            )
        if pos.shape[0] != t.size:
            raise InputError(
                f"position has {pos.shape[0]} samples but there are {t.size} timestamps; "
                "give one timestamp per tracking sample"
            )
        pos = np.where(np.isfinite(pos), pos, np.nan)
        pos[np.isnan(pos).any(axis=1)] = np.nan
        if np.all(np.isnan(pos)):
            raise InputError("position has no finite sample; check the tracking data")
        extent = np.nanmax(pos, axis=0) - np.nanmin(pos, axis=0)
        if np.any(extent > MAX_POSITION_EXTENT_M):
            raise InputError(
                f"position spans {extent.max():.4g} m, more than {MAX_POSITION_EXTENT_M:g} m; "
                "it is probably in cm, mm or pixels: convert it to metres"
            )
        heading = self.heading
        if heading is not None:
            heading = _as_1d_float("heading", heading)
            if heading.size != t.size:
                raise InputError(
                    f"heading has {heading.size} samples but there are {t.size} timestamps; "
                    "give one heading per tracking sample"
                )
            heading = np.where(np.isfinite(heading), heading, np.nan)
            finite = heading[np.isfinite(heading)]
            if finite.size and (finite.max() > _HEADING_LIMIT or finite.min() < -np.pi - 1e-6):
                raise InputError(
                    f"heading ranges over [{finite.min():.4g}, {finite.max():.4g}], beyond "
                    "[-pi, 2*pi]: it looks like degrees; convert with numpy.deg2rad"
                )
            heading = wrap_angle(heading)
        ids = tuple(str(u) for u in self.unit_ids)
        if len(ids) == 0:
            raise InputError("the recording has no units; add spike times of at least one unit")
        if len(set(ids)) != len(ids):
            dup = sorted({u for u in ids if ids.count(u) > 1})
            raise InputError(f"unit ids are repeated ({', '.join(dup[:5])}); give unique ids")
        if len(self.spike_times) != len(ids):
            raise InputError(
                f"{len(self.spike_times)} spike trains for {len(ids)} unit ids; give one "
                "array of spike times per unit"
            )
        trains = []
        for uid, st in zip(ids, self.spike_times):
            st = _as_1d_float(f"spike times of unit {uid}", st)
            if not np.all(np.isfinite(st)):
                raise InputError(
                    f"spike times of unit {uid} contain NaN or infinite values; remove them"
                )
            if st.size == 0:
                raise InputError(
                    f"unit {uid} has no spikes; remove it, or drop such units with "
                    "`encodex fit --drop-empty-units` (Python: drop_empty_units=True)"
                )
            trains.append(np.sort(st, kind="stable"))
        trials = _check_intervals("trials", self.trials)
        trials = trials[np.argsort(trials[:, 0], kind="stable")]
        epochs = tuple((float(a), float(b), str(n)) for a, b, n in self.epochs)
        if epochs:
            _check_intervals("epochs", np.array([[a, b] for a, b, _ in epochs]))
            for _, _, name in epochs:
                if not name.strip():
                    raise InputError("an epoch has an empty environment name; name it")
        for arr in (t, pos, trials):
            arr.setflags(write=False)
        if heading is not None:
            heading.setflags(write=False)
        for st in trains:
            st.setflags(write=False)
        set_(self, "timestamps", t)
        set_(self, "position", pos)
        set_(self, "heading", heading)
        set_(self, "unit_ids", ids)
        set_(self, "spike_times", tuple(trains))
        set_(self, "trials", trials)
        set_(self, "epochs", epochs)
        set_(self, "provenance", dict(self.provenance))

    @property
    def n_units(self) -> int:
        """Number of units."""
        return len(self.unit_ids)

    @property
    def spikes(self) -> dict[str, np.ndarray]:
        """Spike times (s) keyed by unit id."""
        return dict(zip(self.unit_ids, self.spike_times))

    @property
    def environments(self) -> tuple[str, ...]:
        """Environment names in order of first appearance."""
        seen: list[str] = []
        for _, _, name in self.epochs:
            if name not in seen:
                seen.append(name)
        return tuple(seen)


def _track_position(pos: np.ndarray, track, n: int) -> np.ndarray:
    """One-column (n, 1) track position in metres; circular tracks wrapped to [0, length)."""
    from encodex.io.track import TrackLayout

    if not isinstance(track, TrackLayout):
        raise InputError("track must be an encodex.io.track.TrackLayout; describe the track")
    if pos.ndim == 1:
        pos = pos[:, None]
    if pos.ndim != 2 or pos.shape[1] != 1:
        raise InputError(
            f"a track position must have shape (n,) or (n, 1) in metres along the track, got "
            f"{pos.shape}; project 2-D tracking with TrackLayout(path=...)")
    if pos.shape[0] != n:
        raise InputError(f"track position has {pos.shape[0]} samples but there are {n} "
                         "timestamps; give one timestamp per sample")
    pos = np.where(np.isfinite(pos), pos, np.nan)
    if track.circular:
        pos = np.mod(pos, track.length_m)
    return pos


def _check_extra_name(name) -> None:
    from encodex.variables import KINDS, VARIABLES

    if not isinstance(name, str) or not name.isidentifier():
        raise InputError(
            f"variable name {name!r} must be a plain identifier (letters, digits, _); rename it"
        )
    if name in VARIABLES or name in KINDS:
        raise InputError(
            f"variable name {name!r} is built into encodex; give the user variable another name"
        )


def make_recording(
    timestamps,
    position,
    spikes: Mapping[str, Sequence[float]] | Sequence[Sequence[float]],
    heading=None,
    trials=None,
    epochs=None,
    provenance: Mapping[str, str] | None = None,
    drop_empty_units: bool = False,
    lfp: Signal | None = None,
    extra: Mapping[str, Signal] | None = None,
    track=None,
    run_distance: Signal | None = None,
) -> Recording:
    """Build a :class:`Recording` from plain arrays (a convenience for in-memory data).

    Parameters
    ----------
    timestamps : array, shape (n,)
        Tracking sample times, seconds.
    position : array, shape (n, 2)
        Position, metres.
    spikes : mapping unit id -> spike times (s), or a sequence of spike-time arrays
        (ids are then ``"0"``, ``"1"``, ...).
    heading : array, shape (n,), optional
        Head direction, radians.
    trials : array (n_trials, 2), optional
        Trial start and stop times, seconds.
    epochs : sequence of (start, stop, environment name), optional
    provenance : mapping, optional
    drop_empty_units : bool
        Drop units without spikes instead of raising :class:`~encodex.errors.InputError`.
    lfp : Signal, optional
        One LFP channel for the rhythm phase.
    extra : mapping of name to Signal, optional
        User-defined variables.
    track : encodex.io.track.TrackLayout, optional
        The position is along this track: ``position`` of shape (n,) metres.
    run_distance : Signal, optional
        Cumulative distance physically run, metres (virtual environments).

    Returns
    -------
    Recording
    """
    if isinstance(spikes, Mapping):
        ids = [str(k) for k in spikes]
        trains = [np.asarray(v, dtype=float).reshape(-1) for v in spikes.values()]
    else:
        trains = [np.asarray(v, dtype=float).reshape(-1) for v in spikes]
        ids = [str(i) for i in range(len(trains))]
    prov = dict(provenance or {})
    if drop_empty_units:
        empty = [u for u, s in zip(ids, trains) if s.size == 0]
        if empty:
            prov["dropped_empty_units"] = ",".join(empty)
        keep = [i for i, s in enumerate(trains) if s.size > 0]
        ids = [ids[i] for i in keep]
        trains = [trains[i] for i in keep]
    return Recording(
        timestamps=timestamps,
        position=position,
        unit_ids=tuple(ids),
        spike_times=tuple(trains),
        heading=heading,
        trials=np.zeros((0, 2)) if trials is None else trials,
        epochs=tuple(epochs or ()),
        provenance=prov,
        lfp=lfp,
        extra=dict(extra or {}),
        track=track,
        run_distance=run_distance,
    )
