"""Tables for papers: files, formats, the caveat, exclusions and the methods paragraph."""

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest

from encodex.errors import FileFormatError, InputError, OutputError, SettingsError
from encodex.report.load import load_run
from encodex.report.methods import REFERENCES, methods_paragraph
from encodex.report.tables import (
    label_counts,
    make_tables,
    to_latex,
    to_markdown,
    wilson_interval,
    write_tables,
)
from encodex.report.testing import write_example_run


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return load_run(write_example_run(tmp_path_factory.mktemp("run") / "fit"))


def test_counts_match_cells_csv(run):
    t = make_tables(run)
    ok = run.cells[run.cells["status"] == "ok"]
    for env, sub in t.labels.groupby("environment"):
        n_ok = (ok["environment"] == env).sum()
        assert (sub["n_classified"] == n_ok).all()
        assert sub["n_cells"].sum() == n_ok  # every classified cell has exactly one label
        for lab, k in ok[ok["environment"] == env]["variables"].value_counts().items():
            assert sub.set_index("label").loc[lab, "n_cells"] == k
    # position is carried by u01, u02, u04, u08, u11 in arena_a (the example's design)
    pos = t.variables.set_index(["environment", "variable"]).loc[("arena_a", "position")]
    assert pos["n_cells"] == 5
    assert pos["ci_low_percent"] < pos["percent"] < pos["ci_high_percent"]
    ex = t.excluded.set_index("environment")
    assert ex.loc["arena_a", "units"] == "u09" and ex.loc["arena_b", "units"] == "u10"
    assert ex.loc["arena_a", "status"] == "too few spikes"


def test_written_formats(run, tmp_path):
    t = make_tables(run)
    files = write_tables(t, tmp_path / "tables")
    names = sorted(p.name for p in files)
    assert names == sorted(["README.txt"] + [
        f"table_{k}.{e}" for k in ("labels", "variables", "excluded", "not_analysed", "cells")
        for e in ("csv", "md", "tex")])
    readme = (tmp_path / "tables" / "README.txt").read_text()
    assert "not proof of mechanism" in readme and "methods.txt" in readme
    # every column of every CSV written is explained in README.txt
    for f in (tmp_path / "tables").glob("table_*.csv"):
        for col in pd.read_csv(f, nrows=0).columns:
            assert col in readme, (f.name, col)
    # the per-cell table: a longtable with unit-bearing headers and blanks, never "nan"
    cells_tex = (tmp_path / "tables" / "table_cells.tex").read_text()
    assert r"\begin{longtable}" in cells_tex and r"\endhead" in cells_tex
    assert "nan" not in cells_tex.lower() and "Mean rate (Hz)" in cells_tex
    assert "Held-out information (bits/spike)" in cells_tex
    cells_md = (tmp_path / "tables" / "table_cells.md").read_text()
    assert "nan" not in cells_md.lower()
    u09 = next(line for line in cells_md.splitlines() if line.startswith("| u09 | arena_a"))
    assert "| too few spikes |  |" in u09  # not labelled: empty label, not "none"
    back = pd.read_csv(tmp_path / "tables" / "table_labels.csv")
    np.testing.assert_allclose(back["percent"], t.labels["percent"])
    md = (tmp_path / "tables" / "table_variables.md").read_text()
    assert "statistical statement at alpha = 0.05" in md and "not proof of mechanism" in md
    assert md.count("| arena_a |") == 5
    tex = (tmp_path / "tables" / "table_labels.tex").read_text()
    for cmd in (r"\toprule", r"\midrule", r"\bottomrule", r"\begin{tabular}", r"\caption{"):
        assert cmd in tex
    assert r"arena\_a" in tex and "arena_a" not in tex.replace(r"arena\_a", "")
    assert r"95\% CI" in tex
    # a row per label, each with the same number of columns as the header
    body = tex.split(r"\midrule")[1].split(r"\bottomrule")[0].strip().splitlines()
    assert len(body) == len(t.labels)
    assert {row.count(" & ") for row in body} == {6}  # 7 columns: with Flagged


def test_variables_never_analysed_are_not_zero_percent(tmp_path):
    d = write_example_run(tmp_path / "fit")
    run_json = json.loads((d / "run.json").read_text())
    run_json["environments"]["arena_a"] = {
        "variables": ["position", "heading", "speed"],
        "unavailable": {"distance": "no trials in the recording",
                        "time": "no trials in the recording"}}
    (d / "run.json").write_text(json.dumps(run_json))
    run = load_run(d)
    cells = run.cells.copy()
    # u10 is labelled "distance" in arena_a by the example: drop it to mimic such a run
    run = dataclasses.replace(run, cells=cells[~((cells["unit"] == "u10")
                                                 & (cells["environment"] == "arena_a"))])
    t = make_tables(run)
    a = t.variables[t.variables["environment"] == "arena_a"]
    assert set(a["variable"]) == {"position", "heading", "speed"}
    b = t.variables[t.variables["environment"] == "arena_b"]
    assert {"distance", "time"} <= set(b["variable"])  # analysed there
    assert set(t.not_analysed["variable"]) == {"distance", "time"}
    write_tables(t, tmp_path / "tables")
    md = (tmp_path / "tables" / "table_variables.md").read_text()
    assert "| arena_a | distance |" not in md and "| arena_a | time |" not in md
    na = (tmp_path / "tables" / "table_not_analysed.md").read_text()
    assert "| arena_a | distance | no trials in the recording |" in na
    methods = methods_paragraph(run.run)
    assert "Not analysed: distance in arena_a (no trials in the recording)" in methods


