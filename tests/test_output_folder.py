"""Output-folder mechanics of encodex.population.checkpoint: claiming, replacing, refusing."""

import json

import pytest

from encodex.errors import CheckpointMismatchError, OutputError
from encodex.population.checkpoint import (MANIFEST, check_output_folder, open_checkpoint,
                                           own_folder, write_unit_file)


def test_own_folder_new_resumed_replaced_refused(tmp_path):
    out = tmp_path / "demo"
    assert own_folder(out, ".mark.json", {"cells": 3}) == "new"
    (out / "data.nwb").write_text("x")
    assert own_folder(out, ".mark.json", {"cells": 3}) == "resumed"
    assert (out / "data.nwb").exists()
    assert own_folder(out, ".mark.json", {"cells": 2}) == "replaced: cells 3 -> 2"
    assert sorted(p.name for p in out.iterdir()) == [".mark.json"]
    assert json.loads((out / ".mark.json").read_text()) == {"cells": 2}
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    with pytest.raises(CheckpointMismatchError, match="not made by this command"):
        own_folder(other, ".mark.json", {"cells": 2})
    assert sorted(p.name for p in other.iterdir()) == ["notes.txt"]
    with pytest.raises(OutputError, match="is a file"):
        own_folder(other / "notes.txt", ".mark.json", {})


def test_checkpoint_replaced_only_while_no_unit_is_finished(tmp_path):
    out = tmp_path / "R"
    assert open_checkpoint(out, {"folds": 5}, "f1") is False
    # nothing finished: other settings replace the manifest
    assert open_checkpoint(out, {"folds": 10}, "f1") is False
    assert json.loads((out / MANIFEST).read_text())["settings"] == {"folds": 10}
    assert open_checkpoint(out, {"folds": 10}, "f1") is True
    write_unit_file(out / "units" / "env" / "u1.npz", {}, {"cell": {}})
    with pytest.raises(CheckpointMismatchError, match=r"folds: 10 -> 5.*--overwrite"):
        open_checkpoint(out, {"folds": 5}, "f1")
    with pytest.raises(CheckpointMismatchError, match="different input recording"):
        open_checkpoint(out, {"folds": 10}, "f2")
    assert open_checkpoint(out, {"folds": 5}, "f2", overwrite=True) is False
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST]
    check_output_folder(out)  # an encodex folder passes the early check
    (tmp_path / "x").mkdir()
    (tmp_path / "x" / "a").write_text("")
    with pytest.raises(CheckpointMismatchError, match=r"even with --overwrite"):
        check_output_folder(tmp_path / "x", overwrite=True)
