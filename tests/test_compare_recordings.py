"""Comparing two `encodex fit` folders fitted from two simulated recordings of the same cells."""

import json
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest

from encodex.cli import main
from encodex.errors import EncodexError, InputError, SettingsError
from encodex.population import run_population
from encodex.report.environments import compare_environments
from encodex.report.load import RunFolder, load_run
from encodex.report.recordings import compare_recordings, own_coordinates
from encodex.session import build_session
from encodex.simulate import simulate_recording

SETTINGS = dict(variables=("position", "heading"), folds=8, chunks_per_fold=2, seed=5)
N_CELLS = 6


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    """Two recordings (day1, day2) of the same cells, each fitted into its own folder.

    One simulated session cut in two halves of 300 s, so that the cells keep their tuning
    (place fields included). In day2 the units have other ids (a shuffled matching table
    links them) and the arena is tracked in another frame (scaled by 1.5 and shifted).
    """
    root = tmp_path_factory.mktemp("recordings")
    rec, _ = simulate_recording(seed=30, n_cells=N_CELLS, duration_s=600.0,
                                environments=("room",), p_silent=0.0, mean_rate_hz=(3.0, 5.0))
    s = build_session(rec, bin_size=0.1)
    mid = np.median(s.time)

    def half(name, keep):
        summary = dict(s.summary, unavailable={name: s.summary["unavailable"]["room"]})
        return s.replace(valid=s.valid & keep, environments=(name,),
                         summary=summary).restrict(name)

    day1, day2 = half("day1", s.time < mid), half("day2", s.time >= mid)
    rng = np.random.default_rng(0)
    new_ids = tuple(f"n{k:02d}" for k in rng.permutation(N_CELLS))
    cov = dict(day2.covariates)
    cov["position"] = cov["position"] * 1.5 + np.array([2.0, -1.0])
    day2 = day2.replace(unit_ids=new_ids, covariates=cov)
    run_population(day1, root / "a", **SETTINGS)
    run_population(day2, root / "b", **SETTINGS)
    match = pd.DataFrame({"unit_a": s.unit_ids, "unit_b": new_ids}).sample(frac=1,
                                                                         random_state=3)
    match.to_csv(root / "match.csv", index=False)
    return root, s.unit_ids, new_ids


def _one_folder(root, ids_a, ids_b) -> RunFolder:
    """Both days as environments of one folder, day2's ids mapped back by the truth."""
    a, b = load_run(root / "a"), load_run(root / "b")
    back = dict(zip(ids_b, ids_a))
    cb = b.cells.assign(unit=b.cells["unit"].map(back))
    return RunFolder(root / "a", pd.concat([a.cells, cb], ignore_index=True), a.models, a.run)


def test_paired_tests_equal_those_within_one_folder(folders):
    root, ids_a, ids_b = folders
    cmp = compare_recordings(root / "a", root / "b", matching=root / "match.csv",
                             names=("day1", "day2"))
    ref = compare_environments(_one_folder(root, ids_a, ids_b), "day1", "day2")
    assert cmp.paired is not None and cmp.unpaired is None
    assert cmp.paired.n_paired == ref.n_paired == N_CELLS
    # same labels, same pairs: the same McNemar tests and the same transitions
    pd.testing.assert_frame_equal(cmp.paired.variables.reset_index(drop=True),
                                  ref.variables.reset_index(drop=True), check_exact=False,
                                  rtol=1e-6)
    assert cmp.paired.transitions.to_numpy().tolist() == ref.transitions.to_numpy().tolist()
    # each pair in the matching output links the ids of the shuffled table
    m = dict(zip(cmp.matching["unit_a"], cmp.matching["unit_b"]))
    assert m == dict(zip(ids_a, ids_b))
    assert "matched by" in cmp.paired.notes[0] and "match.csv" in cmp.paired.notes[0]
    # provenance of both folders
    assert cmp.provenance["a"]["folder"].endswith("a")
    assert cmp.provenance["b"]["data_fingerprint"] != cmp.provenance["a"]["data_fingerprint"]


def test_response_curves_compared_in_each_arenas_own_coordinates(folders):
    root, _, _ = folders
    own = compare_recordings(root / "a", root / "b", matching=root / "match.csv")
    shared = compare_recordings(root / "a", root / "b", matching=root / "match.csv",
                                coordinates="shared")
    pos_own = own.paired.stability.query("variable == 'position'")["correlation"]
    pos_shared = shared.paired.stability.query("variable == 'position'")["correlation"]
    assert len(pos_own) >= 1
    # the same place fields, tracked in another frame: stable in the arena's own
    # coordinates, no overlap at all in the recorded metres
    assert pos_own.min() > 0.8
    assert pos_shared.isna().all()
    unit_b = own.paired.stability.query("variable == 'position'")["unit"].iloc[0].split(" | ")[1]
    scaled = own_coordinates(load_run(root / "b").unit_arrays("day2", unit_b))
    assert scaled["ratemap__edges_x"][0] == 0 and scaled["ratemap__edges_x"][-1] == 1


