"""Every notebook in notebooks/ executes from top to bottom without errors."""
import pathlib

import pytest

NOTEBOOKS = sorted((pathlib.Path(__file__).resolve().parent.parent / "notebooks").glob("*.ipynb"))


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs(path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    notebook = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(notebook, timeout=120, kernel_name="python3",
                                     resources={"metadata": {"path": str(path.parent)}})
    client.execute()
    text = "".join(c.get("source", "") for c in notebook.cells if c.cell_type == "markdown").lower()
    assert "experimental validation" in text
