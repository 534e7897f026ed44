"""Pieces of the demo that do not need a fit: the ground-truth recovery summary."""

import pandas as pd
import pytest

from encodex.report.demo import recovery_summary


def test_recovery_summary_counts_exact_labels_of_classified_cells():
    cells = pd.DataFrame({
        "unit": ["c1", "c2", "c3", "c4", "c1", "c2"],
        "environment": ["a", "a", "a", "a", "b", "b"],
        "status": ["ok", "ok", "ok", "too few spikes", "ok", "ok"],
        "variables": ["position", "speed", "none", "none", "position+speed", "heading"],
    })
    truth = pd.DataFrame({
        "unit": ["c1", "c2", "c3", "c4", "c1", "c2"],
        "environment": ["a", "a", "a", "a", "b", "b"],
        "variables": ["position", "heading", "none", "time", "position+speed", "heading"],
    })
    rec = recovery_summary(cells, truth).set_index("environment")
    assert rec.loc["a", "classified"] == 3 and rec.loc["a", "exact"] == 2
    assert rec.loc["a", "percent_exact"] == pytest.approx(200 / 3)
    assert rec.loc["b", "exact"] == 2 and rec.loc["b", "percent_exact"] == 100
