"""Safe files: plain formats only, nothing unpickled, every write inside the chosen folder.

A shared or downloaded results folder must not be able to run code when it is resumed or
reported on, and hostile unit ids or environment names (``../../evil``, ``a/b``, ``..``) must
not place files outside the output folder or make one unit read another unit's file.
"""

from __future__ import annotations

import ast
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import encodex
from encodex.cli import main
from encodex.io import make_recording, write_bundle
from encodex.population.checkpoint import safe_name, unit_path

ARGS = ["--variables", "heading,speed", "--folds", "6", "--bin-size", "0.1",
        "--min-spikes", "30", "--no-progress"]
HOSTILE_UNITS = ["../../evil", "a/b", "..", "c:\\win", "ok_unit", "a_b"]
HOSTILE_ENVS = ["../../room", "plain"]


def _recording():
    rng = np.random.default_rng(3)
    n = 1600  # 80 s at 20 Hz
    t = np.arange(n) / 20.0
    xy = 0.5 + np.cumsum(rng.normal(0, 0.01, (n, 2)), axis=0)
    xy = np.abs(np.mod(xy + 1.0, 2.0) - 1.0)
    heading = np.mod(np.cumsum(rng.normal(0, 0.1, n)), 2 * np.pi)
    spikes = {}
    for k, u in enumerate(HOSTILE_UNITS):
        rate = 2.0 * np.exp(1.5 * np.cos(heading - k)) / np.i0(1.5)
        c = rng.poisson(rate / 20.0)
        spikes[u] = np.repeat(t, c) + rng.uniform(0, 0.05, c.sum())
    return make_recording(t, xy, spikes, heading=heading,
                          epochs=[(0.0, 40.0, HOSTILE_ENVS[0]), (40.0, 80.0, HOSTILE_ENVS[1])])


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    base = tmp_path_factory.mktemp("safe")
    src = write_bundle(_recording(), base / "input" / "hostile.npz")
    work = base / "a" / "b" / "c"
    work.mkdir(parents=True)
    out = work / "out"
    before = _snapshot(base, exclude=out)
    assert main(["fit", str(src), "--out", str(out), *ARGS]) == 0
    assert main(["report", str(out), "--cell", "../../evil", "../../room",
                 "--between", *HOSTILE_ENVS, "--max-cells", "2"]) == 0
    assert main(["compare", str(out), "--between", *HOSTILE_ENVS]) == 0
    after = _snapshot(base, exclude=out)
    return base, out, before, after, src


def _snapshot(root: Path, exclude: Path) -> set[str]:
    return {str(p) for p in root.rglob("*") if exclude not in p.parents and p != exclude}


def test_no_file_written_outside_the_output_folder(run_dir):
    base, out, before, after, _ = run_dir
    assert after == before, sorted(after - before)
    for p in out.rglob("*"):
        assert out.resolve() in p.resolve().parents
        assert not p.is_symlink()
    # No name escaped through a separator: every unit file sits in units/<env>/.
    for f in (out / "units").rglob("*.npz"):
        assert f.parent.parent == out / "units"


def test_hostile_ids_keep_their_rows_and_distinct_files(run_dir):
    _, out, _, _, _ = run_dir
    cells = pd.read_csv(out / "cells.csv", dtype={"unit": str, "environment": str},
                        keep_default_na=False)
    assert set(cells["unit"]) == set(HOSTILE_UNITS)
    assert set(cells["environment"]) == set(HOSTILE_ENVS)
    assert len(cells) == len(HOSTILE_UNITS) * len(HOSTILE_ENVS)
    files = {unit_path(out, e, u) for e in HOSTILE_ENVS for u in HOSTILE_UNITS}
    assert len(files) == len(HOSTILE_UNITS) * len(HOSTILE_ENVS)
    for f in files:
        assert f.exists(), f
    # Plain names keep their name; "a_b" and "a/b" do not collide.
    assert unit_path(out, "plain", "ok_unit") == out / "units" / "plain" / "ok_unit.npz"
    assert safe_name("a/b") != safe_name("a_b")
    # Each unit file holds the record of its own unit.
    for e in HOSTILE_ENVS:
        for u in HOSTILE_UNITS:
            with np.load(unit_path(out, e, u), allow_pickle=False) as z:
                rec = json.loads(str(z["record__json"]))
            assert rec["cell"]["unit"] == u and rec["cell"]["environment"] == e


def test_report_reads_each_units_own_file(run_dir):
    # "../plain/ok_unit" in environment "plain" would resolve to ok_unit's file if the plain
    # layout were tried for names with separators.
    from encodex.report.load import load_run

    _, out, _, _, _ = run_dir
    run = load_run(out)
    assert run.unit_file("plain", "../plain/ok_unit") != out / "units" / "plain" / "ok_unit.npz"
    assert run.unit_file("plain", "ok_unit") == out / "units" / "plain" / "ok_unit.npz"
    for e in HOSTILE_ENVS:
        for u in HOSTILE_UNITS:
            f = run.unit_file(e, u)
            assert f == unit_path(out, e, u)
            assert out.resolve() in f.resolve().parents


