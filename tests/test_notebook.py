"""The walkthrough notebook runs top to bottom and is committed without outputs.

The notebook is executed with nbclient and the ``python3`` kernel (ipykernel, a test extra)
in a temporary working folder, so running it writes nothing into the repository; it writes its
report into a temporary folder of its own.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK = ROOT / "notebooks" / "walkthrough.ipynb"


def test_committed_notebook_has_no_outputs():
    # nbformat 4 schema: code cells carry "outputs" and "execution_count" (null when not run)
    doc = json.loads(NOTEBOOK.read_text(encoding="utf-8"))
    assert doc["nbformat"] == 4
    code = [c for c in doc["cells"] if c["cell_type"] == "code"]
    assert code, "the walkthrough has no code cells"
    for i, cell in enumerate(code):
        assert cell.get("outputs") == [], f"code cell {i} has stored outputs; strip them before committing"
        assert cell.get("execution_count") is None, f"code cell {i} has an execution count; strip it"


def test_notebook_is_valid_nbformat():
    nbformat = pytest.importorskip("nbformat")
    nb = nbformat.read(str(NOTEBOOK), as_version=4)
    nbformat.validate(nb)   # raises on a schema violation


def test_notebook_runs_top_to_bottom(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    pytest.importorskip("ipykernel")
    nb = nbformat.read(str(NOTEBOOK), as_version=4)
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()   # raises CellExecutionError naming the failing cell
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
    figures = sum(1 for c in nb.cells if c.cell_type == "code" for o in c.outputs
                  if o.output_type == "display_data" and "image/png" in o.get("data", {}))
    assert figures >= 5, f"expected the five figures of the walkthrough, got {figures}"
    text = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code" for o in c.outputs
                   if o.output_type == "stream")
    assert "notes played as written" in text
    assert list(tmp_path.iterdir()) == [], "the notebook should write only into its own temporary folder"
