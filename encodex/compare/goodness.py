"""Does the chosen model describe the spike train? Goodness of fit on held-out predictions.

A label says that a variable improved held-out prediction; it does not say that the model
describes the spikes. Three checks, all on the *held-out* expected counts of the chosen
model (every bin predicted by the fold model that did not see it), answer that:

* **Time-rescaling (KS).** Under a correct conditional intensity the spike train, rescaled by
  the integrated intensity, is a unit-rate Poisson process, so the rescaled intervals are
  Exp(1) and ``z = 1 - exp(-tau)`` is uniform on [0, 1] (Brown, Barbieri, Ventura, Kass &
  Frank 2002). With bins of finite width the spike times are known only to a bin, and the
  naive rescaling is biased; the discrete-time correction of Haslinger, Pipa & Brown (2010)
  draws the position of the spike inside its bin: an interval from the end of spike bin ``j``
  to the first spike of the next spike bin ``k`` is
  ``tau = sum_{j<i<k} q_i - log(1 - r (1 - exp(-q_k)))`` with ``q_i = -log P(no spike in i)``
  (``= mu_i``, the expected count, for a Poisson model) and ``r`` uniform on [0, 1]. By the
  memorylessness of the Poisson process this is exact whatever the count of bin ``j``; a bin
  holding several spikes ends one interval. The KS distance is compared with the 95% point
  of its exact null distribution (``scipy.stats.kstwo``; Brown et al. 2002 use the asymptotic
  ``1.36 / sqrt(n)``).
* **Dispersion.** Held-out counts summed over windows of :data:`DISPERSION_WINDOW_S` seconds
  (contiguous rows) against the model's expected counts: the Pearson statistic per window,
  ``mean((Y - M)^2 / M)``, is 1 under the model; slow unmodelled gain changes push it above
  1, very regular firing below. Its two-sided p-value uses the exact Poisson variance of each
  term, ``Var[(Y - M)^2 / M] = 2 + 1 / M``, and the normal approximation.
* **Short-lag history.** Spike pairs within :data:`HISTORY_WINDOW_S` seconds (same bin and
  the next bins): observed over expected under the model, where a pair (i, j), i < j,
  expects ``y_i mu_j`` and a bin expects ``mu_j^2`` pairs of its own. Above 1: bursts; below
  1: refractoriness or regular firing, at the bin's resolution. Under the model each bin's
  term ``(y_j - mu_j) A_j + y_j (y_j - 1) - mu_j^2`` (``A_j`` the spikes of the preceding
  bins in the window) has mean zero given the past, so the sum is a martingale and its
  p-value uses the martingale normal approximation with variance
  ``sum mu_j A_j^2 + 4 mu_j^2 A_j + 2 mu_j^2 + 4 mu_j^3`` (derived here from the Poisson
  moments; the idea of testing spike-history terms in point-process GLMs: Truccolo, Eden,
  Fellows, Donoghue & Brown 2005, J. Neurophysiol. 93:1074).

References
----------
Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M. (2002). The
time-rescaling theorem and its application to neural spike train data analysis. Neural
Computation 14:325-346.
Haslinger, R., Pipa, G. & Brown, E. (2010). Discrete time rescaling theorem: determining
goodness of fit for discrete time statistical models of neural spiking. Neural Computation
22:2477-2506.
Truccolo, W., Eden, U. T., Fellows, M. R., Donoghue, J. P. & Brown, E. N. (2005). A point
process framework for relating neural spiking activity to spiking history, neural ensemble,
and extrinsic covariate effects. J. Neurophysiol. 93:1074-1089.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from encodex.errors import SettingsError

__all__ = [
    "GoodnessOfFit",
    "goodness_of_fit",
    "rescaled_intervals",
    "ks_distance",
    "ks_critical",
    "dispersion_test",
    "history_test",
    "heldout_series",
    "KS_LEVEL",
    "DISPERSION_WINDOW_S",
    "HISTORY_WINDOW_S",
    "KS_CURVE_POINTS",
]

#: Level of the KS band (95%).
KS_LEVEL = 0.95
#: Window of the dispersion check, seconds (many bins, so that slow gain changes show).
DISPERSION_WINDOW_S = 1.0
#: Window of the short-lag history check, seconds (same bin and following bins).
HISTORY_WINDOW_S = 0.05
#: Points of the KS curve kept per cell (for the figure; the statistic uses every interval).
KS_CURVE_POINTS = 200
#: Fewest rescaled intervals for a KS statement.
MIN_INTERVALS = 10


@dataclass(frozen=True)
class GoodnessOfFit:
    """Goodness of fit of one model to one spike train (held-out predictions).

    Attributes
    ----------
    n_intervals : int
        Rescaled intervals (spike bins minus one).
    ks_distance : float
        Largest gap between the empirical CDF of ``z`` and the uniform CDF.
    ks_critical : float
        95% point of the KS distance under the model for ``n_intervals``.
    ks_within_band : bool
        ``ks_distance <= ks_critical``.
    dispersion : float
        Pearson statistic per window of held-out counts (1 under the model).
    dispersion_p : float
        Two-sided p-value of ``dispersion == 1``.
    history_ratio : float
        Observed / expected spike pairs within the history window (1 under the model).
    history_p : float
        Two-sided p-value of ``history_ratio == 1``.
    ks_uniform, ks_rescaled : ndarray
        The KS curve: uniform quantiles ``(k - 1/2) / n`` and the sorted rescaled ``z`` at
        up to :data:`KS_CURVE_POINTS` evenly spaced ranks.
    """

    n_intervals: int
    ks_distance: float
    ks_critical: float
    ks_within_band: bool
    dispersion: float
    dispersion_p: float
    history_ratio: float
    history_p: float
    ks_uniform: np.ndarray
    ks_rescaled: np.ndarray

    def row(self) -> dict:
        """The per-cell columns of ``cells.csv``."""
        return {"ks_distance": self.ks_distance, "ks_critical": self.ks_critical,
                "ks_within_band": self.ks_within_band, "ks_intervals": self.n_intervals,
                "dispersion": self.dispersion, "dispersion_p": self.dispersion_p,
                "history_ratio": self.history_ratio, "history_p": self.history_p}

    def arrays(self) -> dict:
        """The KS curve for the unit npz (``goodness__*`` keys)."""
        return {"goodness__ks_uniform": self.ks_uniform,
                "goodness__ks_rescaled": self.ks_rescaled,
                "goodness__ks_critical": np.array(self.ks_critical)}


#: Columns ``GoodnessOfFit.row`` adds to cells.csv, in order.
GOODNESS_COLUMNS = ("ks_distance", "ks_critical", "ks_within_band", "ks_intervals",
                    "dispersion", "dispersion_p", "history_ratio", "history_p")


def heldout_series(n_rows: int, folds, predictions) -> np.ndarray:
    """Assemble per-fold held-out expected counts into one series in row (time) order.

    Parameters
    ----------
    n_rows : int
    folds : encodex.compare.folds.Folds
    predictions : sequence of ndarray
        ``predictions[k]``: expected counts of fold ``k``'s model on its own test rows.
    """
    mu = np.full(n_rows, np.nan)
    for k in range(folds.k):
        mu[folds.test_rows(k)] = predictions[k]
    return mu


def rescaled_intervals(y, mu, rng: np.random.Generator) -> np.ndarray:
    """Rescaled inter-spike intervals with the discrete-time correction.

    Parameters
    ----------
    y : ndarray of int, shape (n,)
        Spike counts per bin, time order.
    mu : ndarray, shape (n,)
        Expected counts per bin under the model (positive).
    rng : numpy Generator
        Stream for the position of each spike inside its bin.

    Returns
    -------
    ndarray
        ``tau`` of every interval between consecutive spike bins (Exp(1) under the model).

    References
    ----------
    Haslinger, Pipa & Brown (2010), Neural Computation 22:2477, eq. for the discrete-time
    rescaled interval; Brown et al. (2002), Neural Computation 14:325.
    """
    y = np.asarray(y)
    q = np.asarray(mu, dtype=float)
    spikes = np.flatnonzero(y > 0)
    if spikes.size < 2:
        return np.empty(0)
    cum = np.concatenate([[0.0], np.cumsum(q)])
    ends = spikes[1:]
    # Integrated intensity of the whole bins strictly between consecutive spike bins.
    between = cum[ends] - cum[spikes[:-1] + 1]
    r = rng.random(ends.size)
    # -log(1 - r (1 - exp(-q))) with -expm1 for small q.
    within = -np.log1p(r * np.expm1(-q[ends]))
    return between + within


def ks_critical(n: int, level: float = KS_LEVEL) -> float:
    """``level`` point of the two-sided one-sample KS distance for ``n`` draws (exact)."""
    return float(stats.kstwo.ppf(level, int(n)))


def ks_distance(tau: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """KS distance of ``z = 1 - exp(-tau)`` from the uniform, and the full KS curve.

    Returns
    -------
    (distance, uniform quantiles (k - 1/2)/n, sorted z)
    """
    z = np.sort(-np.expm1(-np.asarray(tau, dtype=float)))
    n = z.size
    k = np.arange(1, n + 1)
    d = float(max(np.max(k / n - z), np.max(z - (k - 1) / n)))
    return d, (k - 0.5) / n, z


def _thin(u: np.ndarray, z: np.ndarray, m: int = KS_CURVE_POINTS):
    if u.size <= m:
        return u, z
    idx = np.unique(np.linspace(0, u.size - 1, m).round().astype(int))
    return u[idx], z[idx]


def _windows(n: int, gaps: np.ndarray | None, size: int) -> np.ndarray:
    """Window index of each row: runs of ``size`` rows that do not cross a gap."""
    start = np.zeros(n, dtype=bool)
    start[0] = True
    if gaps is not None:
        start[np.asarray(gaps, dtype=bool)] = True
    seg = np.cumsum(start) - 1
    first = np.flatnonzero(start)
    pos = np.arange(n) - first[seg]
    return np.cumsum(start | (((pos % size) == 0) & (pos > 0))) - 1


def dispersion_test(y, mu, window_bins: int, gaps=None) -> tuple[float, float]:
    """Pearson dispersion of counts summed over windows, and its two-sided p-value.

    Parameters
    ----------
    y, mu : ndarray, shape (n,)
        Observed and expected counts per bin.
    window_bins : int
        Bins per window.
    gaps : ndarray of bool, optional
        True where a new contiguous stretch starts (windows do not cross it).

    Returns
    -------
    (dispersion, p_value)
        ``mean((Y - M)^2 / M)`` over windows (1 under the model) and the p-value of the
        normal approximation with the exact Poisson variance ``2 + 1/M`` of each term.
    """
    if window_bins < 1:
        raise SettingsError(f"window_bins must be at least 1 (got {window_bins})")
    y = np.asarray(y, dtype=float)
    mu = np.asarray(mu, dtype=float)
    w = _windows(y.size, gaps, int(window_bins))
    yw = np.bincount(w, weights=y)
    mw = np.bincount(w, weights=mu)
    keep = mw > 0
    yw, mw = yw[keep], mw[keep]
    if yw.size < 2:
        return float("nan"), float("nan")
    terms = (yw - mw) ** 2 / mw
    z = float((terms.sum() - yw.size) / np.sqrt(np.sum(2.0 + 1.0 / mw)))
    return float(terms.mean()), float(2 * stats.norm.sf(abs(z)))


def history_test(y, mu, lag_bins: int) -> tuple[float, float]:
    """Observed / expected spike pairs within ``lag_bins`` bins, and its two-sided p-value.

    Parameters
    ----------
    y, mu : ndarray, shape (n,)
        Observed and expected counts per bin, time order.
    lag_bins : int
        Pairs in the same bin and up to ``lag_bins`` bins apart count.

    Returns
    -------
    (ratio, p_value)
        1 under the model; > 1 bursts, < 1 refractoriness at the bin's resolution.
    """
    y = np.asarray(y, dtype=float)
    mu = np.asarray(mu, dtype=float)
    n = y.size
    cum = np.concatenate([[0.0], np.cumsum(y)])
    j = np.arange(n)
    # Spikes of the lag_bins bins before bin j.
    past = cum[j] - cum[np.maximum(j - int(lag_bins), 0)]
    observed = float(np.sum(y * past + y * (y - 1)))
    expected = float(np.sum(mu * past + mu ** 2))
    if expected <= 0:
        return float("nan"), float("nan")
    var = float(np.sum(mu * past ** 2 + 4 * mu ** 2 * past + 2 * mu ** 2 + 4 * mu ** 3))
    z = (observed - expected) / np.sqrt(var)
    return observed / expected, float(2 * stats.norm.sf(abs(z)))


def goodness_of_fit(y, mu, bin_size: float, rng: np.random.Generator, gaps=None,
                    dispersion_window_s: float = DISPERSION_WINDOW_S,
                    history_window_s: float = HISTORY_WINDOW_S) -> GoodnessOfFit:
    """All three checks of one spike train against held-out expected counts.

    Parameters
    ----------
    y : ndarray of int, shape (n,)
        Spike counts of the usable bins, time order.
    mu : ndarray, shape (n,)
        Held-out expected counts (see :func:`heldout_series`); non-positive or missing
        values are not allowed.
    bin_size : float
        Seconds per bin.
    rng : numpy Generator
        Stream for the within-bin positions of the time-rescaling check.
    gaps : ndarray of bool, optional
        True where a new contiguous stretch of time starts (dispersion windows stop there).
    dispersion_window_s, history_window_s : float
        Windows of the dispersion and short-lag history checks, seconds.

    Returns
    -------
    GoodnessOfFit
    """
    y = np.asarray(y)
    mu = np.asarray(mu, dtype=float)
    if mu.shape != y.shape or not np.all(np.isfinite(mu)) or np.any(mu <= 0):
        raise SettingsError("held-out expected counts must be positive and finite, one per "
                            "bin; pass the output of heldout_series")
    tau = rescaled_intervals(y, mu, rng)
    if tau.size >= MIN_INTERVALS:
        d, u, z = ks_distance(tau)
        crit = ks_critical(tau.size)
        u, z = _thin(u, z)
        within = bool(d <= crit)
    else:
        d = crit = float("nan")
        u = z = np.empty(0)
        within = False
    disp, disp_p = dispersion_test(y, mu, max(1, int(round(dispersion_window_s / bin_size))),
                                   gaps)
    lag = max(1, int(np.ceil(history_window_s / bin_size - 1e-9)))
    ratio, hist_p = history_test(y, mu, lag)
    return GoodnessOfFit(int(tau.size), d, crit, within, disp, disp_p, ratio, hist_p, u, z)


#: What the checks are, for run.json and the methods text.
GOODNESS_STATEMENT = (
    "The goodness of fit of each cell's chosen model (the baseline model for cells labelled "
    "'none') was checked on its held-out predictions, each bin predicted by the fold model "
    "that had not seen it: a time-rescaling Kolmogorov-Smirnov test with the discrete-time "
    "correction (Brown et al. 2002; Haslinger et al. 2010) against the 95% point of the "
    "exact KS distribution; the Pearson dispersion of held-out counts in "
    f"{DISPERSION_WINDOW_S:g} s windows (1 under the model); and the ratio of observed to "
    f"expected spike pairs within {HISTORY_WINDOW_S:g} s (short-lag history: above 1 for "
    "bursts, below 1 for refractoriness). A poor fit qualifies a label: the variables still "
    "improved prediction, but the model misses structure of the spike train, so its response "
    "curves and gains are approximate."
)