def test_outputs_are_plain_csv_json_npz_without_pickles(run_dir):
    _, out, _, _, _ = run_dir
    suffixes = set()
    for p in out.rglob("*"):
        if not p.is_file():
            continue
        suffixes.add(p.suffix)
        head = p.read_bytes()[:2]
        assert head != b"\x80\x04" and head[:1] != b"\x80", f"{p} looks like a pickle"
        if p.suffix == ".npz":
            with np.load(p, allow_pickle=False) as z:
                for k in z.files:
                    assert z[k].dtype != object, (p, k)
        elif p.suffix == ".json":
            json.loads(p.read_text())
        elif p.suffix == ".csv":
            pd.read_csv(p)
    assert suffixes <= {".csv", ".json", ".npz", ".txt", ".md", ".tex", ".html", ".png",
                        ".pdf"}, suffixes
    assert {".csv", ".json", ".npz"} <= suffixes


class _Trap:
    """Unpickling this creates a marker file: proof that a pickle was executed."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_pickles_planted_in_a_results_folder_are_never_executed(run_dir, tmp_path):
    import shutil

    _, out, _, _, src = run_dir
    shared = tmp_path / "downloaded"
    shutil.copytree(out, shared)
    marker = tmp_path / "EXECUTED"
    victim = unit_path(shared, "plain", "ok_unit")
    with np.load(victim, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    trap = np.empty(1, dtype=object)
    trap[0] = _Trap(marker)
    np.savez(victim, **{**arrays, "record__json": trap, "heading__log_modulation": trap})
    try:
        code = main(["report", str(shared), "--cell", "ok_unit", "plain", "--max-cells", "1"])
    except SystemExit as exc:
        code = exc.code
    assert code in (0, 2)
    # Resuming the fit in that folder: the planted file is recomputed, not unpickled.
    assert main(["fit", str(src), "--out", str(shared), *ARGS]) == 0
    with np.load(victim, allow_pickle=False) as z:
        assert z["record__json"].dtype.kind == "U"
    assert not marker.exists()


def _calls(tree):
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            f = node.func
            name = (f.attr if isinstance(f, ast.Attribute) else
                    f.id if isinstance(f, ast.Name) else "")
            owner = (f.value.id if isinstance(f, ast.Attribute) and isinstance(f.value, ast.Name)
                     else "")
            yield node, owner, name


def test_package_never_unpickles_or_loads_npz_with_pickles_allowed():
    # Static check of every module of the package: no pickle/joblib/dill loads and every
    # numpy.load call passes allow_pickle=False explicitly.
    root = Path(encodex.__file__).parent
    offences = []
    for path in sorted(root.rglob("*.py")):
        tree = ast.parse(path.read_text(), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                mods = [a.name for a in node.names] + [getattr(node, "module", None) or ""]
                if any(m.split(".")[0] in ("pickle", "dill", "cloudpickle", "shelve", "marshal")
                       for m in mods):
                    offences.append(f"{path.name}:{node.lineno} imports a pickle module")
        for node, owner, name in _calls(tree):
            where = f"{path.relative_to(root)}:{node.lineno}"
            if name in ("read_pickle", "to_pickle") or (owner == "joblib" and name == "load"):
                offences.append(f"{where} {owner}.{name}")
            if name == "load" and owner in ("np", "numpy"):
                kw = {k.arg: k.value for k in node.keywords}
                v = kw.get("allow_pickle")
                if not (isinstance(v, ast.Constant) and v.value is False):
                    offences.append(f"{where} numpy.load without allow_pickle=False")
    assert offences == []


def test_checkpoint_writer_refuses_object_arrays(tmp_path):
    from encodex.errors import OutputError
    from encodex.population.checkpoint import write_unit_file

    with pytest.raises(OutputError, match="pickling"):
        write_unit_file(tmp_path / "u.npz", {"x": np.array([{"a": 1}], dtype=object)}, {})
    assert not (tmp_path / "u.npz").exists()
    assert os.listdir(tmp_path) == []


def test_very_long_and_colliding_names_get_distinct_short_files(tmp_path):
    # A 300-character id would exceed the 255-byte limit of file names: it is cut and
    # hashed, two ids sharing their first 100 characters still get distinct files, and the
    # report stage finds the file under the same name.
    from encodex.population.checkpoint import MAX_NAME, read_unit_record, write_unit_file
    from encodex.report.load import RunFolder

    long_a, long_b = "u" * 300, "u" * 299 + "v"
    paths = {u: unit_path(tmp_path, "e" * 400, u) for u in (long_a, long_b, "u" * MAX_NAME)}
    assert len(set(paths.values())) == 3
    for u, p in paths.items():
        assert len(p.name) < 255 and len(p.parent.name) < 255
        write_unit_file(p, {"x": np.arange(3.0)}, {"cell": {"unit": u}})
        assert read_unit_record(p)["cell"]["unit"] == u
    assert paths["u" * MAX_NAME].name == "u" * MAX_NAME + ".npz"  # at the limit: unchanged
    folder = RunFolder(tmp_path, pd.DataFrame(), pd.DataFrame(), {})
    for u, p in paths.items():
        assert folder.unit_file("e" * 400, u) == p
