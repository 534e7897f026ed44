"""NWB reader and writer (via pynwb).

Conventions (docs/data_conventions.md has the full text):

* position: first ``SpatialSeries`` of a ``Position`` container in processing module
  ``behavior``; else the first ``Position`` container of any other processing module, then of
  ``acquisition``; (n, 2), converted to metres from the series' ``unit`` and ``conversion``;
* heading: first ``SpatialSeries`` of a ``CompassDirection`` container, searched the same
  way; radians (``degrees`` converted); absent -> movement direction;
* spikes: the ``units`` table (one bulk read of ``spike_times`` and its index); ids as
  given, or the ``unit_name`` column when present;
* trials: the ``trials`` table; epochs: the ``epochs`` table with environment from the column
  ``environment``, else the first tag;
* LFP (only when asked for, ``lfp="path"``): one channel of an ``ElectricalSeries`` (raw in
  ``acquisition`` or inside an ``LFP`` container of a processing module), read as a single
  column slice; user variables (``extra={"name": "path"}``): a ``TimeSeries`` each.

Every object can be named by its path in the file instead, e.g.
``read_nwb(path, position="processing/tracking/Position/xy")``.
"""

from __future__ import annotations

import datetime as _dt
import warnings
from pathlib import Path

import numpy as np

from encodex.errors import FileFormatError, InputError, OutputError, SettingsError
from encodex.io.recording import SIGNAL_KINDS, Recording, Signal, make_recording, wrap_angle

ROLES = ("position", "heading", "units", "trials", "epochs")

_LENGTH_TO_M = {
    "m": 1.0, "meter": 1.0, "meters": 1.0, "metre": 1.0, "metres": 1.0,
    "cm": 0.01, "centimeter": 0.01, "centimeters": 0.01, "centimetre": 0.01,
    "centimetres": 0.01,
    "mm": 0.001, "millimeter": 0.001, "millimeters": 0.001, "millimetre": 0.001,
    "millimetres": 0.001,
}
_ANGLE_TO_RAD = {
    "rad": 1.0, "radian": 1.0, "radians": 1.0,
    "deg": np.pi / 180, "degree": np.pi / 180, "degrees": np.pi / 180,
}


# --------------------------------------------------------------------------- helpers


def _open(path: Path):
    import h5py
    from pynwb import NWBHDF5IO

    try:
        with h5py.File(path, "r") as f:
            if "nwb_version" not in f.attrs and "general" not in f:
                raise FileFormatError(
                    f"{path.name} is an HDF5 file but not NWB (no nwb_version); export the "
                    "data to NWB or use an npz bundle"
                )
    except FileFormatError:
        raise
    except OSError:
        raise FileFormatError(
            f"{path.name} is not a readable NWB/HDF5 file (truncated or another format); "
            "check the file or export it again"
        ) from None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            io = NWBHDF5IO(str(path), mode="r", load_namespaces=True)
            nwbfile = io.read()
    except Exception as exc:  # pynwb raises many types for damaged files
        raise FileFormatError(
            f"{path.name} could not be read as NWB ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0][:120] if str(exc) else ''}); check it with nwbinspector"
        ) from None
    return io, nwbfile


def _children(obj):
    """Named children of a pynwb container (processing module, data interface...)."""
    for attr in ("data_interfaces", "spatial_series", "time_series", "electrical_series"):
        d = getattr(obj, attr, None)
        if isinstance(d, dict) or hasattr(d, "items"):
            try:
                return dict(d.items())
            except Exception:
                pass
    return {}


def _resolve(nwbfile, path: str):
    """Object at a slash path such as ``processing/behavior/Position/pos``."""
    parts = [p for p in str(path).strip("/").split("/") if p]
    if not parts:
        raise SettingsError(f"empty object path {path!r}; give e.g. processing/behavior/Position")
    top = parts[0]
    if top == "processing":
        cur = nwbfile.processing
    elif top == "acquisition":
        cur = nwbfile.acquisition
    elif top == "intervals":
        cur = nwbfile.intervals
    elif top == "units" and len(parts) == 1:
        if nwbfile.units is None:
            raise FileFormatError("the file has no units table at units; name another table")
        return nwbfile.units
    else:
        raise FileFormatError(
            f"object path {path!r} must start with processing/, acquisition/, intervals/ or "
            "be 'units'; copy the path from the file's layout"
        )
    walked = top
    for name in parts[1:]:
        mapping = cur if isinstance(cur, dict) else _children(cur)
        if name not in mapping:
            keys = ", ".join(map(str, mapping.keys())) or "none"
            raise FileFormatError(
                f"no object {name!r} under {walked} (found: {keys}); fix the object path"
            )
        cur = mapping[name]
        walked += "/" + name
    return cur


