"""The tutorial notebook runs from top to bottom (nbclient).

The default run leaves out the cells tagged ``posterior`` (the sampler's compile and two
chains take one to two minutes on a loaded 2-core machine); the slow test runs them all.
"""

from __future__ import annotations

from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat", reason="nbformat is in the dev extra")
nbclient = pytest.importorskip("nbclient", reason="nbclient is in the dev extra")

NOTEBOOK = Path(__file__).resolve().parents[2] / "docs" / "tutorial.ipynb"


def _run(tmp_path: Path, *, posterior: bool, timeout: int) -> tuple[object, str]:
    nb = nbformat.read(NOTEBOOK, as_version=4)
    if not posterior:
        nb.cells = [c for c in nb.cells if "posterior" not in c.metadata.get("tags", [])]
    # raises CellExecutionError, naming the cell, if any cell fails
    nbclient.NotebookClient(nb, timeout=timeout, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    text = " ".join(str(o.get("data", {}).get("text/plain", "")) + str(o.get("text", ""))
                    for o in outputs)
    return nb, text


def test_tutorial_notebook_executes(tmp_path):
    nb, text = _run(tmp_path, posterior=False, timeout=120)
    assert "optimal" in text  # the fit of the best hypothesis succeeded
    last = nb.cells[-1]["outputs"][-1]["data"]["text/plain"]
    assert "mantle" in last  # the hand-off file holds the mantle composition


@pytest.mark.slow
def test_tutorial_notebook_with_its_posterior(tmp_path):
    nb, text = _run(tmp_path, posterior=True, timeout=900)
    assert "gate passed" in text or "gate FAILED" in text
    assert "T0" in text and "slope" in text  # the posterior volatility summary
    assert "report.html" in text  # the posterior's page was written
    last = nb.cells[-1]["outputs"][-1]["data"]["text/plain"]
    assert "median" in last and "p97.5" in last  # the hand-off with its intervals
