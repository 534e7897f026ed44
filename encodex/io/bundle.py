"""The npz bundle: a recording as plain numpy arrays in one ``.npz`` file (no pickles).

Keys (see docs/data_conventions.md):

=====================  ===============  ====================================================
key                    shape / dtype    meaning
=====================  ===============  ====================================================
``format``             () str           ``"encodex-bundle"`` (optional when reading)
``format_version``     () int           ``1`` (optional when reading)
``tracking_time``      (n,) float       tracking sample times, s (required)
``position``           (n, 2) float     x, y in metres, NaN for lost samples (required)
``heading``            (n,) float       head direction, rad (optional)
``unit_ids``           (k,) str         unit identifiers (required)
``spike_times``        (m,) float       all spike times, unit after unit, s (required)
``spike_index``        (k,) int         end offset of each unit in ``spike_times`` (required)
``trial_start``        (t,) float       trial starts, s (optional, with ``trial_stop``)
``trial_stop``         (t,) float       trial stops, s
``epoch_start``        (e,) float       epoch starts, s (optional, with the next two)
``epoch_stop``         (e,) float       epoch stops, s
``epoch_environment``  (e,) str         environment name of each epoch
``lfp_time``           (l,) float       LFP sample times, s (optional, with ``lfp_values``)
``lfp_values``         (l,) float       one LFP channel, volts
``extra_names``        (u,) str         user variables (optional), each with the keys
``extra_kinds``        (u,) str         ``interval`` or ``circular``
``extra__<name>__time``   (.,) float    sample times of variable <name>, s
``extra__<name>__values`` (.,) float    its values (radians when circular)
=====================  ===============  ====================================================
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import numpy as np

from encodex.errors import FileFormatError, InputError, OutputError
from encodex.io.recording import Recording, Signal, make_recording

FORMAT_NAME = "encodex-bundle"
FORMAT_VERSION = 1
_REQUIRED = ("tracking_time", "position", "unit_ids", "spike_times", "spike_index")


def write_bundle(recording: Recording, path) -> Path:
    """Write a recording to an npz bundle (plain arrays, no pickles).

    Parameters
    ----------
    recording : Recording
    path : str or Path
        Destination; ``.npz`` is appended by numpy when missing.

    Returns
    -------
    Path
        The file written.
    """
    path = Path(path)
    if path.suffix != ".npz":
        path = path.with_suffix(path.suffix + ".npz")
    lengths = np.array([s.size for s in recording.spike_times], dtype=np.int64)
    arrays = {
        "format": np.array(FORMAT_NAME),
        "format_version": np.array(FORMAT_VERSION),
        "tracking_time": recording.timestamps,
        "position": recording.position,
        "unit_ids": np.array(recording.unit_ids, dtype=str),
        "spike_times": np.concatenate(recording.spike_times),
        "spike_index": np.cumsum(lengths),
        "provenance": np.array(json.dumps(dict(recording.provenance))),
    }
    if recording.heading is not None:
        arrays["heading"] = recording.heading
    if recording.trials.shape[0]:
        arrays["trial_start"] = recording.trials[:, 0]
        arrays["trial_stop"] = recording.trials[:, 1]
    if recording.epochs:
        arrays["epoch_start"] = np.array([e[0] for e in recording.epochs])
        arrays["epoch_stop"] = np.array([e[1] for e in recording.epochs])
        arrays["epoch_environment"] = np.array([e[2] for e in recording.epochs], dtype=str)
    if recording.lfp is not None:
        arrays["lfp_time"] = recording.lfp.times
        arrays["lfp_values"] = recording.lfp.values
    if recording.track is not None:
        arrays["track_shape"] = np.array(recording.track.shape)
        if recording.track.length_m is not None:
            arrays["track_length_m"] = np.array(recording.track.length_m)
    if recording.run_distance is not None:
        arrays["run_distance_time"] = recording.run_distance.times
        arrays["run_distance_values"] = recording.run_distance.values
    if recording.extra:
        arrays["extra_names"] = np.array(list(recording.extra), dtype=str)
        arrays["extra_kinds"] = np.array([s.kind for s in recording.extra.values()], dtype=str)
        for name, sig in recording.extra.items():
            arrays[f"extra__{name}__time"] = sig.times
            arrays[f"extra__{name}__values"] = sig.values
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        np.savez_compressed(path, **arrays)
    except OSError as exc:
        raise OutputError(f"cannot write {path}: {exc.strerror}; check the folder") from None
    return path


def read_bundle(path, drop_empty_units: bool = False, track=None) -> Recording:
    """Read an npz bundle written by :func:`write_bundle` or by hand (keys in module doc).

    Parameters
    ----------
    path : str or Path
    drop_empty_units : bool
        Drop units without spikes instead of raising InputError.
    track : {"linear", "circular"} or encodex.io.track.TrackLayout, optional
        The position is along a track: overrides the keys ``track_shape`` and
        ``track_length_m``; a TrackLayout with a path projects 2-D tracking onto it. A
        one-column ``position`` is a linear track unless said otherwise.

    Returns
    -------
    Recording

    Raises
    ------
    encodex.errors.FileFormatError
        When the file is not a readable npz archive, holds pickled objects, or misses a
        required key.
    encodex.errors.InputError
        When the arrays are inconsistent (see :class:`Recording`).
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (zipfile.BadZipFile, EOFError, OSError) as exc:
        raise FileFormatError(
            f"{path.name} is not a readable npz bundle ({type(exc).__name__}); it may be "
            "truncated: write it again with encodex.io.write_bundle"
        ) from None
    except ValueError:
        raise FileFormatError(
            f"{path.name} holds pickled objects; store plain numeric and string arrays only"
        ) from None
    if "format" in data and str(data["format"]) != FORMAT_NAME:
        raise FileFormatError(
            f"{path.name} declares format {str(data['format'])!r}, not {FORMAT_NAME!r}; "
            "convert it with encodex.io.write_bundle"
        )
    missing = [k for k in _REQUIRED if k not in data]
    if missing:
        raise FileFormatError(
            f"{path.name} lacks key(s) {', '.join(missing)}; an npz bundle needs "
            f"{', '.join(_REQUIRED)} (see docs/data_conventions.md)"
        )
    flat = np.asarray(data["spike_times"], dtype=float).ravel()
    ends = np.asarray(data["spike_index"]).ravel().astype(np.int64)
    ids = [str(u) for u in np.asarray(data["unit_ids"]).ravel()]
    bad_index = ends.size != len(ids) or (
        ends.size and (ends[-1] != flat.size or np.any(np.diff(ends) < 0))
    )
    if bad_index:
        raise FileFormatError(
            f"{path.name}: spike_index must hold {len(ids)} non-decreasing end offsets "
            f"ending at {flat.size}; rebuild it as numpy.cumsum of the per-unit counts"
        )
    if len(set(ids)) != len(ids):
        raise FileFormatError(f"{path.name}: unit_ids are repeated; give each unit a unique id")
    trains = np.split(flat, ends[:-1]) if ends.size else []
    trials = None
    if "trial_start" in data or "trial_stop" in data:
        if not ("trial_start" in data and "trial_stop" in data):
            raise FileFormatError(
                f"{path.name} has only one of trial_start/trial_stop; give both"
            )
        a, b = np.ravel(data["trial_start"]), np.ravel(data["trial_stop"])
        if a.size != b.size:
            raise FileFormatError(
                f"{path.name}: {a.size} trial starts but {b.size} stops; give one stop per start"
            )
        trials = np.column_stack([a, b])
    epochs = None
    ekeys = ("epoch_start", "epoch_stop", "epoch_environment")
    if any(k in data for k in ekeys):
        if not all(k in data for k in ekeys):
            raise FileFormatError(
                f"{path.name} has only some of {', '.join(ekeys)}; give all three"
            )
        a, b, n = (np.ravel(data[k]) for k in ekeys)
        if not a.size == b.size == n.size:
            raise FileFormatError(
                f"{path.name}: epoch_start, epoch_stop and epoch_environment differ in "
                "length; give one of each per epoch"
            )
        epochs = [(float(x), float(y), str(z)) for x, y, z in zip(a, b, n)]
    lfp = None
    if "lfp_time" in data or "lfp_values" in data:
        if not ("lfp_time" in data and "lfp_values" in data):
            raise FileFormatError(f"{path.name} has only one of lfp_time/lfp_values; give both")
        lfp = Signal(np.ravel(data["lfp_time"]), np.ravel(data["lfp_values"]), "interval",
                     "lfp_values", "volts")
    extra = {}
    if "extra_names" in data:
        names = [str(x) for x in np.ravel(data["extra_names"])]
        kinds = ([str(x) for x in np.ravel(data["extra_kinds"])] if "extra_kinds" in data
                 else ["interval"] * len(names))
        if len(kinds) != len(names):
            raise FileFormatError(f"{path.name}: extra_kinds must give one kind per extra name")
        for name, kind in zip(names, kinds):
            tk, vk = f"extra__{name}__time", f"extra__{name}__values"
            if tk not in data or vk not in data:
                raise FileFormatError(f"{path.name} lacks {tk} or {vk} for user variable {name}")
            extra[name] = Signal(np.ravel(data[tk]), np.ravel(data[vk]), kind, vk)
    layout, position, heading = _bundle_track(path, data, track)
    run_distance = None
    if "run_distance_time" in data or "run_distance_values" in data:
        if not ("run_distance_time" in data and "run_distance_values" in data):
            raise FileFormatError(f"{path.name} has only one of run_distance_time/"
                                  "run_distance_values; give both")
        run_distance = Signal(np.ravel(data["run_distance_time"]),
                              np.ravel(data["run_distance_values"]), "interval",
                              "run_distance_values", "meters")
    provenance = {"source": f"npz bundle {path.name}"}
    if "provenance" in data:
        try:
            provenance.update(json.loads(str(data["provenance"])))
        except json.JSONDecodeError:
            pass  # notes only: an unreadable note is not worth refusing the file
    return make_recording(
        timestamps=data["tracking_time"],
        position=position,
        spikes=dict(zip(ids, trains)),
        heading=heading,
        trials=trials,
        epochs=epochs,
        provenance=provenance,
        drop_empty_units=drop_empty_units,
        lfp=lfp,
        extra=extra,
        track=layout,
        run_distance=run_distance,
    )


def _bundle_track(path, data, track):
    """Track layout, position and heading of a bundle (2-D tracking projected if asked)."""
    from encodex.io.track import TrackLayout, along_track

    position = np.asarray(data["position"], dtype=float)
    heading = data.get("heading")
    one_column = position.ndim == 1 or (position.ndim == 2 and position.shape[1] == 1)
    if isinstance(track, TrackLayout):
        layout = track
    elif track is not None or "track_shape" in data or one_column:
        shape = str(track or data.get("track_shape", "linear"))
        if shape not in ("linear", "circular"):
            raise InputError(f"{path.name}: track shape {shape!r} is unknown; use 'linear' or "
                             "'circular'")
        length = float(data["track_length_m"]) if "track_length_m" in data else None
        layout = TrackLayout(shape, length_m=length)
    else:
        return None, position, heading
    if not one_column:
        position, _ = along_track(position, layout)
        heading = None
    return layout, position, heading
