"""The selection path in cells.csv shows each step's p-value against its level, and the
figure reads it back."""

from types import SimpleNamespace

import pytest

from encodex.population.work import selection_path
from encodex.report.cellplots import parse_selection_path


def _step(base, best, n_candidates, p, accepted):
    return SimpleNamespace(base=tuple(base), best=tuple(best), p_value=p, accepted=accepted,
                           candidates=tuple(("c",) for _ in range(n_candidates)))


def test_levels_follow_the_correction():
    steps = [_step((), ("position",), 5, 0.002, True),
             _step(("position",), ("position", "speed"), 4, 0.0244, False)]
    text = selection_path(steps, 0.05, "bonferroni")
    # 0.05 / 5 = 0.01 and 0.05 / 4 = 0.0125: the rejected p of 0.0244 is shown against it
    assert text == "+position(p=0.002<0.01) > xspeed(p=0.0244>=0.0125)"
    # without correction the level is alpha itself, and the same p passes
    uncorrected = [_step(("position",), ("position", "speed"), 4, 0.0244, True)]
    assert selection_path(uncorrected, 0.05, "none") == "+speed(p=0.0244<0.05)"


def test_figure_reads_the_path_back():
    steps = parse_selection_path("+position(p=0.002<0.01) > xspeed(p=0.0244>=0.0125)",
                                 "position")
    assert [s["variable"] for s in steps] == ["position", "speed"]
    assert [s["accepted"] for s in steps] == [True, False]
    assert steps[1]["p"] == pytest.approx(0.0244) and steps[1]["level"] == pytest.approx(0.0125)
    # files written before the level was shown: p-values only
    old = parse_selection_path("+time(p=0.00293) > xspeed(p=0.348)", "time")
    assert old[0]["p"] == pytest.approx(0.00293) and old[0]["level"] != old[0]["level"]
    # no path at all: the label's variables as accepted steps
    assert [s["variable"] for s in parse_selection_path(float("nan"), "heading+speed")] == \
        ["heading", "speed"]


def test_a_step_refused_by_the_effect_size_floor_says_so_and_reads_back():
    step = SimpleNamespace(base=("position",), best=("position", "heading"), p_value=0.009,
                           accepted=False, candidates=(("c",),) * 4, level=0.05,
                           mean_improvement=0.00075, min_gain=0.0078)
    text = selection_path([_step((), ("position",), 5, 0.001, True), step], 0.05, "signflip")
    assert text == ("+position(p=0.001<=0.05) > "
                    "xheading(p=0.009<=0.05)[gain 0.00075<0.0078]")
    steps = parse_selection_path(text, "position")
    assert [s["small_gain"] for s in steps] == [False, True]
    assert steps[1]["p"] == pytest.approx(0.009) and not steps[1]["accepted"]
