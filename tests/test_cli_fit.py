"""`encodex fit` on the command line: outputs, resume, refusals, exit codes."""

import json
import sys

import pandas as pd
import pytest

from encodex.cli import main
from encodex.simulate import simulate_to_files

ARGS = ["--variables", "heading,speed", "--folds", "6", "--bin-size", "0.1", "--seed", "2"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    return simulate_to_files(d, seed=4, n_cells=3, duration_s=200.0, environments=("box",))


def test_fit_writes_folder_resumes_and_refuses_other_settings(files, tmp_path, capsys):
    out = tmp_path / "out"
    code = main(["fit", str(files["nwb"]), "--out", str(out), *ARGS])
    captured = capsys.readouterr()
    assert code == 0
    assert "3 cells" in captured.out
    assert "encodex fit" in captured.err  # progress bar on standard error
    cells = pd.read_csv(out / "cells.csv")
    assert len(cells) == 3 and (out / "models.csv").exists()
    run = json.loads((out / "run.json").read_text())
    assert run["settings"]["variables"] == ["heading", "speed"]
    assert run["settings"]["knots"] == "quantile"
    assert run["settings"]["bin_size"] == 0.1
    assert run["input"].endswith(".nwb")

    # Same command again: nothing recomputed, same tables.
    first = (out / "cells.csv").read_text()
    assert main(["fit", str(files["nwb"]), "--out", str(out), *ARGS, "--no-progress"]) == 0
    assert json.loads((out / "run.json").read_text())["execution"]["units_computed"] == 0
    assert (out / "cells.csv").read_text() == first

    # Different settings: refused with one line and exit code 2.
    capsys.readouterr()
    code = main(["fit", str(files["nwb"]), "--out", str(out), *ARGS, "--min-spikes", "50"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(err.splitlines()) == 1 and "other settings" in err and "min_spikes" in err
    assert "--overwrite" in err
    code = main(["fit", str(files["nwb"]), "--out", str(out), *ARGS, "--knots", "even"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "other settings" in err and "knots" in err


def test_npz_bundle_gives_same_results_as_nwb(files, tmp_path):
    # Both files hold the same simulated recording (one via pynwb, one as an npz bundle).
    b = tmp_path / "b"
    assert main(["fit", str(files["npz"]), "--out", str(b), *ARGS, "--no-progress",
                 "--variables", "heading", "--folds", "5"]) == 0
    a = tmp_path / "a"
    assert main(["fit", str(files["nwb"]), "--out", str(a), *ARGS, "--no-progress",
                 "--variables", "heading", "--folds", "5"]) == 0
    ca, cb = pd.read_csv(a / "cells.csv"), pd.read_csv(b / "cells.csv")
    assert list(ca["variables"]) == list(cb["variables"])
    assert list(ca["bits_per_spike"]) == pytest.approx(list(cb["bits_per_spike"]), rel=1e-9)


def test_bad_inputs_and_options_exit_2_with_one_line(files, tmp_path, capsys):
    junk = tmp_path / "junk.nwb"
    junk.write_text("not an nwb file")
    cases = [
        ["fit", str(junk), "--out", str(tmp_path / "o1")],
        ["fit", str(tmp_path / "missing.nwb"), "--out", str(tmp_path / "o2")],
        ["fit", str(junk), "--out", str(tmp_path / "o3"), "--folds", "0"],
        ["fit", str(files["npz"]), "--out", str(tmp_path / "o4"), "--variables", "place"],
        ["fit", str(junk), "--out", str(tmp_path / "o5"), "--variables", "x y"],
        ["fit", str(junk)],
    ]
    for argv in cases:
        try:
            code = main(argv)
        except SystemExit as exc:  # argparse errors
            code = exc.code
        err = capsys.readouterr().err.strip()
        assert code == 2, argv
        assert len(err.splitlines()) == 1 and "error" in err, (argv, err)


def test_ctrl_c_exits_130_and_says_how_to_resume(monkeypatch, capsys, files, tmp_path):
    from encodex.population import RunInterrupted

    def interrupted(*a, **k):
        raise RunInterrupted("interrupted: 1 of 3 cells finished and saved in X; run the same "
                             "command again to resume")

    monkeypatch.setattr("encodex.population.run_population", interrupted)
    code = main(["fit", str(files["npz"]), "--out", str(tmp_path / "o")])
    assert code == 130
    assert "resume" in capsys.readouterr().err


def test_python_dash_m_entry_point(monkeypatch, capsys):
    # `python -m encodex` runs encodex/__main__.py; run it in-process (no new interpreter).
    import runpy

    monkeypatch.setattr(sys, "argv", ["encodex", "fit", "--help"])
    with pytest.raises(SystemExit) as e:
        runpy.run_module("encodex", run_name="__main__")
    out = capsys.readouterr().out
    assert e.value.code == 0 and "--exhaustive" in out and "--shuffles" in out
