"""Instantaneous phase of a brain rhythm from a local field potential (LFP) trace.

The trace is band-pass filtered with a zero-phase Butterworth filter (second-order sections
run forwards and backwards, so the filtered rhythm is not delayed) and its instantaneous phase
is the angle of the analytic signal given by the Hilbert transform. Phase is in radians,
wrapped to [0, 2*pi); 0 is the peak of the band-passed oscillation, pi its trough (the phase of
``cos``), so a cell firing on the trough has a preferred phase of pi.

:func:`band_phase` is the numerical kernel on one evenly sampled stretch. :func:`lfp_phase`
applies it to a whole trace: it splits the trace at sampling gaps, decimates traces sampled
much faster than the band needs (raw 20-30 kHz wide-band data), and marks as unknown (NaN)
the edges of each stretch, where the filter and the Hilbert transform are unreliable.
:func:`phase_on_bins` puts the phase on the session's bin grid (phase at each bin centre).

References
----------
Oppenheim, A. V. and Schafer, R. W. (2010). *Discrete-Time Signal Processing*, 3rd ed.,
Pearson, sec. 12 (discrete Hilbert transform, analytic signal).
Gustafsson, F. (1996). Determining the initial states in forward-backward filtering. *IEEE
Transactions on Signal Processing* 44:988-992 (the zero-phase filtering of
``scipy.signal.sosfiltfilt``).
"""

from __future__ import annotations

import numpy as np
from scipy import fft as _fft
from scipy import signal as _signal

from encodex.errors import InputError, SettingsError
from encodex.io.recording import wrap_angle

#: Default band, Hz: the rodent hippocampal theta rhythm (about 6-10 Hz; common practice, no
#: source).
DEFAULT_BAND: tuple[float, float] = (6.0, 10.0)
#: Default Butterworth order of the band-pass design (the forward-backward pass doubles the
#: effective order and squares the magnitude response). Order 3 gives a flat pass band and
#: about 36 dB of attenuation one octave outside a 6-10 Hz band after the two passes, without
#: the long ringing of higher orders (common practice, no source).
DEFAULT_ORDER = 3
#: Number of periods of the band's low edge marked unknown at each end of every stretch of
#: trace: the forward-backward filter and the FFT-based Hilbert transform both distort the
#: phase near the ends, most for frequencies at the band edges (measured on clean sinusoids
#: of 6-10 Hz with the 6-10 Hz band, 250-2000 Hz sampling: up to 0.12 rad at 3 periods,
#: below 0.015 rad at 6 periods; reference_checks/test_phase_reference.py). Six periods are
#: 1 s for theta, a negligible loss in a session of minutes.
EDGE_PERIODS = 6.0
#: A trace is decimated before filtering when it is sampled faster than this many times the
#: band's high edge (and faster than 500 Hz): filtering a 30 kHz trace for a 10 Hz rhythm
#: wastes time and makes the low-frequency filter sections numerically touchy.
_OVERSAMPLING = 50.0
_MIN_RATE_HZ = 500.0


def _check_band(band, rate_hz: float) -> tuple[float, float]:
    try:
        lo, hi = (float(b) for b in band)
    except (TypeError, ValueError):
        raise SettingsError(f"band must be two frequencies (low, high) in Hz, got {band!r}") \
            from None
    nyquist = 0.5 * rate_hz
    if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo < hi < nyquist):
        raise SettingsError(
            f"band ({lo:g}, {hi:g}) Hz must satisfy 0 < low < high < {nyquist:g} Hz (half the "
            "LFP sampling rate); e.g. --band 6 10 for theta"
        )
    return lo, hi