def _series_in(container, kind: str):
    """First SpatialSeries of a Position/CompassDirection container, with its name."""
    series = getattr(container, "spatial_series", None)
    if not series:
        return None
    name = sorted(series.keys())[0] if len(series) > 1 else next(iter(series.keys()))
    return name, series[name]


def _find_container(nwbfile, kind: str):
    """Search behavior, then other processing modules, then acquisition for a container type.

    Returns (path, series, searched) where searched lists where it looked.
    """
    searched = []
    modules = list(nwbfile.processing.keys())
    order = (["behavior"] if "behavior" in modules else []) + sorted(
        m for m in modules if m != "behavior"
    )
    if "behavior" not in modules:
        searched.append("processing/behavior (absent)")
    places = [(f"processing/{m}", nwbfile.processing[m].data_interfaces) for m in order]
    places.append(("acquisition", nwbfile.acquisition))
    for where, objs in places:
        searched.append(where)
        for name in sorted(objs.keys()):
            obj = objs[name]
            if type(obj).__name__ == kind:
                found = _series_in(obj, kind)
                if found is not None:
                    return f"{where}/{name}/{found[0]}", found[1], searched
    return None, None, searched


def _find_bare_xy(nwbfile):
    """First SpatialSeries with at least two columns lying directly in a module or acquisition."""
    modules = list(nwbfile.processing.keys())
    order = (["behavior"] if "behavior" in modules else []) + sorted(
        m for m in modules if m != "behavior"
    )
    places = [(f"processing/{m}", nwbfile.processing[m].data_interfaces) for m in order]
    places.append(("acquisition", nwbfile.acquisition))
    for where, objs in places:
        for name in sorted(objs.keys()):
            obj = objs[name]
            if type(obj).__name__ == "SpatialSeries" and len(obj.data.shape) == 2 \
                    and obj.data.shape[1] >= 2:
                return f"{where}/{name}", obj
    return None, None


def _series_times(series, what: str) -> np.ndarray:
    n = series.data.shape[0]
    if series.timestamps is not None:
        ts = np.asarray(series.timestamps[:], dtype=float)
        if ts.size != n:
            raise InputError(
                f"{what} has {n} samples but {ts.size} timestamps; fix the series in the file"
            )
        return ts
    rate = series.rate
    if rate is None or not np.isfinite(rate) or rate <= 0:
        raise FileFormatError(
            f"{what} has neither timestamps nor a positive rate; add one to the series"
        )
    start = float(series.starting_time or 0.0)
    return start + np.arange(n) / float(rate)


def _series_values(series) -> np.ndarray:
    data = np.asarray(series.data[:], dtype=float)
    conv = float(getattr(series, "conversion", 1.0) or 1.0)
    offset = float(getattr(series, "offset", 0.0) or 0.0)
    return data * conv + offset


def _read_position(nwbfile, path, provenance):
    if path:
        obj = _resolve(nwbfile, path)
        if type(obj).__name__ == "Position":
            name, obj = _series_in(obj, "Position")
            path = f"{path.rstrip('/')}/{name}"
        where = path
    else:
        where, obj, searched = _find_container(nwbfile, "Position")
        if obj is None:
            where, obj = _find_bare_xy(nwbfile)
            if obj is not None:
                provenance["position_note"] = "no Position container: used a bare SpatialSeries"
        if obj is None:
            raise FileFormatError(
                "no position found: looked for a Position container, then any (n, 2) "
                f"SpatialSeries, in {', '.join(searched)}; pass position='path/to/series'"
            )
    if not hasattr(obj, "data"):
        raise FileFormatError(f"{where} is not a time series; name a SpatialSeries")
    xy = _series_values(obj)
    if xy.ndim == 1:
        xy = xy[:, None]
    if xy.shape[1] == 1:
        # one column: a position along a track (metres)
        xy = _in_si_unit(xy, obj, _LENGTH_TO_M, "metres", "position_unit_note", provenance)
        provenance["position"] = where
        provenance["track_frame"] = str(getattr(obj, "reference_frame", "") or "")
        return _series_times(obj, f"position series {where}"), xy
    if xy.shape[1] > 2:
        provenance["position_note"] = f"used the first 2 of {xy.shape[1]} columns"
        xy = xy[:, :2]
    xy = _in_si_unit(xy, obj, _LENGTH_TO_M, "metres", "position_unit_note", provenance)
    provenance["position"] = where
    return _series_times(obj, f"position series {where}"), xy


