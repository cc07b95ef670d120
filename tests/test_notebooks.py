"""Every notebook in notebooks/ runs from top to bottom without an error output (nbclient)."""

from __future__ import annotations

from pathlib import Path

import pytest

NOTEBOOKS = sorted((Path(__file__).resolve().parents[1] / "notebooks").glob("*.ipynb"))


def test_notebooks_exist():
    names = [p.name for p in NOTEBOOKS]
    assert len(names) >= 3, names
    assert "04_three_observables.ipynb" in names, names  # the three maps side by side


@pytest.mark.slow
@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.stem)
def test_notebook_runs_without_errors(path):
    import nbformat
    from nbclient import NotebookClient

    nb = nbformat.read(str(path), as_version=4)
    client = NotebookClient(nb, timeout=300, kernel_name="python3",
                            resources={"metadata": {"path": str(path.parent)}},
                            store_widget_state=True)
    client.execute()
    errors = [out for cell in nb.cells if cell.cell_type == "code"
              for out in cell.get("outputs", []) if out.get("output_type") == "error"]
    assert not errors, "\n".join(f"{e['ename']}: {e['evalue']}" for e in errors)
    widget_state = nb.metadata.get("widgets", {}).get(
        "application/vnd.jupyter.widget-state+json", {}).get("state", {})
    assert widget_state, "the notebook displayed no widgets"
    assert not (path.parent / "demo_data_generated").exists()