def band_phase(signal, rate_hz: float, band=DEFAULT_BAND, order: int = DEFAULT_ORDER) -> np.ndarray:
    """Instantaneous phase of one band of an evenly sampled signal.

    Parameters
    ----------
    signal : array_like, shape (n,)
        Evenly sampled trace (any unit, e.g. volts), finite.
    rate_hz : float
        Sampling rate, Hz.
    band : (float, float)
        Pass band (low, high), Hz; theta (6, 10) by default.
    order : int
        Butterworth order of the band-pass design (default 3).

    Returns
    -------
    ndarray, shape (n,)
        Phase in radians in [0, 2*pi): 0 at the peaks of the band-passed signal, pi at its
        troughs. The first and last few periods are less accurate (see :data:`EDGE_PERIODS`).

    Notes
    -----
    ``scipy.signal.butter(order, band, btype="bandpass", output="sos")`` run with
    ``scipy.signal.sosfiltfilt`` (zero phase), then ``angle(scipy.signal.hilbert(x))``. The
    FFT inside the Hilbert transform runs on the next fast length (zero padding at the end),
    so traces of awkward (e.g. prime) lengths take no longer than others.
    """
    x = np.asarray(signal, dtype=float)
    if x.ndim != 1:
        raise InputError(f"the LFP trace must be one channel (1-D), got shape {x.shape}")
    if not (np.isfinite(rate_hz) and rate_hz > 0):
        raise SettingsError(f"rate_hz must be a positive sampling rate in Hz, got {rate_hz}")
    if not np.all(np.isfinite(x)):
        raise InputError(
            "the LFP trace contains NaN or infinite samples; split it at the bad samples "
            "(encodex.rhythm.lfp_phase does this)"
        )
    lo, hi = _check_band(band, rate_hz)
    order = int(order)
    if not 1 <= order <= 8:
        raise SettingsError(f"order must be an integer in 1..8, got {order}; default 3")
    # sosfiltfilt pads 3 * (2 * n_sections + 1) samples by odd reflection; shorter traces
    # cannot be filtered.
    n_sections = order  # a band-pass of order N has N second-order sections
    min_len = 3 * (2 * n_sections + 1) + 1
    if x.size < max(min_len, int(np.ceil(2.0 * rate_hz / lo))):
        raise InputError(
            f"the LFP stretch has {x.size} samples ({x.size / rate_hz:.3g} s), shorter than two "
            f"periods of {lo:g} Hz; use a longer trace or a faster band"
        )
    sos = _signal.butter(order, [lo, hi], btype="bandpass", fs=rate_hz, output="sos")
    filtered = _signal.sosfiltfilt(sos, x - x.mean())
    n_fft = _fft.next_fast_len(x.size)
    analytic = _signal.hilbert(filtered, N=n_fft)[: x.size]
    return wrap_angle(np.angle(analytic))


def _stretches(times: np.ndarray, rate_hz: float) -> list[tuple[int, int]]:
    """[start, stop) index pairs of evenly sampled stretches (split where a sample is missing)."""
    d = np.diff(times)
    breaks = np.flatnonzero(d > 1.5 / rate_hz) + 1
    starts = np.concatenate([[0], breaks])
    stops = np.concatenate([breaks, [times.size]])
    return list(zip(starts.tolist(), stops.tolist()))


