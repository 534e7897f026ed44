"""Goodness-of-fit checks against ground-truth simulations and the time-rescaling theorem.

Sources:
- Brown, Barbieri, Ventura, Kass & Frank (2002), Neural Computation 14:325: under the true
  conditional intensity the rescaled intervals are Exp(1), so a KS test at 95% rejects about
  5% of correctly modelled trains.
- Haslinger, Pipa & Brown (2010), Neural Computation 22:2477: with bins of finite width the
  uncorrected rescaling is biased (rejects far more than 5% at rates of ~0.2-0.3 spikes per
  bin); the corrected one is not.
- Poisson moments (common practice, no source): E[(Y - M)^2 / M] = 1, Var = 2 + 1/M.
Trains are simulated bin by bin from a known rate, so the true intensity is the model.
"""

import numpy as np

from encodex.compare.goodness import goodness_of_fit, ks_critical, ks_distance

DT = 0.02
N = 20_000  # 400 s of 20 ms bins
T = np.arange(N) * DT


def _rate(seed, base=5.0):
    # inhomogeneous rate (Hz): slow modulation by a factor of ~10
    return base * np.exp(1.2 * np.sin(2 * np.pi * T / 7.3 + seed))


def _history_train(rng, mu, after_spike):
    """Train whose expected count is ``mu * after_spike[lag]`` for the bins after a spike."""
    y = np.zeros(mu.size, dtype=np.int64)
    gain = np.ones(mu.size + len(after_spike) + 1)
    for i in range(mu.size):
        y[i] = rng.poisson(mu[i] * gain[i])
        if y[i]:
            gain[i + 1:i + 1 + len(after_spike)] *= after_spike
    return y


def test_poisson_trains_fall_inside_the_band_at_the_stated_rate():
    # Brown et al. 2002: 95% of trains from the model lie inside the 95% band.
    inside, disp_rej, hist_rej = [], [], []
    for s in range(300):
        mu = _rate(s) * DT
        y = np.random.default_rng(s).poisson(mu)
        g = goodness_of_fit(y, mu, DT, np.random.default_rng(10_000 + s))
        inside.append(g.ks_within_band)
        disp_rej.append(g.dispersion_p < 0.05)
        hist_rej.append(g.history_p < 0.05)
    # 300 trains: binomial s.d. of the fraction is 0.0126; +-2.8 s.d.
    assert 0.915 <= np.mean(inside) <= 0.985
    assert np.mean(disp_rej) <= 0.09
    assert np.mean(hist_rej) <= 0.09


def test_correction_matters_at_high_rates():
    # Haslinger et al. 2010: the naive rescaling (spike at the bin's end) fails at 0.25
    # spikes per bin; the corrected one holds its level.
    naive_in, corrected_in = [], []
    for s in range(60):
        mu = np.full(N // 2, 0.25)
        y = np.random.default_rng(s).poisson(mu)
        spikes = np.flatnonzero(y)
        cum = np.concatenate([[0.0], np.cumsum(mu)])
        tau_naive = cum[spikes[1:] + 1] - cum[spikes[:-1] + 1]
        d, _, _ = ks_distance(tau_naive)
        naive_in.append(d <= ks_critical(tau_naive.size))
        corrected_in.append(goodness_of_fit(y, mu, DT, np.random.default_rng(s)).ks_within_band)
    assert np.mean(naive_in) < 0.1
    assert np.mean(corrected_in) >= 0.85


def test_bursty_and_refractory_trains_fall_outside():
    bursty, refractory = [], []
    for s in range(12):
        rng = np.random.default_rng(500 + s)
        mu = _rate(s) * DT
        # bursts: the two bins after a spike fire at 2.5 times the rate
        yb = _history_train(rng, mu, np.array([2.5, 2.5]))
        gb = goodness_of_fit(yb, mu, DT, np.random.default_rng(s))
        bursty.append((gb.ks_within_band, gb.history_ratio, gb.history_p))
        # refractoriness: the two bins after a spike fire at a twentieth of the rate; a high
        # rate so that the dead time matters
        mu_r = _rate(s, base=12.0) * DT
        yr = _history_train(rng, mu_r, np.array([0.05, 0.05]))
        gr = goodness_of_fit(yr, mu_r, DT, np.random.default_rng(s))
        refractory.append((gr.ks_within_band, gr.history_ratio, gr.history_p))
    for inside, ratio, p in bursty:
        assert not inside and ratio > 1.2 and p < 1e-3
    for inside, ratio, p in refractory:
        assert not inside and ratio < 0.8 and p < 1e-3


def test_overdispersed_trains_are_detected():
    # slow gamma-distributed gain (mean 1, s.d. 0.5) on 2 s blocks, absent from the model
    rejected, values = [], []
    for s in range(20):
        rng = np.random.default_rng(900 + s)
        mu = _rate(s) * DT
        gain = np.repeat(rng.gamma(4.0, 0.25, size=N // 100 + 1), 100)[:N]
        y = rng.poisson(mu * gain)
        g = goodness_of_fit(y, mu, DT, rng)
        rejected.append(g.dispersion_p < 0.05)
        values.append(g.dispersion)
    assert np.mean(rejected) >= 0.95
    # expected Pearson dispersion ~ 1 + M var(gain) with M ~ 6 spikes per 1 s window
    assert 1.8 < np.median(values) < 4.0
