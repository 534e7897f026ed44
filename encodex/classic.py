"""Classic place-field measures: occupancy-normalised rate maps and Skaggs spatial information.

These are the model-free measures reviewers ask for beside the GLM labels. They are pure
numerical kernels: arrays in, arrays out, no I/O.

References
----------
Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993). An information-theoretic
approach to deciphering the hippocampal code. Advances in Neural Information Processing
Systems 5, 1030-1037.
Miller, G. A. (1955). Note on the bias of information estimates. In Information Theory in
Psychology: Problems and Methods, ed. H. Quastler, Free Press, 95-100.
Treves, A. & Panzeri, S. (1995). The upward bias in measures of information derived from
limited data samples. Neural Computation 7:399-407.
"""

from __future__ import annotations

import numpy as np

from encodex.errors import InputError, SettingsError

#: Spatial bins visited for less than this are given no rate in the report's maps, tables and
#: Skaggs information, s. Half a second holds 25 bins of 20 ms: fewer make a rate of one
#: stray spike read as tens of Hz (common practice, no source).
MIN_OCCUPANCY_S = 0.5

__all__ = ["MIN_OCCUPANCY_S", "spatial_edges", "occupancy_map", "rate_map", "skaggs_information",
           "skaggs_bias", "skaggs_information_corrected"]


def _check_edges(edges: np.ndarray, name: str) -> np.ndarray:
    edges = np.asarray(edges, dtype=float)
    if edges.ndim != 1 or edges.size < 2:
        raise InputError(
            f"{name} must be a 1-D array of at least 2 bin edges in metres; "
            f"got shape {edges.shape}; pass e.g. numpy.linspace(0, 1, 21)"
        )
    if not np.all(np.isfinite(edges)) or np.any(np.diff(edges) <= 0):
        raise InputError(
            f"{name} must be finite and strictly increasing; sort the edges or drop NaNs"
        )
    return edges


