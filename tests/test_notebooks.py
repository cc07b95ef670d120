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
    # a figure where a reader would rather look (common practice: at least two per notebook)
    figures = [out for cell in nb.cells if cell.cell_type == "code"
               for out in cell.get("outputs", []) if "image/png" in out.get("data", {})]
    assert len(figures) >= 2, f"{path.name} shows {len(figures)} figure(s)"
    assert not (path.parent / "demo_data_generated").exists()


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.stem)
def test_notebook_teaches_step_by_step(path):
    """Each step states the question it answers, intervals are honest (bootstrap over
    trajectories, never n_boot=0 or a covariance-only fit) and the notebook closes with a
    step for the reader's own data (common practice for tutorials)."""
    import nbformat

    nb = nbformat.read(str(path), as_version=4)
    heads = [line for cell in nb.cells if cell.cell_type == "markdown"
             for line in cell.source.splitlines() if line.startswith("## Step")]
    assert len(heads) >= 3, heads
    assert all(h.rstrip().endswith("?") for h in heads), heads  # a question per step
    assert nb.cells[-2].cell_type == "markdown"
    assert nb.cells[-2].source.startswith("## Now with your own data")
    for key in ("ensemblelab.load(", "from_arrays", "savefig"):
        assert key in nb.cells[-2].source + nb.cells[-1].source, key
    code = "\n".join(c.source for c in nb.cells if c.cell_type == "code")
    assert "n_boot=0" not in code and "interval='covariance'" not in code
    assert 'interval="covariance"' not in code
    if "fit_kinetics(" in code:
        assert 'interval="bootstrap"' in code
