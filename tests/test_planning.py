"""Planning: detection probability against recording length on a user's trajectory."""

import numpy as np
import pandas as pd
import pytest

from encodex.errors import EncodexError
from encodex.planning import PlanSpec, detection_table, minutes_for, unit_rates
from encodex.population.settings import RunSettings


@pytest.fixture(scope="module")
def session():
    from encodex.session import build_session
    from encodex.simulate import simulate_recording

    rec, _ = simulate_recording(seed=6, n_cells=3, duration_s=240.0, environments=("arena",))
    return build_session(rec, bin_size=0.05)


def test_strong_cells_are_found_and_near_untuned_ones_are_not(session):
    rates = unit_rates(session, "arena")
    assert len(rates) == 3 and all(0.5 < r < 6 for r in rates)
    settings = RunSettings(folds=6, chunks_per_fold=2, min_spikes=20)
    strong = detection_table(session, PlanSpec("arena", ("heading",), (2.0, 6.0), 1.5,
                                               (3.0,), 4, seed=1), settings)
    # 6 min is longer than the 4 min recording: its trajectory is repeated and flagged.
    assert list(strong["repeated"]) == [False, True]
    assert list(strong["detected"]) == [4, 4] and (strong["ci_low"] > 0.45).all()
    weak = detection_table(session, PlanSpec("arena", ("heading",), (2.0,), 0.02, (3.0,), 4,
                                             seed=1), settings)
    assert weak["detected"].iloc[0] <= 1
    with pytest.raises(EncodexError, match="not available"):
        detection_table(session, PlanSpec("arena", ("phase",), (2.0,), 1.0, (3.0,), 2))


def test_minutes_for_interpolates_and_says_when_not_reached():
    t = pd.DataFrame({"variable": ["a"] * 3 + ["b"] * 2, "minutes": [5, 10, 20, 5, 10],
                      "probability": [0.5, 0.7, 0.9, 0.1, 0.2],
                      "ci_low": [0.3, 0.5, 0.82, 0.0, 0.1]})
    m = minutes_for(t)
    assert m["a"] == pytest.approx(15.0) and np.isnan(m["b"])
    assert minutes_for(t, column="ci_low")["a"] == pytest.approx(10 + 0.3 / 0.32 * 10)
    with pytest.raises(EncodexError, match="strength"):
        PlanSpec("x", ("speed",), (5.0,), 0.0, (1.0,), 3)