def _series_unit(obj) -> str:
    return str(getattr(obj, "unit", "") or "").strip().lower()


def _in_si_unit(values, obj, factors, si_name, note_key, provenance, note=None):
    """Scale ``values`` by the factor of the series' unit; note an unknown unit."""
    unit = _series_unit(obj)
    if unit in factors:
        return values * factors[unit]
    provenance[note_key] = note or f"unit {unit!r} not recognised; values taken as {si_name}"
    return values


def _read_heading(nwbfile, path, provenance):
    if path:
        obj = _resolve(nwbfile, path)
        if type(obj).__name__ == "CompassDirection":
            name, obj = _series_in(obj, "CompassDirection")
            path = f"{path.rstrip('/')}/{name}"
        where = path
    else:
        where, obj, _ = _find_container(nwbfile, "CompassDirection")
        if obj is None:
            provenance["heading"] = "none in file: movement direction"
            return None, None
    h = _series_values(obj)
    if h.ndim == 2 and h.shape[1] == 1:
        h = h[:, 0]
    if h.ndim != 1:
        raise InputError(
            f"heading series {where} has shape {h.shape}; name a series with one angle per "
            "sample"
        )
    h = _in_si_unit(h, obj, _ANGLE_TO_RAD, "radians", "heading_unit_note", provenance)
    provenance["heading"] = where
    return _series_times(obj, f"heading series {where}"), h


def _find_units(nwbfile, path, provenance):
    if path:
        table = _resolve(nwbfile, path)
        where = path
    elif nwbfile.units is not None:
        table, where = nwbfile.units, "units"
    else:
        table, where = None, None
        for m in sorted(nwbfile.processing.keys()):
            for name, obj in nwbfile.processing[m].data_interfaces.items():
                cols = getattr(obj, "colnames", ()) or ()
                if "spike_times" in cols:
                    table, where = obj, f"processing/{m}/{name}"
                    break
            if table is not None:
                break
        if table is None:
            raise FileFormatError(
                "no spike times found: looked for the units table and for tables with a "
                "spike_times column in every processing module; pass units='path/to/table'"
            )
    cols = getattr(table, "colnames", ()) or ()
    if "spike_times" not in cols:
        raise FileFormatError(f"{where} has no spike_times column; name the units table")
    provenance["units"] = where
    return table


def _read_spikes(table):
    """All spike times in one bulk read of the flat dataset and its index."""
    col = table["spike_times"]
    ids = np.asarray(table.id.data[:])
    if hasattr(col, "target"):  # VectorIndex: ragged column
        ends = np.asarray(col.data[:], dtype=np.int64)
        flat = np.asarray(col.target.data[:], dtype=float)
        trains = np.split(flat, ends[:-1]) if ends.size else []
    else:
        trains = [np.asarray(x, dtype=float).ravel() for x in col.data[:]]
    names = [str(i) for i in ids]
    if "unit_name" in (getattr(table, "colnames", ()) or ()):
        names = [str(x.decode() if isinstance(x, bytes) else x) for x in table["unit_name"].data[:]]
    return names, trains


def _read_intervals(nwbfile, path, role, provenance):
    if path:
        table = _resolve(nwbfile, path)
        where = path
    else:
        table = getattr(nwbfile, role, None)
        where = f"intervals/{role}"  # the path that names this table again (--nwb-trials)
        if table is None:
            provenance[role] = "none in file"
            return None, None
    n = len(table)
    if n == 0:
        provenance[role] = f"{where} (empty)"
        return np.zeros((0, 2)), table
    start = np.asarray(table["start_time"].data[:], dtype=float)
    stop = np.asarray(table["stop_time"].data[:], dtype=float)
    provenance[role] = where
    return np.column_stack([start, stop]), table


