"""The explore command's pieces, without a browser: notebook, Voila command line, data path."""

from __future__ import annotations

import json

import pytest

from ensemblelab.cli import _explore


def test_explore_voila_command_serves_loopback_only():
    cmd = _explore.voila_command("nb.ipynb", 8123)
    assert "--Voila.ip=127.0.0.1" in cmd and "--port=8123" in cmd and "--no-browser" in cmd
    assert cmd[1:3] == ["-m", "voila"]


def test_explore_free_port_is_bindable():
    import socket

    port = _explore.free_port()
    with socket.socket() as s:
        s.bind(("127.0.0.1", port))


@pytest.mark.slow
def test_explore_generated_notebook_runs_on_a_store(toy, tmp_path):
    import nbformat
    from nbclient import NotebookClient

    import ensemblelab

    store = ensemblelab.save(toy, tmp_path / "toy")
    path = _explore.write_notebook(tmp_path / "nb", store, nonfinite="keep",
                                   explorer={"clusters": False})
    nb = nbformat.read(str(path), as_version=4)
    source = nb.cells[0].source
    # the data path travels as a JSON literal, never as code
    literal = source.split("json.loads(", 1)[1].split(")\n", 1)[0]
    assert json.loads(json.loads(literal))["path"] == str(store.resolve())
    NotebookClient(nb, timeout=300, kernel_name="python3",
                   resources={"metadata": {"path": str(path.parent)}}).execute()
    errors = [o for o in nb.cells[0].outputs if o.get("output_type") == "error"]
    assert not errors, errors
    assert any("application/vnd.jupyter.widget-view+json" in o.get("data", {})
               for o in nb.cells[0].outputs)


def test_explore_missing_path_is_a_clean_error(tmp_path, capsys):
    from ensemblelab.cli import main

    assert main(["explore", str(tmp_path / "nothing")]) == 1
    assert "no such file or folder" in capsys.readouterr().err