def test_markdown_and_latex_escape_specials():
    df = pd.DataFrame({"a|b": ["x_1 & 50%"], "n": [3]})
    md = to_markdown(df)
    assert "a\\|b" in md and "---:" in md
    tex = to_latex(df)
    assert r"x\_1 \& 50\%" in tex and "{lr}" in tex


def test_wilson_rejects_impossible_counts():
    with pytest.raises(SettingsError, match="0 <= k <= n"):
        wilson_interval(5, 3)
    assert np.isnan(wilson_interval(0, 0)[0])


def test_environment_with_no_classified_cell():
    cells = pd.DataFrame({"unit": ["a"], "environment": ["e"], "n_spikes": [3],
                          "status": ["too few spikes"], "variables": ["none"],
                          "bits_per_spike": [np.nan]})
    lab = label_counts(cells)
    assert lab["n_classified"].tolist() == [0] and np.isnan(lab["percent"].iloc[0])


def test_load_run_errors(tmp_path):
    with pytest.raises(InputError, match="not a folder"):
        load_run(tmp_path / "nothing")
    d = write_example_run(tmp_path / "fit")
    (d / "run.json").write_text("{not json")
    with pytest.raises(FileFormatError, match="run.json"):
        load_run(d)
    d = write_example_run(tmp_path / "fit2")
    pd.read_csv(d / "cells.csv").drop(columns=["status"]).to_csv(d / "cells.csv", index=False)
    with pytest.raises(FileFormatError, match="status"):
        load_run(d)
    d = write_example_run(tmp_path / "fit3")
    (d / "models.csv").unlink()
    with pytest.raises(InputError, match="models.csv is missing"):
        load_run(d)


def test_write_tables_to_unwritable_place(run, tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(OutputError):
        write_tables(make_tables(run), blocker / "sub")


def test_methods_paragraph_states_settings_and_cites(run):
    text = methods_paragraph(run.run)
    s = run.run["settings"]
    assert "20 ms time bins" in text
    assert f"{s['folds']}-fold cross-validation" in text
    assert "alpha = 0.05" in text and "fewer than 100 spikes" in text
    for cite in ("Eilers & Marx 1996", "Wood 2011", "Hardcastle et al. 2017", "Wilcoxon 1945",
                 "Wilson 1927", "Benjamini & Hochberg 1995", "Skaggs et al. 1993"):
        assert cite in text
    cited = [c for c in REFERENCES if c in text.split("References")[0]]
    assert len(cited) == text.split("References")[1].count("\n- ")
    assert "not proof of mechanism" in text
    # settings that change the text: exhaustive search and shuffles
    other = json.loads(json.dumps(run.run))
    other["settings"].update(exhaustive=True, shuffles=200, min_shift_s=20.0, alpha=0.01)
    t2 = methods_paragraph(other)
    assert "Every subset" in t2 and "200 times" in t2 and "alpha = 0.01" in t2
    assert "forward search" not in t2
    other["settings"]["correction"] = "bonferroni"
    assert "(Bonferroni)" in methods_paragraph(other)
    other["settings"]["correction"] = "none"
    assert "without correction" in methods_paragraph(other)


def test_cell_measures_put_skaggs_beside_the_model(run):
    from encodex.classic import MIN_OCCUPANCY_S, skaggs_information

    t = make_tables(run).cells
    assert len(t) == len(run.cells)
    row = t.set_index(["unit", "environment"]).loc[("u04", "arena_a")]
    arr = run.unit_arrays("arena_a", "u04")
    expected = skaggs_information(arr["ratemap__occupancy_s"], arr["ratemap__spikes"],
                                  min_occupancy_s=MIN_OCCUPANCY_S)
    assert row["skaggs_bits_per_spike"] == pytest.approx(expected)
    assert row["peak_rate_hz"] > row["map_mean_rate_hz"] > 0
    # the example's place cells carry more spatial information than its speed cell
    sk = t.set_index(["unit", "environment"])["skaggs_bits_per_spike"]
    assert sk[("u01", "arena_a")] > 3 * sk[("u05", "arena_a")]
    # a cell without a unit file (too few spikes) has no classic measure
    assert np.isnan(sk[("u09", "arena_a")])


def test_only_tested_variables_are_tabulated(tmp_path):
    d = write_example_run(tmp_path / "fit", labels={
        "u1": {"e": "position"}, "u2": {"e": "speed"}, "u3": {"e": "none"}})
    run_json = json.loads((d / "run.json").read_text())
    run_json["settings"]["variables"] = ["position", "speed"]
    (d / "run.json").write_text(json.dumps(run_json))
    t = make_tables(load_run(d))
    # distance, heading and time were not tested: no "0 cells" rows that would mislead
    assert t.variables["variable"].tolist() == ["position", "speed"]