def lfp_phase(times, values, band=DEFAULT_BAND, order: int = DEFAULT_ORDER,
              edge_periods: float = EDGE_PERIODS) -> tuple[np.ndarray, np.ndarray]:
    """Phase of a band of an LFP trace with its own timestamps, edges marked unknown.

    Parameters
    ----------
    times : array_like, shape (n,)
        Sample times, seconds, strictly increasing; a jump of more than 1.5 sample periods
        splits the trace into stretches filtered separately.
    values : array_like, shape (n,)
        The trace; NaN samples also split it.
    band : (float, float)
        Pass band, Hz (default theta, 6-10 Hz).
    order : int
        Butterworth order (default 3).
    edge_periods : float
        Periods of the band's low edge marked NaN at both ends of every stretch.

    Returns
    -------
    times : ndarray
        Sample times of the phase, seconds (a subset of the input when it was decimated).
    phase : ndarray
        Phase in [0, 2*pi), NaN near stretch edges, in stretches too short to filter and at
        NaN samples.
    """
    t = np.asarray(times, dtype=float).ravel()
    x = np.asarray(values, dtype=float).ravel()
    if t.size != x.size:
        raise InputError(f"the LFP has {x.size} samples but {t.size} timestamps; give one each")
    if t.size < 2 or np.any(np.diff(t) <= 0) or not np.all(np.isfinite(t)):
        raise InputError("LFP timestamps must be finite and strictly increasing; fix the clock")
    rate = 1.0 / float(np.median(np.diff(t)))
    lo, hi = _check_band(band, rate)
    q = int(rate // max(_OVERSAMPLING * hi, _MIN_RATE_HZ))
    out_t, out_p = [], []
    edge_s = edge_periods / lo
    for a, b in _stretches(t, rate):
        ok = np.isfinite(x[a:b])
        # split further at NaN samples
        m = np.concatenate([[False], ok, [False]]).astype(np.int8)
        dd = np.diff(m)
        for s0, s1 in zip(np.flatnonzero(dd == 1) + a, np.flatnonzero(dd == -1) + a):
            ts, xs = t[s0:s1], x[s0:s1]
            r = rate
            if q >= 2 and xs.size > 3 * 9 + 1:
                # Zero-phase anti-alias low-pass at 0.4 of the new rate, then keep every q-th.
                aa = _signal.butter(4, 0.4 * rate / q, btype="lowpass", fs=rate, output="sos")
                xs = _signal.sosfiltfilt(aa, xs - xs.mean())[::q]
                ts = ts[::q]
                r = rate / q
            ph = np.full(ts.size, np.nan)
            try:
                ph = band_phase(xs, r, (lo, hi), order)
            except InputError:
                pass  # a stretch too short to filter stays unknown
            dur = ts - ts[0], ts[-1] - ts
            ph[(dur[0] < edge_s) | (dur[1] < edge_s)] = np.nan
            out_t.append(ts)
            out_p.append(ph)
            # a NaN separator keeps later resampling from bridging across the break
            if s1 < t.size:
                out_t.append(np.array([0.5 * (t[s1 - 1] + t[s1])]))
                out_p.append(np.array([np.nan]))
    return np.concatenate(out_t), np.concatenate(out_p)


def phase_on_bins(times, phase, t0: float, bin_size: float, n_bins: int) -> np.ndarray:
    """Phase at the centre of every bin, interpolated along the circle between samples.

    Parameters
    ----------
    times, phase : array_like, shape (n,)
        Phase samples (s, rad), NaN where unknown.
    t0 : float
        Left edge of the first bin, seconds (bin centres ``t0 + (k + 1/2) * bin_size``).
    bin_size : float
        Bin width, seconds.
    n_bins : int

    Returns
    -------
    ndarray, shape (n_bins,)
        Phase in [0, 2*pi); NaN for centres outside the samples or next to an unknown one.

    Notes
    -----
    Between two consecutive samples the phase is interpolated linearly along the shorter
    arc (a band-limited rhythm sampled above twice its highest frequency turns by less than
    pi per sample, so the shorter arc is the right one).

    Why the phase at the centre rather than the circular mean of the samples in the bin:
    spikes are counted over the whole bin, and the count's expected value is the tuning
    curve averaged over the phases the bin sweeps, which is symmetric about the centre's
    phase. The mean of the samples sits at their mean time, which is off the centre whenever
    the samples do not fall symmetrically in the bin (five 250 Hz samples at 0, 4, ..., 16 ms of
    a 20 ms bin have a mean time of 8 ms, not 10 ms): at 8 Hz that is a systematic 0.1 rad
    shift of every estimated preferred phase (measured: -0.08 rad on average over ten
    simulated phase-locked cells). Averaging would only buy noise reduction, and the
    band-passed phase is already smooth on the scale of a bin.
    """
    t = np.asarray(times, dtype=float)
    p = np.asarray(phase, dtype=float)
    centres = t0 + (np.arange(n_bins) + 0.5) * bin_size
    out = np.full(n_bins, np.nan)
    if t.size < 2:
        return out
    j = np.searchsorted(t, centres, side="right")
    inside = (j > 0) & (j < t.size)
    jj = np.clip(j, 1, t.size - 1)
    p0, p1 = p[jj - 1], p[jj]
    inside &= np.isfinite(p0) & np.isfinite(p1)
    step = np.angle(np.exp(1j * (p1 - p0)))  # shorter arc from sample j-1 to sample j
    frac = (centres - t[jj - 1]) / (t[jj] - t[jj - 1])
    out[inside] = wrap_angle((p0 + frac * step)[inside])
    return out


def check_bin_size(bin_size: float, band) -> None:
    """Refuse bins so long that the rhythm turns by more than half a cycle inside one.

    Raises
    ------
    encodex.errors.SettingsError
        When ``bin_size > 1 / (2 * high)``: the phase of a bin would be an average over more
        than half a cycle and carry little information.
    """
    lo, hi = (float(b) for b in band)
    if bin_size > 0.5 / hi + 1e-12:
        raise SettingsError(
            f"bin_size {bin_size:g} s spans more than half a cycle of {hi:g} Hz; use bins of at "
            f"most {0.5 / hi:.3g} s for phase (e.g. --bin-size 0.01)"
        )
