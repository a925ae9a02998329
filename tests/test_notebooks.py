"""Every notebook in notebooks/ executes from top to bottom without errors.

The two longest (a learned control trained and reused; both routes compared over seeds) are in
the slow set (``python -m pytest -m slow``); the others run in every test run.
"""
import pathlib

import nbclient
import nbformat
import pytest

NOTEBOOKS = sorted((pathlib.Path(__file__).resolve().parent.parent / "notebooks").glob("*.ipynb"))
LONG = {"learned_control", "windows_vs_switching"}


@pytest.mark.parametrize("path", [pytest.param(p, id=p.stem, marks=[pytest.mark.slow] if p.stem in LONG else [])
                                  for p in NOTEBOOKS])
def test_notebook_runs(path):
    notebook = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(notebook, timeout=300, kernel_name="python3",
                                     resources={"metadata": {"path": str(path.parent)}})
    client.execute()
    text = "".join(c.get("source", "") for c in notebook.cells if c.cell_type == "markdown").lower()
    assert "experimental validation" in text
