"""Every notebook runs top to bottom in a fresh kernel (nbclient); any error fails the build."""

from __future__ import annotations

import json
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

NOTEBOOKS = sorted((Path(__file__).resolve().parent.parent / "notebooks").glob("*.ipynb"))


@pytest.mark.slow
@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs(path, tmp_path):
    nb = nbformat.read(path, as_version=4)
    client = NotebookClient(nb, timeout=300, kernel_name="python3", resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    errors = [o for o in outputs if o.get("output_type") == "error"]
    assert not errors
    # a figure shows as a figure, never as its text repr ("<Figure size 900x420 with 3 Axes>")
    texts = [o.get("data", {}).get("text/plain", "") for o in outputs] + [o.get("text", "") for o in outputs]
    assert not any(
        "<Figure size" in "".join(t) and "image/png" not in o.get("data", {}) for t, o in zip(texts, outputs + outputs, strict=True)
    )


def test_population_notebook_shows_its_figure(tmp_path):
    path = next(p for p in NOTEBOOKS if p.stem.startswith("04"))
    nb = nbformat.read(path, as_version=4)
    NotebookClient(nb, timeout=300, kernel_name="python3", resources={"metadata": {"path": str(tmp_path)}}).execute()
    pngs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", []) if "image/png" in o.get("data", {})]
    assert pngs, "the population figure is not displayed as an image"


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_committed_without_outputs(path):
    nb = json.loads(path.read_text())
    assert all(not c.get("outputs") and c.get("execution_count") is None for c in nb["cells"] if c["cell_type"] == "code")


def test_there_are_four_notebooks():
    assert len(NOTEBOOKS) >= 4
