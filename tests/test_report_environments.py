"""Environment comparison: stability of tuning, activity changes, paired vs unpaired choice."""

import numpy as np
import pytest

from encodex.errors import SettingsError
from encodex.report.environments import compare_environments, response_correlation
from encodex.report.load import load_run
from encodex.report.testing import write_example_run


def test_response_correlation_one_dimensional_and_circular():
    g = np.linspace(0, 0.5, 30)
    a = {"speed__grid": g, "speed__log_modulation": np.sin(6 * g)}
    assert response_correlation(a, a, "speed") == pytest.approx(1.0)
    b = {"speed__grid": g, "speed__log_modulation": -np.sin(6 * g)}
    assert response_correlation(a, b, "speed") == pytest.approx(-1.0)
    # B sampled on another grid covering only part of A's range: compared on the overlap
    g2 = np.linspace(0.1, 0.4, 50)
    c = {"speed__grid": g2, "speed__log_modulation": np.sin(6 * g2)}
    assert response_correlation(a, c, "speed") > 0.99
    # heading: a tuning curve rotated by pi is anti-correlated, wrap-around handled
    h = np.linspace(0, 2 * np.pi, 36, endpoint=False)
    ha = {"heading__grid": h, "heading__log_modulation": np.cos(h - 0.2)}
    hb = {"heading__grid": h[::-1].copy(), "heading__log_modulation": np.cos(h[::-1] - 0.2 - np.pi)}
    assert response_correlation(ha, hb, "heading") == pytest.approx(-1.0, abs=1e-2)
    flat = {"speed__grid": g, "speed__log_modulation": np.zeros_like(g)}
    assert np.isnan(response_correlation(a, flat, "speed"))
    assert np.isnan(response_correlation(a, {}, "speed"))


def test_response_correlation_position_maps():
    gx = np.linspace(0, 1, 20)
    xx, yy = np.meshgrid(gx, gx)
    field = np.exp(-((xx - 0.3) ** 2 + (yy - 0.6) ** 2) / 0.02)
    a = {"position__grid_x": gx, "position__grid_y": gx, "position__log_modulation": field}
    assert response_correlation(a, a, "position") == pytest.approx(1.0)
    moved = np.exp(-((xx - 0.7) ** 2 + (yy - 0.2) ** 2) / 0.02)
    b = {"position__grid_x": gx, "position__grid_y": gx, "position__log_modulation": moved}
    assert response_correlation(a, b, "position") < 0.1  # a remapped field


def test_comparison_contents(tmp_path):
    run = load_run(write_example_run(tmp_path / "fit"))
    cmp = compare_environments(run, "arena_a", "arena_b")
    assert cmp.paired and cmp.n_paired == 10
    # u09 is silent in arena_a, u10 in arena_b (the example's design)
    act = cmp.activity.set_index("unit")
    assert act.loc["u09", "active_in"] == "arena_b" and act.loc["u10", "silent_in"] == "arena_b"
    # transition table: rows are arena_a labels, counts add up to the paired cells
    assert cmp.transitions.loc["position+heading", "heading"] == 1
    assert cmp.transitions.to_numpy().sum() == 10
    # position kept by u01, u04, u11: their fitted maps barely move (shift 0.05 m)
    st = cmp.stability[cmp.stability["variable"] == "position"].set_index("unit")
    assert set(st.index) == {"u01", "u04", "u11"}
    assert (st["correlation"] > 0.8).all()
    row = cmp.variables.set_index("variable").loc["position"]
    assert (row["both"], row["a_only"], row["b_only"], row["neither"]) == (3, 2, 1, 4)
    assert row["change_b_minus_a"] == pytest.approx(-0.1)
    assert row["change_ci_low"] < -0.1 < row["change_ci_high"]
    # BH family: position, heading, speed and the gain test; distance and time, carried by
    # no paired cell, are listed without a p-value and stay out of the family
    assert cmp.tests["p_value"].notna().sum() == 4 and len(cmp.tests) == 6
    assert "not proof of mechanism" in cmp.caveat


def test_forced_paired_without_shared_cells_is_refused(tmp_path):
    labels = {"a1": {"arena_a": "position"}, "b1": {"arena_b": "speed"}}
    run = load_run(write_example_run(tmp_path / "fit", labels=labels))
    with pytest.raises(SettingsError, match="paired comparison is impossible"):
        compare_environments(run, "arena_a", "arena_b", paired=True)
    assert not compare_environments(run, "arena_a", "arena_b").paired


def test_variable_analysed_in_one_environment_is_not_compared(tmp_path):
    import json

    d = write_example_run(tmp_path / "fit", labels={
        "u1": {"a": "position", "b": "position"}, "u2": {"a": "speed", "b": "none"},
        "u3": {"a": "none", "b": "speed"}})
    run_json = json.loads((d / "run.json").read_text())
    run_json["environments"]["a"]["variables"] = ["position", "heading", "speed"]
    run_json["environments"]["a"]["unavailable"] = {"distance": "no trials in the recording",
                                                    "time": "no trials in the recording"}
    (d / "run.json").write_text(json.dumps(run_json))
    cmp = compare_environments(load_run(d), "a", "b")
    assert set(cmp.variables["variable"]) == {"position", "heading", "speed"}
    assert any("distance, time" in n for n in cmp.notes)
