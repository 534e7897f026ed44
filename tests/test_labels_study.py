"""The bookkeeping of benchmarks/labels_at_the_edges.py (no fits: hand-made cell results)."""

import importlib.util
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "labels_at_the_edges.py"


@pytest.fixture(scope="module")
def study():
    spec = importlib.util.spec_from_file_location("labels_at_the_edges", SCRIPT)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _cell(part, point, truth, labels, seed):
    return {"part": part, "point": point, "truth": truth, "labels": labels,
            "pipelines": list(labels), "seed": seed, "cpu_s": 1.0}


def test_rates_count_false_labels_exact_sets_and_extras(study):
    cells = [
        _cell("null", "poisson", [], {"new": "none", "old": "speed"}, 1),
        _cell("null", "poisson", [], {"new": "none", "old": None}, 2),  # under min spikes
        _cell("null", "poisson", [], {"new": "heading"}, 3),  # new-only cell
        _cell("strength", 0.5, ["position", "speed"], {"new": "position+speed",
                                                        "old": "position"}, 4),
        _cell("strength", 0.5, ["heading"], {"new": None, "old": "heading"}, 5),
        _cell("extras", 30.0, ["speed"], {"new": "position+speed", "new_refit": "speed"}, 6),
    ]
    s = study.summarise(cells)
    assert (s["null"]["poisson"]["new"]["k"], s["null"]["poisson"]["new"]["n"]) == (1, 3)
    # A cell that was not labelled is not an untuned cell labelled "none".
    assert (s["null"]["poisson"]["old"]["k"], s["null"]["poisson"]["old"]["n"]) == (1, 1)
    # ... but a tuned cell that was not labelled is a miss.
    assert (s["strength"]["0.5"]["new"]["k"], s["strength"]["0.5"]["new"]["n"]) == (1, 2)
    assert (s["strength"]["0.5"]["old"]["k"], s["strength"]["0.5"]["old"]["n"]) == (1, 2)
    assert s["length"]["30.0"] == s["strength"]["0.5"]
    assert s["extras"]["30.0"]["new"]["k"] == 1 and s["extras"]["30.0"]["new_refit"]["k"] == 0
    lo, hi = s["null"]["poisson"]["new"]["ci95"]
    assert lo < 1 / 3 < hi
    assert "| poisson |" in study.table(s)


def test_plan_sizes_and_seeds(study):
    specs = study.plan(True, n_null=5, n_pow=3, n_extra=2, n_null_all=2)
    nulls = [s for s in specs if s["part"] == "null"]
    assert len(nulls) == 20
    assert sum(s["pipelines"] == list(study.PIPELINES) for s in nulls) == 8
    assert len({s["seed"] for s in specs}) == len(specs)
    assert all(s["truth"] == [] for s in nulls)
    power = [s for s in specs if s["part"] in ("strength", "length", "rate")]
    assert len(power) == 11 * 3 and all(1 <= len(s["truth"]) <= 2 for s in power)


def test_plan_sends_only_the_first_extras_cells_through_refit(study):
    specs = study.plan(True, n_null=1, n_pow=1, n_extra=5, n_null_all=1, n_refit=2)
    extras = [s for s in specs if s["part"] == "extras"]
    assert len(extras) == 10
    for minutes in (30.0, 60.0):
        here = [s for s in extras if s["point"] == minutes]
        assert [("new_refit" in s["pipelines"]) for s in here] == [True, True, False, False,
                                                                   False]
        # The refit-free cells continue the cycle of cell types instead of restarting it.
        assert [s["truth"] for s in here] == [list(t) for t in study.TUNED_TYPES[:5]]


def test_paired_counts_discordant_cells_with_an_exact_mcnemar_p(study):
    cells = [_cell("strength", 0.5, ["heading"], {"new": "heading", "reference": "none"}, i)
             for i in range(6)]
    cells += [_cell("strength", 0.5, ["speed"], {"new": "speed", "reference": "speed"}, 9)]
    text = study.paired(cells)
    # 6 cells exact with new only, none with the reference only: p = 2 * 0.5^6.
    assert "| strength | 0.5 | 6 | 0 | 0.0312 |" in text
