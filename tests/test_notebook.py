"""The tutorial notebook runs from top to bottom (executed with nbclient) and says what it must."""

from pathlib import Path

import nbformat
from nbclient import NotebookClient

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "encodex_tutorial.ipynb"


def test_tutorial_notebook_executes(tmp_path):
    nb = nbformat.read(NOTEBOOK, as_version=4)
    params = [c for c in nb.cells if "parameters" in c.get("metadata", {}).get("tags", [])]
    assert len(params) == 1, "the notebook needs one cell tagged 'parameters'"
    # smallest session that still gives every stage something to show
    params[0].source += ("\nN_CELLS = 4\nDURATION_S = 180.0\nJOBS = 1\nFOLDS = 6\n"
                         "VARIABLES = 'position,heading,speed'\nREPORT_CELLS = 1\n")
    client = NotebookClient(nb, timeout=600, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])
              if o.get("output_type") == "error"]
    assert not errors
    text = "\n".join(
        o.get("text", "") + str(o.get("data", {}).get("text/plain", ""))
        for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", []))
    assert "statistical statement at alpha" in text
    assert "Skaggs information" in text
    assert "A poor fit qualifies a label" in text and "ks_within_band" in text
    assert "cells matched" in text and "McNemar" in text
    assert any("image/png" in o.get("data", {}) for c in nb.cells if c.cell_type == "code"
               for o in c.get("outputs", []))
    out = tmp_path / "tutorial_output"
    assert (out / "data" / "simulated_session.nwb").exists()
    assert (out / "fit" / "cells.csv").exists()
    assert (out / "fit" / "tables" / "table_labels.tex").exists()
    assert (out / "report.html").exists()
    assert list((out / "figures").glob("cell_*.pdf"))
    pairs = list((out / "compare_recordings").glob("recordings.json"))
    assert pairs and '"matching"' in pairs[0].read_text()
