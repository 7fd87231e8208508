"""The tutorial notebook runs from top to bottom (nbclient), in well under 30 s."""

from __future__ import annotations

from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat", reason="nbformat is in the dev extra")
nbclient = pytest.importorskip("nbclient", reason="nbclient is in the dev extra")

NOTEBOOK = Path(__file__).resolve().parents[2] / "docs" / "tutorial.ipynb"


def test_tutorial_notebook_executes(tmp_path):
    nb = nbformat.read(NOTEBOOK, as_version=4)
    # raises CellExecutionError, naming the cell, if any cell fails
    nbclient.NotebookClient(nb, timeout=120, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    text = " ".join(str(o.get("data", {}).get("text/plain", "")) + str(o.get("text", ""))
                    for o in outputs)
    assert "optimal" in text  # the fit of the best hypothesis succeeded
    last = nb.cells[-1]["outputs"][-1]["data"]["text/plain"]
    assert "mantle" in last  # the hand-off file holds the mantle composition
