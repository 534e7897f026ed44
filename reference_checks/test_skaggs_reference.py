"""Skaggs spatial information and occupancy maps against worked examples computed by hand.

Source of the formula: Skaggs, McNaughton, Gothard & Markus (1993), "An information-theoretic
approach to deciphering the hippocampal code", NIPS 5:1030-1037, equation
I = sum_i p_i (r_i / r) log2(r_i / r), in bits per spike.
"""

import numpy as np
import pytest

from encodex.classic import occupancy_map, rate_map, skaggs_information, spatial_edges
from encodex.errors import InputError


def test_all_spikes_in_quarter_of_time_gives_two_bits():
    # By hand: p = (0.25, 0.75), r = (4, 0) Hz, mean r = 1 Hz;
    # I = 0.25 * 4 * log2(4) = 2 bits per spike.
    occ = np.array([[1.0, 3.0]])
    spk = np.array([[4.0, 0.0]])
    assert skaggs_information(occ, spk) == pytest.approx(2.0, abs=1e-12)


def test_two_rates_worked_example():
    # By hand: p = (0.5, 0.5), r = (3, 1) Hz, mean 2 Hz;
    # I = 0.5 * 1.5 * log2(1.5) + 0.5 * 0.5 * log2(0.5) = 0.75 * 0.5849625007 - 0.25
    #   = 0.1887218755 bits per spike.
    occ = np.array([[2.0], [2.0]])
    spk = np.array([[6.0], [2.0]])
    assert skaggs_information(occ, spk) == pytest.approx(0.1887218755, abs=1e-9)


def test_uniform_rate_carries_no_information():
    occ = np.array([[1.0, 2.0], [3.0, 4.0]])
    spk = 2.5 * occ  # 2.5 Hz everywhere
    assert skaggs_information(occ, spk) == pytest.approx(0.0, abs=1e-12)


def test_min_occupancy_drops_undersampled_bins():
    # The 0.05 s bin is dropped: p = (0.5, 0.5) over the two 1 s bins, r = (2, 0);
    # mean r = 1, I = 0.5 * 2 * log2(2) = 1 bit per spike.
    occ = np.array([[1.0, 1.0, 0.05]])
    spk = np.array([[2.0, 0.0, 5.0]])
    assert skaggs_information(occ, spk, min_occupancy_s=0.1) == pytest.approx(1.0, abs=1e-12)
    # Kept, the same bins give a different (hand-computed) value:
    # T = 2.05 s, N = 7, mean r = 7 / 2.05; contributions (spikes_i / N) log2(r_i / r):
    # (2/7) log2(2 / (7/2.05)) + (5/7) log2(100 / (7/2.05))
    r = 7 / 2.05
    expected = (2 / 7) * np.log2(2 / r) + (5 / 7) * np.log2(100 / r)
    assert skaggs_information(occ, spk) == pytest.approx(expected, abs=1e-12)


def test_silent_cell_is_undefined():
    assert np.isnan(skaggs_information(np.ones((2, 2)), np.zeros((2, 2))))


def test_occupancy_map_worked_example():
    # Five 0.02 s bins on a 2 x 2 grid of 0.5 m squares (edges 0, 0.5, 1 m).
    pos = np.array([
        [0.1, 0.1],   # lower-left
        [0.7, 0.2],   # lower-right
        [0.7, 0.9],   # upper-right
        [np.nan, 0.3],  # unknown position: skipped
        [0.2, 0.6],   # upper-left, masked below
        [1.0, 1.0],   # exactly on the top edge: last bin
    ])
    counts = np.array([1, 0, 3, 7, 2, 1])
    valid = np.array([True, True, True, True, False, True])
    edges = np.array([0.0, 0.5, 1.0])
    occ, spk = occupancy_map(pos, counts, 0.02, edges, edges, valid=valid)
    # rows are y, columns are x
    np.testing.assert_allclose(occ, [[0.02, 0.02], [0.0, 0.04]])
    np.testing.assert_allclose(spk, [[1, 0], [0, 4]])
    rates = rate_map(occ, spk, min_occupancy_s=0.01)
    np.testing.assert_allclose(rates, [[50.0, 0.0], [np.nan, 100.0]])


def test_spatial_edges_cover_all_samples():
    rng = np.random.default_rng(3)
    pos = rng.uniform(0, 0.93, size=(500, 2))
    ex, ey = spatial_edges(pos, 0.1)
    assert ex[0] == pos[:, 0].min() and ex[-1] > pos[:, 0].max()
    np.testing.assert_allclose(np.diff(ex), 0.1)
    occ, _ = occupancy_map(pos, np.zeros(500), 0.02, ex, ey)
    assert occ.sum() == pytest.approx(500 * 0.02)


def test_bad_inputs_raise_clear_errors():
    with pytest.raises(InputError, match="shape"):
        occupancy_map(np.zeros((3, 3)), np.zeros(3), 0.02, [0, 1], [0, 1])
    with pytest.raises(InputError, match="increasing"):
        occupancy_map(np.zeros((3, 2)), np.zeros(3), 0.02, [1, 0], [0, 1])
    with pytest.raises(InputError, match="same shape"):
        rate_map(np.ones((2, 2)), np.ones((2, 3)))


# --- bias correction -------------------------------------------------------------------------
# Source: the G statistic 2 N ln(2) I of a multinomial goodness-of-fit test is asymptotically
# chi-square with B - 1 degrees of freedom (Wilks 1938, Ann. Math. Stat. 9:60; the
# first-order bias of plug-in information estimates: Miller 1955; Treves & Panzeri 1995,
# Neural Computation 7:399-407; citations from memory). Ground truth by simulation: a cell
# whose spikes follow occupancy carries 0 bits per spike.

def test_bias_matches_chi_square_mean_for_untuned_cells():
    from encodex.classic import skaggs_bias, skaggs_information_corrected

    rng = np.random.default_rng(7)
    occ = rng.uniform(1.0, 5.0, (20, 20))          # 400 bins, seconds
    raw, corrected = [], []
    for _ in range(200):
        spk = rng.poisson(2.0 * occ).astype(float)  # 2 Hz everywhere: ~2400 spikes
        raw.append(skaggs_information(occ, spk))
        corrected.append(skaggs_information_corrected(occ, spk))
    bias = skaggs_bias(occ, rng.poisson(2.0 * occ).astype(float))
    # (B - 1) / (2 N ln 2) with B = 400, N ~ 2400: ~0.12 bits/spike; with ~6 spikes per bin
    # the second-order terms add about 5% (measured 0.123 against 0.117)
    assert np.mean(raw) == pytest.approx(bias, rel=0.08)
    assert -0.002 < np.mean(corrected) < 0.01        # raw mean is 0.12
    assert np.mean(raw) > 0.1


def test_corrected_keeps_a_place_field():
    from encodex.classic import skaggs_information_corrected

    rng = np.random.default_rng(8)
    occ = np.full((20, 20), 2.0)
    yy, xx = np.mgrid[0:20, 0:20]
    rate = 0.2 + 8.0 * np.exp(-((xx - 10) ** 2 + (yy - 8) ** 2) / (2 * 2.0 ** 2))
    truth = skaggs_information(occ, rate * occ)      # information of the noiseless map
    est = [skaggs_information_corrected(occ, rng.poisson(rate * occ).astype(float))
           for _ in range(50)]
    assert np.mean(est) == pytest.approx(truth, rel=0.05)
