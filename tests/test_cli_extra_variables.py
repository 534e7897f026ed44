"""`encodex fit --lfp/--band/--variable`: rhythm phase and user variables from the command line."""

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from encodex.cli import main
from encodex.simulate import simulate_to_files


@pytest.fixture(scope="module")
def lfp_session(tmp_path_factory):
    out = tmp_path_factory.mktemp("lfp")
    return simulate_to_files(out, seed=3, stem="theta", n_cells=1, duration_s=300.0,
                             environments=("room_a",), lfp_rate_hz=250.0, n_phase_cells=2)


def test_fit_with_lfp_labels_phase_locked_cells(lfp_session, tmp_path):
    out = tmp_path / "fit"
    code = main(["fit", str(lfp_session["nwb"]), "--out", str(out), "--variables", "phase",
                 "--folds", "6", "--lfp", "processing/ecephys/LFP/lfp", "--band", "6", "10",
                 "--no-progress"])
    assert code == 0
    cells = pd.read_csv(out / "cells.csv")
    truth = pd.read_csv(lfp_session["truth"])
    locked = set(truth.loc[truth["variables"] == "phase", "unit"])
    assert len(locked) == 2
    got = cells.set_index("unit")
    for unit in locked:
        assert got.loc[unit, "variables"] == "phase"
        assert got.loc[unit, "gain_phase"] > 0
    import json

    run = json.loads((out / "run.json").read_text())
    assert run["load_options"]["lfp"] == "processing/ecephys/LFP/lfp"
    assert run["load_options"]["phase_band"] == [6.0, 10.0]


@pytest.mark.parametrize("argv, message", [
    (["--band", "6", "10"], "needs --lfp"),
    (["--lfp", "processing/ecephys/LFP/lfp", "--band", "10", "6"], "LOW < HIGH"),
    (["--lfp", "processing/nowhere/lfp"], "nowhere"),
    (["--variable", "bearing"], "bearing"),
])
def test_bad_extra_options_exit_2_with_one_line(lfp_session, tmp_path, argv, message):
    res = subprocess.run([sys.executable, "-m", "encodex", "fit", str(lfp_session["nwb"]),
                          "--out", str(tmp_path / "o"), "--no-progress", *argv],
                         capture_output=True, text=True)
    assert res.returncode == 2, res.stderr
    lines = [ln for ln in res.stderr.strip().splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in res.stderr
    assert message in lines[0]


def _nwb_with_a_silent_unit(path):
    from datetime import datetime, timezone

    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.behavior import Position, SpatialSeries

    rng = np.random.default_rng(0)
    t = np.arange(0, 300, 0.02)
    xy = np.column_stack([0.5 + 0.4 * np.cos(t / 7), 0.5 + 0.4 * np.sin(t / 11)])
    f = NWBFile(session_description="silent unit", identifier="silent-unit",
                session_start_time=datetime(2026, 1, 1, tzinfo=timezone.utc))
    f.create_processing_module("behavior", "behaviour").add(Position(spatial_series=SpatialSeries(
        name="xy", data=xy, timestamps=t, reference_frame="box corner", unit="meters")))
    f.add_unit(spike_times=np.sort(rng.uniform(0, 300, 600)))
    f.add_unit(spike_times=np.array([]))
    with NWBHDF5IO(str(path), "w") as io:
        io.write(f)
    return path


def test_units_without_spikes_stop_with_an_actionable_error_or_are_dropped_and_listed(tmp_path):
    nwb = _nwb_with_a_silent_unit(tmp_path / "s.nwb")
    res = subprocess.run([sys.executable, "-m", "encodex", "fit", str(nwb), "--out",
                          str(tmp_path / "o"), "--no-progress"], capture_output=True, text=True)
    assert res.returncode == 2
    assert "--drop-empty-units" in res.stderr and "Traceback" not in res.stderr
    res = subprocess.run([sys.executable, "-m", "encodex", "fit", str(nwb), "--out",
                          str(tmp_path / "o2"), "--no-progress", "--drop-empty-units",
                          "--variables", "position", "--folds", "6", "--bin-size", "0.1"],
                         capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert "left out (--drop-empty-units): 1" in res.stdout
