"""Track geometry: linear and circular tracks, and projection of 2-D tracking onto a track.

A track is one-dimensional: the position along it is a distance in metres from its start
(a linear track or corridor, from one end to the other) or round it (a circular track, from a
chosen origin, in [0, length)). :class:`TrackLayout` states which, and optionally the path of
the track in the room as a polyline, so that 2-D tracking can be projected onto it
(:func:`project_onto_path`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from encodex.errors import InputError, SettingsError

#: Shapes of a track.
TRACK_SHAPES = ("linear", "circular")


@dataclass(frozen=True)
class TrackLayout:
    """What kind of track the position lies on.

    Parameters
    ----------
    shape : {"linear", "circular"}
        A linear track (or virtual corridor) has two ends; a circular track closes on itself,
        so position wraps at ``length_m`` and its basis is periodic.
    length_m : float, optional
        Length of the track, metres. Required for a circular track (its period); for a
        linear track it is taken from the path, or else from the data.
    path : tuple of (float, float), optional
        Points (x, y) in metres of the track's centre line in the room, in order from its
        start; a circular track's path is closed from the last point back to the first.
        Needed only to project 2-D tracking onto the track.
    """

    shape: str = "linear"
    length_m: float | None = None
    path: tuple[tuple[float, float], ...] | None = None

    def __post_init__(self):
        if self.shape not in TRACK_SHAPES:
            raise SettingsError(f"track shape {self.shape!r} is unknown; use 'linear' or "
                                "'circular'")
        path = None
        if self.path is not None:
            pts = np.asarray(self.path, dtype=float)
            if pts.ndim != 2 or pts.shape[1] != 2 or pts.shape[0] < 2 \
                    or not np.all(np.isfinite(pts)):
                raise SettingsError(
                    "a track path needs at least two finite (x, y) points in metres, e.g. "
                    "((0, 0), (1.5, 0))")
            seg = np.hypot(*np.diff(_closed(pts, self.shape), axis=0).T)
            if np.any(seg <= 0):
                raise SettingsError("the track path repeats a point; give distinct points")
            path = tuple((float(x), float(y)) for x, y in pts)
            if self.length_m is None:
                object.__setattr__(self, "length_m", float(seg.sum()))
        object.__setattr__(self, "path", path)
        if self.length_m is not None:
            if not (np.isfinite(self.length_m) and self.length_m > 0):
                raise SettingsError(f"track length must be a positive number of metres, got "
                                    f"{self.length_m}")
            object.__setattr__(self, "length_m", float(self.length_m))
        if self.shape == "circular" and self.length_m is None:
            raise SettingsError("a circular track needs its length in metres (length_m) or "
                                "its path; give one")

    @property
    def circular(self) -> bool:
        return self.shape == "circular"

    def to_dict(self) -> dict:
        return {"shape": self.shape, "length_m": self.length_m,
                "path": None if self.path is None else [list(p) for p in self.path]}


def _closed(pts: np.ndarray, shape: str) -> np.ndarray:
    return np.vstack([pts, pts[:1]]) if shape == "circular" else pts


def project_onto_path(xy, layout: TrackLayout) -> tuple[np.ndarray, np.ndarray]:
    """Position along a track of 2-D tracking samples, by nearest point on its path.

    Parameters
    ----------
    xy : ndarray, shape (n, 2)
        Tracked (x, y), metres; NaN rows stay NaN.
    layout : TrackLayout
        With ``path`` set.

    Returns
    -------
    along : ndarray, shape (n,)
        Distance along the path from its first point to the nearest point on it, metres
        (circular: in [0, length)).
    off : ndarray, shape (n,)
        Distance from the sample to that nearest point, metres.
    """
    if layout.path is None:
        raise SettingsError("2-D tracking on a track needs the track's path to project onto: "
                            "--track-path X,Y X,Y ... or TrackLayout(path=...)")
    xy = np.asarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise InputError(f"tracking to project must have shape (n, 2), got {xy.shape}")
    pts = _closed(np.asarray(layout.path, dtype=float), layout.shape)
    a, b = pts[:-1], pts[1:]
    d = b - a
    seg_len = np.hypot(d[:, 0], d[:, 1])
    start = np.concatenate([[0.0], np.cumsum(seg_len)[:-1]])
    best = np.full(xy.shape[0], np.inf)
    along = np.full(xy.shape[0], np.nan)
    for k in range(a.shape[0]):
        t = ((xy - a[k]) @ d[k]) / seg_len[k] ** 2
        t = np.clip(t, 0.0, 1.0)
        near = a[k] + t[:, None] * d[k]
        dist = np.hypot(xy[:, 0] - near[:, 0], xy[:, 1] - near[:, 1])
        better = dist < best
        best[better] = dist[better]
        along[better] = start[k] + t[better] * seg_len[k]
    bad = ~np.all(np.isfinite(xy), axis=1)
    along[bad] = np.nan
    best[bad] = np.nan
    if layout.circular:
        along = np.mod(along, seg_len.sum())
    return along, best


def layout_text(layout: TrackLayout) -> str:
    """The text encodex writes as the ``reference_frame`` of a track position series.

    ``"linear track, 1.5 m long; position from its start"`` or ``"circular track, 2 m round;
    position from its origin"``; :func:`layout_from_text` reads it back.
    """
    if layout.circular:
        return f"circular track, {layout.length_m:g} m round; position from its origin"
    if layout.length_m is None:
        return "linear track; position from its start"
    return f"linear track, {layout.length_m:g} m long; position from its start"


def layout_from_text(text: str) -> TrackLayout | None:
    """A TrackLayout stated by a series' reference frame text, or None when it states none.

    The text states a circular track when it holds the word ``circular`` (or ``loop``), and
    its length as the first number followed by ``m`` (``"circular track, 2 m round"``).
    """
    import re

    t = str(text or "").lower()
    m = re.search(r"(\d+(?:\.\d*)?)\s*m\b", t)
    length = float(m.group(1)) if m else None
    if "circular" in t or "loop" in t:
        if length is None:
            raise InputError(f"the track position series says {text!r}: a circular track, but "
                             "not its length; write e.g. 'circular track, 2.0 m round'")
        return TrackLayout("circular", length_m=length)
    if "track" in t or "corridor" in t:
        return TrackLayout("linear", length_m=length)
    return None


def along_track(xy, layout: TrackLayout) -> tuple[np.ndarray, str]:
    """Position along the track of 2-D tracking: projected on the path, or the one axis that moves.

    Parameters
    ----------
    xy : ndarray, shape (n, 2)
        Tracking, metres.
    layout : TrackLayout

    Returns
    -------
    along : ndarray, shape (n,)
        Metres along the track.
    note : str
        How it was obtained (for the provenance).

    Raises
    ------
    encodex.errors.SettingsError
        Without a path, when both coordinates vary.
    """
    xy = np.asarray(xy, dtype=float)
    if layout.path is not None:
        along, off = project_onto_path(xy, layout)
        fin = off[np.isfinite(off)]
        med = float(np.median(fin)) if fin.size else float("nan")
        return along, f"2-D tracking projected onto the track path (median {med:.3g} m off it)"
    span = np.nanmax(xy, axis=0) - np.nanmin(xy, axis=0)
    still = span <= 1e-9 * max(1.0, float(np.nanmax(np.abs(xy))))
    if still.sum() == 1:
        k = int(np.flatnonzero(~still)[0])
        return xy[:, k], f"track position taken from {'xy'[k]} ({'xy'[1 - k]} is constant)"
    raise SettingsError("2-D tracking on a track needs the track's path to project onto: "
                        "--track-path X,Y X,Y ... or TrackLayout(path=...)")
