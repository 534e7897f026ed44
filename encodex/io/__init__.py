"""Reading and writing recordings: NWB files and npz bundles.

``read_recording(path, **object_paths)`` dispatches on the file suffix (``.nwb`` or
``.npz``) and returns a :class:`Recording`; see ``docs/data_conventions.md`` for the
conventions each reader follows.
"""

from __future__ import annotations

from pathlib import Path

from encodex.errors import FileFormatError, InputError, SettingsError
from encodex.io.bundle import read_bundle, write_bundle
from encodex.io.nwb import read_nwb, write_nwb
from encodex.io.recording import (MAX_POSITION_EXTENT_M, Recording, Signal, make_recording,
                                  wrap_angle)

__all__ = [
    "MAX_POSITION_EXTENT_M",
    "Recording",
    "Signal",
    "make_recording",
    "parse_extra_option",
    "read_bundle",
    "read_nwb",
    "read_recording",
    "write_bundle",
    "wrap_angle",
    "write_nwb",
]


def read_recording(path, drop_empty_units: bool = False, lfp: str | None = None,
                   lfp_channel: int = 0, extra=None, extra_kinds=None, track=None,
                   run_distance: str | None = None, **object_paths) -> Recording:
    """Read a recording from an NWB file (``.nwb``) or an npz bundle (``.npz``).

    Parameters
    ----------
    path : str or Path
    drop_empty_units : bool
        Drop units without any spike instead of raising InputError.
    **object_paths
        NWB only: path inside the file of ``position``, ``heading``, ``units``, ``trials``
        or ``epochs`` (e.g. ``position="processing/tracking/Position/xy"``).
    lfp : str, optional
        NWB only: path of the LFP ``ElectricalSeries`` (or its ``LFP`` container) whose
        rhythm phase becomes the variable ``phase`` (see :func:`encodex.io.read_nwb`).
    lfp_channel : int
        NWB only: channel (column) of the LFP series, 0-based.
    extra : mapping of str to str, optional
        NWB only: user variables, name -> path of a ``TimeSeries``.
    extra_kinds : mapping of str to str, optional
        NWB only: ``"interval"`` or ``"circular"`` per user variable (default: circular when
        the series' unit is an angle).
    track : {"linear", "circular"} or encodex.io.track.TrackLayout, optional
        The position is along a track (see ``docs/data_conventions.md``): a one-column
        position is read as a linear track unless this or the file says circular; a
        TrackLayout with a ``path`` projects 2-D tracking onto it.
    run_distance : str, optional
        NWB only: path of the cumulative distance physically run (metres); by default
        ``processing/behavior/run_distance`` when the file has it.

    Returns
    -------
    Recording

    Raises
    ------
    encodex.errors.FileFormatError
        Missing, truncated or unknown files, or missing objects.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"no such file: {path}; check the path")
    suffix = path.suffix.lower()
    if suffix == ".nwb":
        return read_nwb(path, drop_empty_units=drop_empty_units, lfp=lfp,
                        lfp_channel=lfp_channel, extra=extra, extra_kinds=extra_kinds,
                        track=track, run_distance=run_distance, **object_paths)
    if suffix == ".npz":
        if lfp or extra or extra_kinds:
            raise SettingsError(
                "lfp and extra name objects inside an NWB file; an npz bundle carries its "
                "LFP (keys lfp_time, lfp_values) and user variables in its own keys"
            )
        if object_paths:
            raise SettingsError(
                f"object paths ({', '.join(object_paths)}) apply to NWB files only; "
                "drop them for an npz bundle"
            )
        if run_distance:
            raise SettingsError("run_distance names an object inside an NWB file; an npz "
                                "bundle carries it in the keys run_distance_time/_values")
        return read_bundle(path, drop_empty_units=drop_empty_units, track=track)
    raise FileFormatError(
        f"unknown file type {suffix!r} for {path.name}; give an .nwb file or an .npz bundle"
    )


def parse_extra_option(text: str) -> tuple[str, str, str | None]:
    """Parse a command-line user variable ``NAME=OBJECT_PATH[:KIND]``.

    Parameters
    ----------
    text : str
        E.g. ``"goal_bearing=processing/behavior/goal_bearing:circular"``; ``KIND`` is
        ``interval`` or ``circular`` and may be left out (then taken from the series' unit).

    Returns
    -------
    (name, path, kind)
        ``kind`` is None when not given. Pass ``extra={name: path}`` and, when given,
        ``extra_kinds={name: kind}`` to :func:`read_recording` or
        :func:`encodex.session.load_session`.

    Raises
    ------
    encodex.errors.SettingsError
        When the text is not of that form.
    """
    from encodex.io.recording import SIGNAL_KINDS

    name, sep, rest = str(text).partition("=")
    name, rest = name.strip(), rest.strip()
    kind = None
    if ":" in rest:
        head, _, tail = rest.rpartition(":")
        if tail in SIGNAL_KINDS:
            rest, kind = head, tail
        elif "/" not in tail:
            raise SettingsError(
                f"unknown kind {tail!r} in {text!r}; use NAME=OBJECT_PATH:interval or :circular"
            )
    if not sep or not name.isidentifier() or not rest:
        raise SettingsError(
            f"cannot read {text!r} as a user variable; write NAME=OBJECT_PATH[:KIND], e.g. "
            "goal_bearing=processing/behavior/goal_bearing:circular"
        )
    return name, rest, kind