def _epoch_names(table, where):
    cols = getattr(table, "colnames", ()) or ()
    if "environment" in cols:
        vals = table["environment"].data[:]
        return [str(v.decode() if isinstance(v, bytes) else v) for v in vals]
    if "tags" in cols:
        col = table["tags"]
        if hasattr(col, "target"):
            ends = np.asarray(col.data[:], dtype=np.int64)
            flat = [v.decode() if isinstance(v, bytes) else str(v) for v in col.target.data[:]]
            starts = np.concatenate([[0], ends[:-1]])
            names = []
            for i, (a, b) in enumerate(zip(starts, ends)):
                if b <= a:
                    raise FileFormatError(
                        f"epoch {i} in {where} has no tag and there is no environment column; "
                        "add an environment column to the epochs table"
                    )
                names.append(flat[a])
            return names
    raise FileFormatError(
        f"the epochs table {where} has neither an environment column nor tags; add an "
        "environment column naming each epoch's environment"
    )


def _read_lfp(nwbfile, path, channel, provenance) -> Signal:
    """One channel of an ElectricalSeries (or of the single series of an LFP container)."""
    obj = _resolve(nwbfile, path)
    where = str(path).strip("/")
    if type(obj).__name__ in ("LFP", "FilteredEphys"):
        series = dict(obj.electrical_series.items())
        if not series:
            raise FileFormatError(f"{where} holds no ElectricalSeries; name the series itself")
        if len(series) > 1:
            raise FileFormatError(
                f"{where} holds several series ({', '.join(sorted(series))}); name one, e.g. "
                f"{where}/{sorted(series)[0]}"
            )
        name, obj = next(iter(series.items()))
        where = f"{where}/{name}"
    if not hasattr(obj, "data") or type(obj).__name__ not in ("ElectricalSeries", "TimeSeries"):
        raise FileFormatError(
            f"{where} is a {type(obj).__name__}, not an ElectricalSeries; name the LFP series "
            "(e.g. processing/ecephys/LFP/lfp or acquisition/ElectricalSeries)"
        )
    shape = obj.data.shape
    n_ch = 1 if len(shape) == 1 else int(shape[1])
    channel = int(channel)
    if not 0 <= channel < n_ch:
        raise SettingsError(
            f"LFP channel {channel} out of range: {where} has {n_ch} channel(s); use 0.."
            f"{n_ch - 1}"
        )
    if len(shape) > 2:
        raise FileFormatError(f"{where} has shape {shape}; expected (samples, channels)")
    conv = float(getattr(obj, "conversion", 1.0) or 1.0)
    offset = float(getattr(obj, "offset", 0.0) or 0.0)
    ch_conv = getattr(obj, "channel_conversion", None)
    if ch_conv is not None and len(shape) == 2:
        conv *= float(np.asarray(ch_conv[channel]))

    def read(a, b):
        # One hyperslab read of the chosen column: the other channels are never loaded.
        raw = obj.data[a:b] if len(shape) == 1 else obj.data[a:b, channel]
        return np.asarray(raw, dtype=float) * conv + offset

    n = int(shape[0])
    rate = obj.rate
    unit = str(getattr(obj, "unit", "") or "")
    provenance["lfp"] = f"{where} channel {channel}"
    if obj.timestamps is None and rate and rate > LFP_DECIMATE_ABOVE_HZ:
        # Wide-band data (20-30 kHz): decimate while reading, a chunk at a time.
        q = int(rate // LFP_TARGET_RATE_HZ)
        values = _read_decimated(read, n, float(rate), q)
        start = float(obj.starting_time or 0.0)
        times = start + np.arange(values.size) * (q / float(rate))
        provenance["lfp_note"] = (
            f"decimated from {float(rate):g} Hz to {float(rate) / q:g} Hz while reading "
            "(zero-phase low-pass at 0.4 of the new rate)"
        )
    else:
        values = read(0, n)
        times = _series_times(obj, f"LFP series {where}")
    return Signal(times, values, "interval", f"{where}[:, {channel}]", unit)


#: Regularly sampled LFP series faster than this (Hz) are decimated while being read, so
#: that an hour of 30 kHz wide-band data never sits in memory at full rate.
LFP_DECIMATE_ABOVE_HZ = 2500.0
#: Rate (Hz) wide-band data are decimated to (at least): rhythms up to about 350 Hz keep
#: their phase (the anti-alias low-pass is at 0.4 of the new rate).
LFP_TARGET_RATE_HZ = 1000.0
#: Samples per chunk when decimating while reading (about 16 MB of float64).
LFP_CHUNK_SAMPLES = 1 << 21


def _read_decimated(read, n: int, rate: float, q: int) -> np.ndarray:
    """Every q-th sample of a zero-phase low-passed trace, read in overlapping chunks.

    Each chunk is filtered with a margin on both sides that is then dropped; the margin is
    many times the low-pass filter's impulse response, so the result equals filtering the
    whole trace at once up to rounding (checked in tests/test_rhythm.py).
    """
    from scipy import signal as _signal

    sos = _signal.butter(4, 0.4 * rate / q, btype="lowpass", fs=rate, output="sos")
    margin = 200 * q
    chunk = max(LFP_CHUNK_SAMPLES // q, 1) * q
    out = []
    for start in range(0, n, chunk):
        stop = min(start + chunk, n)
        a, b = max(0, start - margin), min(n, stop + margin)
        x = read(a, b)
        if x.size > 3 * 9 + 1:
            x = _signal.sosfiltfilt(sos, x)
        out.append(x[np.arange(start, stop, q) - a])
    return np.concatenate(out)


def _read_extra(nwbfile, name, path, kind, provenance) -> Signal:
    """A user variable from a TimeSeries (one value per sample)."""
    obj = _resolve(nwbfile, path)
    where = str(path).strip("/")
    if not hasattr(obj, "data") or not hasattr(obj, "timestamps"):
        raise FileFormatError(
            f"{where} is a {type(obj).__name__}, not a TimeSeries; name the series holding "
            f"variable {name!r}"
        )
    v = _series_values(obj)
    if v.ndim == 2 and v.shape[1] == 1:
        v = v[:, 0]
    if v.ndim != 1:
        raise InputError(
            f"variable {name!r} at {where} has shape {v.shape}; a user variable needs one "
            "value per sample (split the columns into separate series)"
        )
    unit = _series_unit(obj)
    if kind is None:
        kind = "circular" if unit in _ANGLE_TO_RAD else "interval"
    if kind not in SIGNAL_KINDS:
        raise SettingsError(f"kind {kind!r} of variable {name!r} is unknown; use interval or "
                            "circular")
    if kind == "circular":
        v = _in_si_unit(v, obj, _ANGLE_TO_RAD, "radians", f"extra:{name}_unit_note", provenance,
                        note=f"unit {unit!r} not an angle unit; values taken as radians")
    provenance[f"extra:{name}"] = f"{where} ({kind})"
    return Signal(_series_times(obj, f"series {where}"), v, kind, where, unit)


# --------------------------------------------------------------------------- public


#: Where a virtual environment's cumulative distance physically run is looked for.
RUN_DISTANCE_PATH = "processing/behavior/run_distance"


def _track_layout(track, frame: str, one_column: bool):
    """The TrackLayout of a recording: from the option, else from the series' frame text."""
    from encodex.io.track import TrackLayout, layout_from_text

    if isinstance(track, TrackLayout):
        return track
    stated = layout_from_text(frame) if one_column else None
    if track is None:
        return stated if stated is not None else (TrackLayout() if one_column else None)
    if track not in ("linear", "circular"):
        raise SettingsError(f"track {track!r} is unknown; use 'linear', 'circular' or a "
                            "TrackLayout")
    length = stated.length_m if stated is not None else None
    return TrackLayout(track, length_m=length)


def _read_run_distance(nwbfile, path, provenance) -> Signal | None:
    """Cumulative distance physically run (metres), at ``path`` or the conventional place."""
    given = path is not None
    where = str(path or RUN_DISTANCE_PATH).strip("/")
    try:
        obj = _resolve(nwbfile, where)
    except (FileFormatError, InputError):
        if given:
            raise
        return None
    if not hasattr(obj, "data"):
        raise FileFormatError(f"{where} is not a TimeSeries; name the series of distance run")
    v = _series_values(obj)
    if v.ndim == 2 and v.shape[1] == 1:
        v = v[:, 0]
    if v.ndim != 1:
        raise InputError(f"distance run at {where} has shape {v.shape}; give one column of "
                         "cumulative metres")
    v = _in_si_unit(v, obj, _LENGTH_TO_M, "metres", "run_distance_unit_note", provenance)
    provenance["run_distance"] = where
    return Signal(_series_times(obj, f"series {where}"), v, "interval", where, "meters")


def read_nwb(path, drop_empty_units: bool = False, lfp: str | None = None,
             lfp_channel: int = 0, extra=None, extra_kinds=None, track=None,
             run_distance: str | None = None,
             **object_paths) -> Recording:
    """Read a recording from an NWB file following the encodex conventions.

    Parameters
    ----------
    path : str or Path
        NWB (HDF5) file.
    drop_empty_units : bool
        Drop units without spikes instead of raising InputError.
    **object_paths
        Optional path inside the file for ``position``, ``heading``, ``units``, ``trials``,
        ``epochs`` (e.g. ``trials="intervals/runs"``), overriding the search.
    lfp : str, optional
        Path of an ``ElectricalSeries`` (e.g. ``acquisition/ElectricalSeries``) or of an
        ``LFP`` container holding one (e.g. ``processing/ecephys/LFP``): the trace from which
        the rhythm phase is computed. Only the chosen channel is read.
    lfp_channel : int
        Column of the series to read (0-based index into its channels; default 0).
    extra : mapping of str to str, optional
        User variables: name -> path of a ``TimeSeries`` (e.g. ``{"goal_bearing":
        "processing/behavior/goal_bearing"}``).
    extra_kinds : mapping of str to str, optional
        Basis kind of each user variable (``"interval"`` or ``"circular"``); by default
        circular when the series' unit is an angle (radians, degrees), interval otherwise.
    track : {"linear", "circular"} or encodex.io.track.TrackLayout, optional
        A one-column position series is a position along a track: linear unless this says
        circular or the series' ``reference_frame`` does (e.g. ``"circular track, 2.0 m
        round"``; the length is read from it). A TrackLayout with a ``path`` projects 2-D
        tracking onto the track.
    run_distance : str, optional
        Path of a TimeSeries of the cumulative distance physically run (metres), read instead
        of ``processing/behavior/run_distance``, where it is looked for by default.

    Returns
    -------
    Recording
        ``provenance`` names the object read for each part.

    Raises
    ------
    encodex.errors.FileFormatError
        Not an NWB file, truncated, or an expected object missing (the message lists where
        it was looked for).
    encodex.errors.SettingsError
        Unknown object role.
    """
    unknown = sorted(set(object_paths) - set(ROLES))
    if unknown:
        raise SettingsError(
            f"unknown object role(s) {', '.join(unknown)}; use {', '.join(ROLES)}"
        )
    path = Path(path)
    if not path.exists():
        raise InputError(f"no such file: {path}; check the path")
    io, nwbfile = _open(path)
    provenance: dict[str, str] = {"source": f"NWB file {path.name}"}
    try:
        ts, xy = _read_position(nwbfile, object_paths.get("position"), provenance)
        h_ts, heading = _read_heading(nwbfile, object_paths.get("heading"), provenance)
        if heading is not None and (h_ts.size != ts.size or not np.allclose(h_ts, ts)):
            ok = np.isfinite(heading)
            if ok.sum() < 2:
                raise InputError("heading series has fewer than 2 finite samples; drop it")
            th = h_ts[ok]
            un = np.interp(ts, th, np.unwrap(heading[ok]), left=np.nan, right=np.nan)
            # Do not bridge heading gaps wider than a few heading samples: leave them NaN so
            # that build_session applies its own gap rule.
            j = np.clip(np.searchsorted(th, ts), 1, th.size - 1)
            near = np.minimum(np.abs(ts - th[j - 1]), np.abs(th[j] - ts))
            step = float(np.median(np.diff(h_ts)))
            un[near > 1.5 * step] = np.nan
            heading = wrap_angle(un)
            provenance["heading_note"] = "resampled to position timestamps on the circle"
        table = _find_units(nwbfile, object_paths.get("units"), provenance)
        names, trains = _read_spikes(table)
        trials, _ = _read_intervals(nwbfile, object_paths.get("trials"), "trials", provenance)
        epochs_b, etable = _read_intervals(
            nwbfile, object_paths.get("epochs"), "epochs", provenance
        )
        epochs = None
        if epochs_b is not None and epochs_b.shape[0]:
            env = _epoch_names(etable, provenance["epochs"])
            epochs = [(a, b, n) for (a, b), n in zip(epochs_b, env)]
        lfp_signal = None
        if lfp:
            lfp_signal = _read_lfp(nwbfile, lfp, lfp_channel, provenance)
        kinds = dict(extra_kinds or {})
        unknown_kinds = sorted(set(kinds) - set(extra or {}))
        if unknown_kinds:
            raise SettingsError(
                f"kinds given for {', '.join(unknown_kinds)} but no such extra variable; name "
                "its series in extra={name: path}"
            )
        extra_signals = {
            name: _read_extra(nwbfile, name, p, kinds.get(name), provenance)
            for name, p in dict(extra or {}).items()
        }
        run_signal = _read_run_distance(nwbfile, run_distance, provenance)
    finally:
        io.close()
    if len(set(names)) != len(names):
        raise InputError("unit ids in the file are repeated; give each unit a unique id")
    layout = _track_layout(track, provenance.pop("track_frame", ""), xy.shape[1] == 1)
    if layout is not None and xy.shape[1] == 2:
        from encodex.io.track import along_track

        along, provenance["position_note"] = along_track(xy, layout)
        xy, heading = along[:, None], None
    return make_recording(
        timestamps=ts,
        position=xy,
        spikes=dict(zip(names, trains)),
        heading=heading,
        trials=trials,
        epochs=epochs,
        provenance=provenance,
        drop_empty_units=drop_empty_units,
        lfp=lfp_signal,
        extra=extra_signals,
        track=layout,
        run_distance=run_signal,
    )


def _regular_rate(ts: np.ndarray) -> float | None:
    d = np.diff(ts)
    if d.size and np.all(np.abs(d - d.mean()) <= 1e-9 * max(1.0, abs(ts[-1]))):
        return float(1.0 / d.mean())
    return None


def write_nwb(
    recording: Recording,
    path,
    session_description: str = "Recording written by encodex",
    identifier: str | None = None,
    session_start_time: _dt.datetime | None = None,
    subject_id: str = "animal-1",
    species: str = "Mus musculus",
    spike_time_resolution_s: float | None = None,
) -> Path:
    """Write a recording to an NWB file following the encodex conventions.

    Tracking goes to ``processing/behavior/Position/position`` (metres) and
    ``processing/behavior/CompassDirection/heading`` (radians), with a starting time and rate
    when the timestamps are regular; spikes to the ``units`` table (string ids in a
    ``unit_name`` column); trials and epochs (with an ``environment`` column) to their tables.
    An LFP channel goes to the ``ElectricalSeries`` ``processing/ecephys/LFP/lfp`` (volts,
    one electrode in the electrodes table), user variables to ``TimeSeries``
    ``processing/behavior/<name>`` (unit ``radians`` when circular).

    Parameters
    ----------
    recording : Recording
    path : str or Path
    session_description : str
    identifier : str, optional
        File identifier (default: a new UUID).
    session_start_time : datetime, optional
        Timezone-aware start (default 2026-01-01 UTC: simulated data have no real date).
    subject_id, species : str
        Subject metadata (required by the NWB best practices checked by nwbinspector).
    spike_time_resolution_s : float, optional
        Smallest difference between two spike times (1 / acquisition rate), seconds; stored
        as the units table's ``resolution``.

    Returns
    -------
    Path
    """
    import uuid

    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.behavior import CompassDirection, Position
    from pynwb.file import Subject

    path = Path(path)
    start = session_start_time or _dt.datetime(2026, 1, 1, tzinfo=_dt.timezone.utc)
    nwbfile = NWBFile(
        session_description=session_description,
        identifier=identifier or str(uuid.uuid4()),
        session_start_time=start,
        experiment_description="Open-field recording analysed with encodex",
        keywords=["encodex"],
        subject=Subject(subject_id=subject_id, species=species, sex="U", age="P90D",
                        description="subject of the recording"),
    )
    behavior = nwbfile.create_processing_module("behavior", "Tracked position and head direction")
    ts = recording.timestamps
    rate = _regular_rate(ts)
    timing = (
        {"starting_time": float(ts[0]), "rate": rate} if rate is not None else {"timestamps": ts}
    )
    if recording.track is not None:
        from encodex.io.track import layout_text

        frame, what = layout_text(recording.track), "Position along the track, metres"
    else:
        frame, what = ("(0, 0) is a corner of the arena; x, y",
                       "Tracked x, y position; NaN where tracking was lost")
    behavior.add(Position(spatial_series=_spatial_series(
        "position", recording.position, "meters", frame, what, timing)))
    if recording.run_distance is not None:
        from pynwb import TimeSeries

        rd = recording.run_distance
        behavior.add(TimeSeries(name="run_distance", data=np.asarray(rd.values), unit="meters",
                                description="Cumulative distance physically run (ball or "
                                "treadmill), metres", **_timing(rd.times)))
    if recording.heading is not None:
        behavior.add(
            CompassDirection(
                spatial_series=_spatial_series(
                    "heading", recording.heading, "radians",
                    "0 along +x, counter-clockwise positive",
                    "Head direction; NaN where tracking was lost", timing,
                )
            )
        )
    if spike_time_resolution_s is not None:
        from pynwb.misc import Units

        nwbfile.units = Units(
            name="units",
            description="sorted units",
            resolution=float(spike_time_resolution_s),
        )
    nwbfile.add_unit_column("unit_name", "unit id as used by encodex")
    for i, (uid, st) in enumerate(zip(recording.unit_ids, recording.spike_times)):
        nwbfile.add_unit(spike_times=st, unit_name=uid, id=i)
    if recording.trials.shape[0]:
        for a, b in recording.trials:
            nwbfile.add_trial(start_time=float(a), stop_time=float(b))
    if recording.epochs:
        nwbfile.add_epoch_column("environment", "name of the environment of the epoch")
        for a, b, name in recording.epochs:
            nwbfile.add_epoch(start_time=a, stop_time=b, tags=[name], environment=name)
    if recording.lfp is not None:
        _add_lfp(nwbfile, recording.lfp)
    for name, sig in recording.extra.items():
        from pynwb import TimeSeries

        behavior.add(TimeSeries(
            name=name, data=np.asarray(sig.values, dtype=float),
            unit="radians" if sig.kind == "circular" else (sig.unit or "n.a."),
            description=f"user variable {name} ({sig.kind})",
            **_timing(sig.times),
        ))
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with NWBHDF5IO(str(path), "w") as io:
            io.write(nwbfile)
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {exc}; check the folder") from None
    return path


def _spatial_series(name, data, unit, frame, description, timing):
    from pynwb.behavior import SpatialSeries

    return SpatialSeries(
        name=name,
        data=np.asarray(data, dtype=float),
        unit=unit,
        reference_frame=frame,
        description=description,
        **timing,
    )


def _timing(ts: np.ndarray) -> dict:
    rate = _regular_rate(ts)
    return {"starting_time": float(ts[0]), "rate": rate} if rate is not None else {
        "timestamps": ts}


def _add_lfp(nwbfile, sig: Signal) -> None:
    """One-channel LFP as processing/ecephys/LFP/lfp with the electrode metadata NWB needs."""
    from pynwb.ecephys import LFP

    device = nwbfile.create_device(name="probe", description="recording probe")
    group = nwbfile.create_electrode_group(
        name="shank0", description="electrodes of the LFP channel", location="hippocampus",
        device=device,
    )
    nwbfile.add_electrode(group=group, location="hippocampus")
    ecephys = nwbfile.create_processing_module("ecephys", "Local field potential")
    region = nwbfile.create_electrode_table_region([0], "the LFP electrode")
    lfp = LFP(name="LFP")
    ecephys.add(lfp)
    lfp.create_electrical_series(
        name="lfp", data=np.asarray(sig.values, dtype=float)[:, None], electrodes=region,
        description="local field potential, volts", **_timing(sig.times),
    )
