"""The command line as a new user meets it, each command run as typed (a subprocess):
what `encodex fit` says, the output folder's safety, options, one spelling, broken pipes."""

import json
import os
import re
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from encodex.simulate import simulate_to_files

FIT = ["--variables", "heading,speed", "--folds", "6", "--bin-size", "0.1", "--seed", "2",
       "--no-progress"]
ENVS = ("room_a", "room_b")


def encodex(*args, cwd, umask=None, cores=None, **kw):
    """Run `python -m encodex ARGS` as a user would type `encodex ARGS`."""
    def setup():
        if umask is not None:
            os.umask(umask)
        if cores is not None:
            os.sched_setaffinity(0, cores)
    return subprocess.run([sys.executable, "-m", "encodex", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=300, preexec_fn=setup, **kw)


def one_error_line(res):
    lines = res.stderr.strip().splitlines()
    assert res.returncode == 2, res.stderr
    assert len(lines) == 1 and lines[0].startswith("encodex: error: "), res.stderr
    assert "Traceback" not in res.stderr
    return lines[0]


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    d = tmp_path_factory.mktemp("first_hour")
    simulate_to_files(d / "data", seed=4, n_cells=2, duration_s=120.0, environments=ENVS)
    return d


@pytest.fixture(scope="module")
def fitted(work):
    """`encodex fit` without --jobs, on one allowed core, under umask 002."""
    res = encodex("fit", "data/simulated_session.nwb", "--out", "R", *FIT, cwd=work,
                  umask=0o002, cores={sorted(os.sched_getaffinity(0))[0]})
    assert res.returncode == 0, res.stderr
    return work, res


def test_fit_summarises_the_session_first_and_says_what_next(fitted):
    work, res = fitted
    out = res.stdout
    run = json.loads((work / "R" / "run.json").read_text())
    # Before fitting: environments with durations, variables, NWB objects, masked bins.
    assert out.index("session data/simulated_session.nwb: 2 units, 2 environments") == 0
    for env in ENVS:
        used = run["environments"][env]["duration_s"]
        assert re.search(rf"^  {env}\s+\d+ s\s+{used:.0f} s\s+heading, speed$", out, re.M), out
    assert re.search(r"^\s+position\s+processing/behavior/Position/position$", out, re.M)
    assert re.search(r"^\s+epochs\s+intervals/epochs$", out, re.M)
    masked = run["session"]["masked_bins"]
    assert f"masked bins: {masked['total']:,} of {run['session']['n_bins']:,}" in out
    for reason in ("tracking_gap", "distance_after_gap", "outside_epochs"):
        assert masked[reason] > 0
        assert re.search(rf"^\s+{reason}\s+{masked[reason]:,} \(", out, re.M), reason
    # all cores this process may use: one here
    assert "cells to fit: 4 of 4 (2 units x 2 environments); 1 worker process" in out
    assert out.index("masked bins") < out.index("cells to fit") < out.index("units per label")
    # After: counts per environment in units, and the next commands with real names.
    assert "4 cells (2 units x 2 environments) written to R" in out
    cells = pd.read_csv(work / "R" / "cells.csv")
    table = out[out.index("units per label"):out.index("next:")].splitlines()
    for label, g in cells[cells["status"] == "ok"].groupby("variables"):
        row = next(ln for ln in table if ln.split()[0] == label)
        assert [int(v) for v in row.split()[1:]] == [int((g["environment"] == e).sum())
                                                     for e in ENVS]
    assert out.rstrip().endswith("next:\n  encodex table R\n"
                                 "  encodex compare R --between room_a room_b\n"
                                 "  encodex report R")
    assert res.stderr.strip() == ""  # the account is on standard output only


def test_files_respect_the_umask(fitted):
    work, _ = fitted
    files = [p for p in (work / "R").rglob("*") if p.is_file()]
    assert {p.name for p in files} >= {"cells.csv", "models.csv", "run.json", "README.txt",
                                       "checkpoint.json"}
    assert sum(p.suffix == ".npz" for p in files) == 4
    modes = {p.name: stat.S_IMODE(p.stat().st_mode) for p in files}
    assert set(modes.values()) == {0o664}, modes


def test_table_into_a_closed_pipe_ends_quietly(fitted):
    work, _ = fitted
    # The reader is gone before the first line is written (as with `| head` on long output).
    p = subprocess.Popen([sys.executable, "-m", "encodex", "table", "R"], cwd=work,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    p.stdout.close()
    err = p.stderr.read()
    assert p.wait(timeout=120) == 141
    assert err == ""
    assert (work / "R" / "tables" / "methods.md").exists()
    res = subprocess.run(f"'{sys.executable}' -m encodex table R | head -n 1", shell=True,
                         cwd=work, capture_output=True, text=True, timeout=120)
    assert res.stdout.startswith("| Environment") and res.stderr == ""


def _add_second_position_series(src: Path, dst: Path) -> None:
    """Copy of an NWB file with a second camera's position (half scale) in another module."""
    import numpy as np
    from pynwb import NWBHDF5IO
    from pynwb.behavior import Position, SpatialSeries

    shutil.copy(src, dst)
    with NWBHDF5IO(str(dst), "a") as io:
        f = io.read()
        pos = f.processing["behavior"]["Position"]["position"]
        timing = ({"timestamps": np.asarray(pos.timestamps[:])} if pos.timestamps is not None
                  else {"rate": pos.rate, "starting_time": pos.starting_time})
        second = Position(name="Position")
        second.add_spatial_series(SpatialSeries(name="led", data=0.5 * np.asarray(pos.data[:]),
                                                reference_frame="arena corner", unit=pos.unit,
                                                **timing))
        f.create_processing_module("tracking", "a second camera").add(second)
        io.write(f)


def test_refused_run_writes_nothing_and_replaces_an_empty_checkpoint(work):
    # --folds 3 cannot reach the first step's level: refused before --out is created.
    err = one_error_line(encodex("fit", "data/simulated_session.nwb", "--out", "A",
                                 "--folds", "3", cwd=work))
    assert "--folds" in err and not (work / "A").exists()
    # A folder holding only a checkpoint (a run that finished no unit) is replaced, and
    # every command-line option reaches the run, on a file holding two position series.
    _add_second_position_series(work / "data" / "simulated_session.nwb", work / "two.nwb")
    (work / "B").mkdir()
    (work / "B" / "checkpoint.json").write_text(json.dumps(
        {"format": "encodex-run-checkpoint/1", "settings": {"folds": 5},
         "data_fingerprint": "0"}))
    res = encodex("fit", "two.nwb", "--out", "B", *FIT, "--jobs", "1",
                  "--min-speed", "0.04", "--speed-smoothing", "0.3", "--max-gap", "1",
                  "--velocity-smoothing", "0.05",
                  "--nwb-position", "processing/tracking/Position/led",
                  "--nwb-epochs", "intervals/epochs", "--basis-size", "speed=6", "--basis-size",
                  "heading=8", "--chunks-per-fold", "2", cwd=work)
    assert res.returncode == 0, res.stderr
    run = json.loads((work / "B" / "run.json").read_text())
    assert run["settings"]["basis_sizes"] == {"heading": 8, "speed": 6}
    assert run["settings"]["chunks_per_fold"] == 2
    built = run["session"]["summary"]["settings"]
    assert (built["min_speed"], built["speed_smoothing_s"], built["max_gap_s"],
            built["velocity_smoothing_s"]) == (0.04, 0.3, 1.0, 0.05)
    assert run["load_options"]["object_paths"] == {
        "position": "processing/tracking/Position/led", "epochs": "intervals/epochs"}
    objects = run["session"]["summary"]["objects"]
    assert (objects["position"], objects["epochs"]) == ("processing/tracking/Position/led",
                                                        "intervals/epochs")
    assert re.search(r"^\s+position\s+processing/tracking/Position/led$", res.stdout, re.M)
    assert run["session"]["masked_bins"]["below_min_speed"] > 0
    assert re.search(r"below_min_speed\s+[\d,]+ .*--min-speed", res.stdout)


def test_finished_results_are_refused_then_overwritten(fitted):
    work, _ = fitted
    shutil.copytree(work / "R", work / "C")
    before = (work / "C" / "cells.csv").read_text()
    err = one_error_line(encodex("fit", "data/simulated_session.nwb", "--out", "C", *FIT,
                                 "--min-spikes", "50", "--jobs", "1", cwd=work))
    assert "other settings (min_spikes: 100 -> 50)" in err and "--overwrite" in err
    assert (work / "C" / "cells.csv").read_text() == before
    res = encodex("fit", "data/simulated_session.nwb", "--out", "C", *FIT, "--min-spikes",
                  "50", "--jobs", "1", "--overwrite", cwd=work)
    assert res.returncode == 0, res.stderr
    run = json.loads((work / "C" / "run.json").read_text())
    assert run["settings"]["min_spikes"] == 50 and run["execution"]["units_computed"] == 4
    assert not (work / "C" / "tables").exists()  # the earlier run's tables went with it


def test_foreign_folders_are_never_written_nor_deleted(work):
    mine = work / "thesis"
    mine.mkdir()
    (mine / "chapter1.tex").write_text("draft")
    for argv in (["fit", "data/simulated_session.nwb", "--out", "thesis", *FIT, "--overwrite"],
                 ["demo", "--out", "thesis", "--cells", "2", "--duration", "60"]):
        err = one_error_line(encodex(*argv, cwd=work))
        assert "thesis is not empty (chapter1.tex...)" in err
        assert sorted(p.name for p in mine.iterdir()) == ["chapter1.tex"]
    # A file given as --out, and object options on an npz bundle, are refused in one line.
    err = one_error_line(encodex("fit", "data/simulated_session.nwb", "--out",
                                 "thesis/chapter1.tex", *FIT, cwd=work))
    assert "is a file, not a folder" in err
    err = one_error_line(encodex("fit", "data/simulated_session.npz", "--out", "D", *FIT,
                                 "--nwb-units", "units", cwd=work))
    assert "--nwb-units" in err and not (work / "D").exists()


def test_one_spelling_one_prefix_one_jobs_default(work):
    helps = {c: encodex(c, "--help", cwd=work).stdout for c in
             ("fit", "table", "compare", "report", "demo")}
    for c in ("table", "compare", "report"):
        assert re.search(rf"usage: encodex {c} .*RESULTS", " ".join(helps[c].split())), c
    for c in ("fit", "table", "compare", "demo"):
        assert "--out DIR" in helps[c], c
    jobs_help = {" ".join(re.search(r"--jobs N\s+(.*?)\n  -", helps[c], re.S).group(1).split())
                 for c in ("fit", "demo")}
    assert len(jobs_help) == 1 and "default: all cores" in jobs_help.pop()
    assert "--fdr Q" in helps["compare"] and "--alpha" not in helps["compare"]
    err = one_error_line(encodex("compare", "R", "--between", *ENVS, "--alpha", "0.1",
                                 cwd=work))
    assert "renamed --fdr" in err
    # argparse errors and encodex errors start alike
    one_error_line(encodex("fit", "data/simulated_session.nwb", "--out", "E", "--folds", "x",
                           cwd=work))
    one_error_line(encodex("table", "no_such_folder", cwd=work))


def test_demo_run_again_with_other_settings_replaces_its_own_folder(work):
    # What an earlier `encodex demo --out demo --cells 3` leaves behind (its marker, its data).
    old = work / "demo"
    (old / "fit" / "units").mkdir(parents=True)
    (old / ".encodex-demo.json").write_text(json.dumps(
        {"cells": 3, "duration_s": 60.0, "seed": 1}))
    (old / "fit" / "checkpoint.json").write_text("{}")
    (old / "report.html").write_text("<html></html>")
    res = encodex("demo", "--out", "demo", "--cells", "2", "--duration", "60", "--jobs", "1",
                  cwd=work)
    assert res.returncode == 0, res.stderr
    assert "held an earlier demo (cells 3 -> 2); it was replaced" in res.stdout
    assert "1 worker process (--jobs)" in res.stdout
    assert "session " in res.stdout and "masked bins" in res.stdout  # the fit's account
    cells = pd.read_csv(old / "fit" / "cells.csv")
    assert sorted(cells["unit"].astype(str).unique()) == ["c000", "c001"]
    assert json.loads((old / ".encodex-demo.json").read_text())["cells"] == 2
