"""Wilson score intervals and the label tables against worked examples.

Sources:
- Wilson, E. B. (1927), JASA 22:209-212: interval
  (k + z^2/2) / (n + z^2) +- z / (n + z^2) * sqrt(k (n - k) / n + z^2 / 4).
- Newcombe, R. G. (1998), Stat. Med. 17:857-872, Table II, method 3 (Wilson score without
  continuity correction) for 81/263, 15/148, 0/20 and 1/29. These four published values are
  quoted from memory; the hand computation below confirms them to the 4 decimals printed.
"""

import math

import numpy as np
import pandas as pd
import pytest

from encodex.report.tables import label_counts, variable_counts, wilson_interval

Z = 1.959963984540054  # standard normal 0.975 quantile


def test_wilson_by_hand_3_of_11():
    # z^2 = 3.841459; centre = (3 + 1.920729) / 14.841459 = 0.331553;
    # half = 1.959964 / 14.841459 * sqrt(24/11 + 0.960365) = 0.132059 * 1.772620 = 0.234091
    lo, hi = wilson_interval(3, 11)
    assert lo == pytest.approx(0.097462, abs=2e-6)
    assert hi == pytest.approx(0.565644, abs=2e-6)
    # and the formula itself, written out
    z2 = Z * Z
    centre = (3 + z2 / 2) / (11 + z2)
    half = Z / (11 + z2) * math.sqrt(3 * 8 / 11 + z2 / 4)
    assert (lo, hi) == pytest.approx((centre - half, centre + half), abs=1e-12)


@pytest.mark.parametrize(
    "k, n, low, high",
    [(81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611),
     (1, 29, 0.0061, 0.1718)],
)
def test_wilson_matches_newcombe_1998_table(k, n, low, high):
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(low, abs=6e-5)
    assert hi == pytest.approx(high, abs=6e-5)


def test_wilson_level_is_used():
    # A 90% interval is narrower; with z = 1.644854 for 3/11 by the same formula:
    z = 1.6448536269514722
    centre = (3 + z * z / 2) / (11 + z * z)
    half = z / (11 + z * z) * math.sqrt(3 * 8 / 11 + z * z / 4)
    assert wilson_interval(3, 11, level=0.90) == pytest.approx((centre - half, centre + half))


def _cells(rows):
    cols = ["unit", "environment", "n_spikes", "status", "variables", "bits_per_spike",
            "gain_position", "gain_heading", "gain_speed", "gain_distance", "gain_time", "reason"]
    return pd.DataFrame(rows, columns=cols)


def test_label_and_variable_counts_by_hand():
    z = np.nan
    cells = _cells([
        ("a", "env", 500, "ok", "position", 0.4, 0.4, 0, 0, 0, 0, ""),
        ("b", "env", 500, "ok", "position", 0.2, 0.2, 0, 0, 0, 0, ""),
        ("c", "env", 500, "ok", "position+speed", 0.6, 0.5, 0, 0.1, 0, 0, ""),
        ("d", "env", 500, "ok", "none", 0.0, 0, 0, 0, 0, 0, ""),
        ("e", "env", 50, "too few spikes", "none", z, z, z, z, z, z, "fewer than 100 spikes"),
    ])
    lab = label_counts(cells).set_index("label")
    # 4 classified cells (the too-few-spikes cell is excluded from the denominator)
    assert lab.loc["position", "n_cells"] == 2 and lab.loc["position", "n_classified"] == 4
    assert lab.loc["position", "percent"] == pytest.approx(50.0)
    lo, hi = wilson_interval(2, 4)
    assert lab.loc["position", "ci_low_percent"] == pytest.approx(100 * lo)
    # 2/4 by hand: centre 0.5, half = 1.959964/7.841459 * sqrt(1 + 0.960365) = 0.349955
    assert lab.loc["position", "ci_high_percent"] == pytest.approx(84.9955, abs=1e-3)
    # median of gains 0.2 and 0.4 is 0.3; numpy's linear quartiles 0.25 and 0.35
    assert lab.loc["position", "gain_median_bits_per_spike"] == pytest.approx(0.3)
    assert lab.loc["position", "gain_q1_bits_per_spike"] == pytest.approx(0.25)
    assert lab.loc["position", "gain_q3_bits_per_spike"] == pytest.approx(0.35)
    var = variable_counts(cells).set_index("variable")
    assert var.loc["position", "n_cells"] == 3  # a cell may carry several variables
    assert var.loc["speed", "n_cells"] == 1
    assert var.loc["position", "gain_median_bits_per_spike"] == pytest.approx(0.4)
    assert var.loc["heading", "n_cells"] == 0
    assert var.loc["heading", "ci_high_percent"] == pytest.approx(100 * wilson_interval(0, 4)[1])