def test_unmatched_cells_get_the_unpaired_tests(folders, tmp_path):
    root, ids_a, ids_b = folders
    m = pd.read_csv(root / "match.csv", dtype=str)
    half = m.iloc[: N_CELLS // 2]
    half.to_csv(tmp_path / "half.csv", index=False)
    cmp = compare_recordings(root / "a", root / "b", matching=tmp_path / "half.csv")
    assert len(cmp.matching) == N_CELLS // 2
    assert len(cmp.unmatched) == N_CELLS  # half of each side
    assert cmp.unpaired is not None and not cmp.unpaired.paired
    assert cmp.unpaired.gains["test"].iloc[0].startswith("Mann-Whitney")
    assert cmp.unpaired.n_a + cmp.paired.n_paired <= N_CELLS


def test_incompatible_folders_are_refused_with_one_line(folders, tmp_path, capsys):
    root, _, _ = folders
    other = tmp_path / "b_other"
    shutil.copytree(root / "b", other)
    run = json.loads((other / "run.json").read_text())
    run["session"]["bin_size_s"] = 0.02
    (other / "run.json").write_text(json.dumps(run))
    with pytest.raises(SettingsError, match=r"different bin size \(s\): 0.1 in .* and 0.02"):
        compare_recordings(root / "a", other, matching=root / "match.csv")
    run["session"]["bin_size_s"] = 0.1
    run["environments"]["day2"]["variables"] = ["position", "speed"]
    (other / "run.json").write_text(json.dumps(run))
    with pytest.raises(SettingsError,
                       match="different variables: position,heading in .* and position,speed in "):
        compare_recordings(root / "a", other, matching=root / "match.csv")
    code = main(["compare", str(root / "a"), str(other), "--match", str(root / "match.csv")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "different variables" in err
    # A folder fitted without the effect-size floor (or from before it existed) is refused.
    run["environments"]["day2"]["variables"] = ["position", "heading"]
    run["settings"]["min_step_gain"] = 0.0
    (other / "run.json").write_text(json.dumps(run))
    with pytest.raises(SettingsError, match="different effect-size floor of later steps"):
        compare_recordings(root / "a", other, matching=root / "match.csv")
    del run["settings"]["min_step_gain"]
    (other / "run.json").write_text(json.dumps(run))
    with pytest.raises(SettingsError, match="different effect-size floor of later steps"):
        compare_recordings(root / "a", other, matching=root / "match.csv")
    # A folder from before the sign-flip statistic became the mean: it recorded "signflip"
    # for the studentised test (its methods say so) and is read as signflip-t.
    run["settings"]["min_step_gain"] = 0.01
    run["methods"]["selection"] = run["methods"]["selection"].replace(
        "largest pooled improvement (each fold's improvement clipped at 3 times the "
        "candidate's median absolute improvement, then weighted by the fold's held-out "
        "spikes)", "largest studentised mean improvement")
    (other / "run.json").write_text(json.dumps(run))
    with pytest.raises(SettingsError, match="correction: signflip in .* and signflip-t in "):
        compare_recordings(root / "a", other, matching=root / "match.csv")


def test_bad_matching_tables(folders, tmp_path):
    root, _, _ = folders
    bad = tmp_path / "bad.csv"
    bad.write_text("unit_a,unit_b\nc000,n99\n")
    with pytest.raises(InputError, match="not in folder B"):
        compare_recordings(root / "a", root / "b", matching=bad)
    bad.write_text("first,second\nc000,n00\nc001,n00\n")
    with pytest.raises(InputError, match="appears twice"):
        compare_recordings(root / "a", root / "b", matching=bad)
    with pytest.raises(InputError, match="not in folder A"):
        compare_recordings(root / "a", root / "b",
                           matching=pd.DataFrame({"x": ["zz"], "y": ["n00"]}))
    # identical ids by default: day1 and day2 share none, and every cell is unmatched
    cmp = compare_recordings(root / "a", root / "b")
    assert cmp.paired is None and cmp.unpaired is not None and cmp.matching.empty
    with pytest.raises(EncodexError, match="give two different folders"):
        compare_recordings(root / "a", root / "a")


def test_command_line_writes_tables_provenance_and_a_page_chromium_renders(folders, tmp_path,
                                                                         capsys):
    root, _, _ = folders
    out = tmp_path / "cmp"
    code = main(["compare", str(root / "a"), str(root / "b"), "--match",
                 str(root / "match.csv"), "--names", "day1", "day2", "--out", str(out)])
    printed = capsys.readouterr().out
    assert code == 0
    assert "McNemar" in printed and "Stability of matched response curves" in printed
    pair = out / "compare_day1_vs_day2"
    prov = json.loads((pair / "recordings.json").read_text())
    assert prov["a"]["name"] == "day1" and prov["b"]["environment"] == "day2"
    assert prov["matching"].endswith("match.csv")
    assert (pair / "compare_day1_vs_day2_variables.csv").exists()
    assert len(pd.read_csv(pair / "matching.csv")) == N_CELLS
    page = out / "recordings_report.html"
    text = page.read_text()
    assert "Provenance of each folder" in text and "<script" not in text
    from test_report_html import CHROMIUM_FLAGS, _chromium

    dom = subprocess.run([_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'p'}",
                          "--dump-dom", page.as_uri()], capture_output=True, text=True,
                         timeout=120).stdout
    assert "Matched cells (paired tests)" in dom
    assert len(re.findall(r"<img ", dom)) >= 1 and len(re.findall(r"<table", dom)) >= 4


def test_goodness_summary_and_report_section(folders):
    from encodex.report.goodness import ALL_LABELS, fit_summary
    from encodex.report.html import render_report

    root, _, _ = folders
    run = load_run(root / "a")
    s = fit_summary(run.cells)
    total = s[s["label"] == ALL_LABELS].set_index("environment")
    ok = run.cells[run.cells["status"] == "ok"]
    for env, g in ok.groupby("environment"):
        inside = g["ks_within_band"].astype(str).eq("True").sum()
        assert total.loc[env, "n_within_band"] == inside
        assert total.loc[env, "n_checked"] == len(g)
    per_label = s[s["label"] != ALL_LABELS].groupby("environment")["n_checked"].sum()
    assert (per_label == total["n_checked"]).all()
    text = render_report(run, max_cells=1)
    assert "id='fit'" in text and "A poor fit qualifies a label" in text
    assert "goodness of fit" in text.lower()