def spatial_edges(
    position: np.ndarray, bin_m: float = 0.05, valid: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Square spatial bins of side ``bin_m`` covering the visited positions.

    Parameters
    ----------
    position : ndarray, shape (n, 2)
        x, y in metres; NaN rows (unknown position) are ignored.
    bin_m : float
        Side of a spatial bin in metres.
    valid : ndarray of bool, shape (n,), optional
        Only these rows are used to find the extent.

    Returns
    -------
    edges_x, edges_y : ndarray
        Bin edges in metres, starting at the smallest visited coordinate.
    """
    position = np.asarray(position, dtype=float)
    if position.ndim != 2 or position.shape[1] != 2:
        raise InputError(
            f"position must have shape (n, 2) in metres; got {position.shape}"
        )
    if not np.isfinite(bin_m) or bin_m <= 0:
        raise SettingsError(f"bin_m must be a positive length in metres; got {bin_m}")
    keep = np.all(np.isfinite(position), axis=1)
    if valid is not None:
        keep &= np.asarray(valid, dtype=bool)
    if not keep.any():
        raise InputError("no finite position samples; check the position data and the mask")
    lo = position[keep].min(axis=0)
    hi = position[keep].max(axis=0)
    out = []
    for k in range(2):
        n = max(1, int(np.ceil((hi[k] - lo[k]) / bin_m - 1e-9)))
        # one extra bin when the top sample sits exactly on the last edge
        if lo[k] + n * bin_m <= hi[k]:
            n += 1
        out.append(lo[k] + bin_m * np.arange(n + 1))
    return out[0], out[1]


def occupancy_map(
    position: np.ndarray,
    counts: np.ndarray,
    bin_size: float,
    edges_x: np.ndarray,
    edges_y: np.ndarray,
    valid: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Time spent and spikes fired in each spatial bin.

    Parameters
    ----------
    position : ndarray, shape (n, 2)
        Animal position in metres at each time bin (x, y). Rows with NaN are skipped.
    counts : ndarray, shape (n,)
        Spike counts of one unit in each time bin (non-negative integers).
    bin_size : float
        Width of a time bin in seconds; each used time bin adds this much occupancy.
    edges_x, edges_y : ndarray
        Strictly increasing spatial bin edges in metres (nx + 1 and ny + 1 values).
        Samples outside the edges are skipped; the last bin includes its upper edge.
    valid : ndarray of bool, shape (n,), optional
        Only these time bins are counted (e.g. the session's usable bins of one environment).

    Returns
    -------
    occupancy_s : ndarray, shape (ny, nx)
        Seconds spent in each spatial bin (rows are y, columns are x).
    spikes : ndarray, shape (ny, nx)
        Spikes fired in each spatial bin.

    References
    ----------
    Skaggs et al. (1993), NIPS 5:1030 (occupancy-normalised firing maps).
    """
    position = np.asarray(position, dtype=float)
    counts = np.asarray(counts)
    if position.ndim != 2 or position.shape[1] != 2:
        raise InputError(
            f"position must have shape (n, 2) in metres; got {position.shape}"
        )
    n = position.shape[0]
    if counts.shape != (n,):
        raise InputError(
            f"counts must have shape ({n},) to match position; got {counts.shape}"
        )
    if counts.size and (not np.all(np.isfinite(counts)) or counts.min() < 0):
        raise InputError("counts must be finite and non-negative spike counts")
    if not np.isfinite(bin_size) or bin_size <= 0:
        raise SettingsError(f"bin_size must be a positive duration in seconds; got {bin_size}")
    ex = _check_edges(edges_x, "edges_x")
    ey = _check_edges(edges_y, "edges_y")
    keep = np.all(np.isfinite(position), axis=1)
    if valid is not None:
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != (n,):
            raise InputError(f"valid must have shape ({n},) to match position; got {valid.shape}")
        keep &= valid
    x, y = position[keep, 0], position[keep, 1]
    w = counts[keep].astype(float)
    # numpy's histogram2d returns (x, y) order; transpose so rows are y like an image
    occ, _, _ = np.histogram2d(x, y, bins=(ex, ey))
    spk, _, _ = np.histogram2d(x, y, bins=(ex, ey), weights=w)
    return occ.T * float(bin_size), spk.T


def rate_map(
    occupancy_s: np.ndarray, spikes: np.ndarray, min_occupancy_s: float = 0.1
) -> np.ndarray:
    """Occupancy-normalised firing rate in Hz (spikes / seconds) in each spatial bin.

    Parameters
    ----------
    occupancy_s : ndarray
        Seconds spent in each bin (from :func:`occupancy_map`).
    spikes : ndarray
        Spikes fired in each bin, same shape.
    min_occupancy_s : float
        Bins visited for less than this many seconds are NaN (too little data for a rate).

    Returns
    -------
    ndarray
        Rate in Hz, NaN where under-sampled.
    """
    occ = np.asarray(occupancy_s, dtype=float)
    spk = np.asarray(spikes, dtype=float)
    if occ.shape != spk.shape:
        raise InputError(
            f"occupancy_s {occ.shape} and spikes {spk.shape} must have the same shape"
        )
    if not np.isfinite(min_occupancy_s) or min_occupancy_s < 0:
        raise SettingsError(
            f"min_occupancy_s must be a non-negative duration in seconds; got {min_occupancy_s}"
        )
    out = np.full(occ.shape, np.nan)
    ok = (occ > 0) & (occ >= min_occupancy_s)
    out[ok] = spk[ok] / occ[ok]
    return out


def skaggs_information(
    occupancy_s: np.ndarray, spikes: np.ndarray, min_occupancy_s: float = 0.0
) -> float:
    """Skaggs spatial information in bits per spike.

    ``I = sum_i p_i (r_i / r) log2(r_i / r)`` where ``p_i`` is the fraction of time spent in
    bin ``i``, ``r_i`` the rate there and ``r = sum_i p_i r_i`` the mean rate; bins with
    ``r_i = 0`` contribute 0.

    Parameters
    ----------
    occupancy_s, spikes : ndarray
        Seconds and spikes per spatial bin (from :func:`occupancy_map`).
    min_occupancy_s : float
        Bins visited for less than this many seconds are left out (occupancy and spikes).

    Returns
    -------
    float
        Bits per spike; NaN when the cell fired no spike in the used bins (undefined).

    References
    ----------
    Skaggs, W. E., McNaughton, B. L., Gothard, K. M. & Markus, E. J. (1993). An
    information-theoretic approach to deciphering the hippocampal code. NIPS 5:1030-1037.
    """
    rates = rate_map(occupancy_s, spikes, min_occupancy_s=min_occupancy_s)
    occ = np.asarray(occupancy_s, dtype=float)
    used = np.isfinite(rates)
    if not used.any():
        raise InputError(
            "no spatial bin reaches the minimum occupancy; lower min_occupancy_s or use larger bins"
        )
    p = occ[used] / occ[used].sum()
    r = rates[used]
    mean_rate = float(np.sum(p * r))
    if mean_rate <= 0:
        return float("nan")
    ratio = r / mean_rate
    pos = ratio > 0
    return float(np.sum(p[pos] * ratio[pos] * np.log2(ratio[pos])))


def skaggs_bias(occupancy_s: np.ndarray, spikes: np.ndarray, min_occupancy_s: float = 0.0
                ) -> float:
    """First-order upward bias of the plug-in Skaggs information of an untuned cell, bits/spike.

    Skaggs information is the Kullback-Leibler divergence between where the spikes fell
    (``q_i``, estimated from N spikes) and where the animal was (``p_i``, known from the
    clock). For a cell whose spikes follow occupancy, ``2 N ln(2) I`` is the G statistic of
    a multinomial goodness-of-fit test with B used bins, asymptotically chi-square with
    ``B - 1`` degrees of freedom, so the expected estimate is ``(B - 1) / (2 N ln 2)`` bits per
    spike although the true value is 0: the first-order (Miller-Madow type) bias of Miller
    (1955) and Treves & Panzeri (1995). Bursts and slow rate drift make spikes less
    independent than multinomial sampling, so this is a lower bound on the real bias.

    Parameters
    ----------
    occupancy_s, spikes : ndarray
        Seconds and spikes per spatial bin (from :func:`occupancy_map`).
    min_occupancy_s : float
        Bins visited for less than this many seconds are left out, as in
        :func:`skaggs_information`.

    Returns
    -------
    float
        Bits per spike; NaN without spikes in the used bins.
    """
    rates = rate_map(occupancy_s, spikes, min_occupancy_s=min_occupancy_s)
    used = np.isfinite(rates)
    n = float(np.sum(np.asarray(spikes, dtype=float)[used]))
    if n <= 0:
        return float("nan")
    return float((used.sum() - 1) / (2.0 * n * np.log(2.0)))


def skaggs_information_corrected(occupancy_s: np.ndarray, spikes: np.ndarray,
                                 min_occupancy_s: float = 0.0) -> float:
    """Skaggs information minus its first-order bias (:func:`skaggs_bias`), bits per spike.

    About 0 for a cell that does not depend on position (it can be slightly negative; it is
    not clipped, so that averages over cells stay unbiased), and close to the plug-in value
    when spikes are many compared with the number of spatial bins.

    References
    ----------
    Skaggs et al. (1993), NIPS 5:1030; Miller (1955); Treves & Panzeri (1995), Neural
    Computation 7:399-407.
    """
    return skaggs_information(occupancy_s, spikes, min_occupancy_s) - skaggs_bias(
        occupancy_s, spikes, min_occupancy_s)
