"""Occupancy along a track: by running direction and lap by lap, and its Skaggs information.

The track analogue of the arena's occupancy map (:mod:`encodex.classic`): seconds spent and
spikes fired in each bin of position along the track, for all bins, running one way (+1) and
the other (-1), and for every lap separately (laps are told apart by the restart of the time,
or else of the distance, since the trial start). Skaggs information is computed on the 1-D
occupancy with :func:`encodex.classic.skaggs_information`.
"""

from __future__ import annotations

import numpy as np

from encodex.errors import InputError, SettingsError

#: Default width of a position bin along a track, metres (as the arena's 5 cm squares).
DEFAULT_TRACK_BIN_M = 0.05


def track_edges(position: np.ndarray, bin_m: float = DEFAULT_TRACK_BIN_M,
                length_m: float | None = None) -> np.ndarray:
    """Bin edges along a track, metres: [0, length] for a circular track, else the data range.

    Parameters
    ----------
    position : ndarray, shape (n,)
        Position along the track, metres (NaN ignored).
    bin_m : float
        Bin width, metres.
    length_m : float, optional
        Circumference of a circular track: the edges then cover [0, length_m) exactly, with
        bins as close to ``bin_m`` as fit a whole number of times.
    """
    if not (np.isfinite(bin_m) and bin_m > 0):
        raise SettingsError(f"bin_m must be a positive length in metres; got {bin_m}")
    if length_m is not None:
        n = max(1, int(round(length_m / bin_m)))
        return np.linspace(0.0, float(length_m), n + 1)
    x = np.asarray(position, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        raise InputError("no finite track position; check the position data and the mask")
    lo, hi = float(x.min()), float(x.max())
    n = max(1, int(np.ceil((hi - lo) / bin_m - 1e-9)))
    if lo + n * bin_m <= hi:
        n += 1
    return lo + bin_m * np.arange(n + 1)


def lap_index(covariates: dict) -> np.ndarray | None:
    """Lap number of each bin (0, 1, ...) from the restarts of ``time`` (else ``distance``).

    The bins are an environment's usable bins in time order; a lap starts where the time (or
    distance) since the trial start decreases. None when neither covariate is there.
    """
    for key in ("time", "distance"):
        v = covariates.get(key)
        if v is not None and np.ndim(v) == 1 and np.size(v) > 1:
            v = np.asarray(v, dtype=float)
            return np.concatenate([[0], np.cumsum(np.diff(v) < 0)])
    return None


def track_occupancy(position, direction, counts, bin_size: float, edges: np.ndarray,
                    laps: np.ndarray | None = None) -> dict:
    """Seconds and spikes per track bin, by direction and by lap.

    Parameters
    ----------
    position : ndarray, shape (n,)
        Track position of each bin, metres.
    direction : ndarray, shape (n,) or None
        Running direction (+1, -1, 0) of each bin; None: no per-direction rows.
    counts : ndarray, shape (n,)
        Spike counts per bin.
    bin_size : float
        Seconds per bin.
    edges : ndarray
        Position bin edges, metres.
    laps : ndarray of int, shape (n,), optional
        Lap of each bin, for the lap-by-position arrays.

    Returns
    -------
    dict
        ``track__edges``; ``track__occupancy_s`` and ``track__spikes`` of shape (3, n_bins)
        (rows: all bins, direction +1, direction -1); with laps ``track__lap_occupancy_s``,
        ``track__lap_spikes`` (n_laps, n_bins) and ``track__lap_direction`` (n_laps,), the
        mean running direction of each lap.
    """
    x = np.asarray(position, dtype=float)
    y = np.asarray(counts, dtype=float)
    nb = edges.size - 1
    k = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, nb - 1)
    ok = np.isfinite(x)
    d = np.zeros(x.size) if direction is None else np.asarray(direction, dtype=float)
    occ = np.zeros((3, nb))
    spk = np.zeros((3, nb))
    for row, sel in enumerate((ok, ok & (d > 0), ok & (d < 0))):
        occ[row] = np.bincount(k[sel], minlength=nb) * bin_size
        spk[row] = np.bincount(k[sel], weights=y[sel], minlength=nb)
    out = {"track__edges": edges, "track__occupancy_s": occ, "track__spikes": spk}
    if laps is not None:
        laps = np.asarray(laps, dtype=np.int64)
        n_laps = int(laps.max()) + 1 if laps.size else 0
        flat = laps[ok] * nb + k[ok]
        out["track__lap_occupancy_s"] = (np.bincount(flat, minlength=n_laps * nb)
                                         .reshape(n_laps, nb) * bin_size)
        out["track__lap_spikes"] = np.bincount(flat, weights=y[ok], minlength=n_laps * nb
                                               ).reshape(n_laps, nb)
        with np.errstate(invalid="ignore"):
            out["track__lap_direction"] = (np.bincount(laps, weights=d, minlength=n_laps)
                                           / np.maximum(np.bincount(laps, minlength=n_laps), 1))
    return out


def track_arrays(covariates: dict, counts, bin_size: float, kinds: dict | None = None,
                 bin_m: float = DEFAULT_TRACK_BIN_M) -> dict:
    """The track occupancy arrays of one cell in one environment (see :func:`track_occupancy`).

    ``kinds`` gives the kind of ``position`` (``"circular:<length>"`` on a circular track,
    whose bins then cover the loop exactly).
    """
    from encodex.variables import parse_kind

    pos = np.asarray(covariates["position"], dtype=float)
    if pos.size == 0 or not np.isfinite(pos).any():
        return {}
    _, period = parse_kind((kinds or {}).get("position", "interval"))
    edges = track_edges(pos, bin_m, period)
    return track_occupancy(pos, covariates.get("direction"), counts, bin_size, edges,
                           lap_index(covariates))
