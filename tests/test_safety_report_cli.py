"""No data loss from ``report --overwrite`` and ``convert --overwrite``; no tracebacks from the
command line for user errors; CSV files for humans carry no live spreadsheet formulas."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from ensemblelab.cli import main
from ensemblelab.io import save, write_extxyz
from ensemblelab.testing import make_toy_ensemble

ROOT = Path(__file__).resolve().parents[1]
KW = ["--clusters", "2"]


def _digest(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in folder.rglob("*") if p.is_file()}


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    ens = make_toy_ensemble(12, seed=2, t_max=120.0, dt=4.0)
    folder = tmp_path_factory.mktemp("d")
    return ens, write_extxyz(ens, folder / "traj_data", compress=True)


def test_report_out_onto_the_input_data_is_refused(data, capsys):
    _, folder = data
    before = _digest(folder)
    assert main(["report", str(folder), "--out", str(folder), "--overwrite", *KW]) == 1
    err = capsys.readouterr().err
    assert "input data" in err and "Traceback" not in err
    assert _digest(folder) == before  # nothing deleted or changed
    # a folder that holds the data is refused too
    assert main(["report", str(folder), "--out", str(folder.parent), "--overwrite", *KW]) == 1
    assert _digest(folder) == before


def test_report_overwrite_replaces_only_a_marked_report(data, tmp_path, capsys):
    _, folder = data
    other = tmp_path / "mine"
    other.mkdir()
    (other / "thesis.tex").write_text("precious")
    assert main(["report", str(folder), "--out", str(other), "--overwrite", *KW]) == 1
    assert "did not write" in capsys.readouterr().err
    assert (other / "thesis.tex").read_text() == "precious"

    out = tmp_path / "rep"
    assert main(["report", str(folder), "--out", str(out), *KW]) == 0
    assert (out / ".ensemblelab-report.json").is_file()
    assert main(["report", str(folder), "--out", str(out), "--overwrite", *KW]) == 0  # ours
    (out / "notes.txt").write_text("added by the user")
    assert main(["report", str(folder), "--out", str(out), "--overwrite", *KW]) == 1
    assert (out / "notes.txt").read_text() == "added by the user"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine", "rep"]  # no temporaries


def test_report_tables_neutralise_spreadsheet_formulas(tmp_path):
    import pandas as pd

    from ensemblelab.report import _csv

    table = pd.DataFrame({"label": ["=cmd|' /C calc'!A0", "planar"], "x": [-1.5, 2.0]})
    text = _csv(table, tmp_path / "t.csv").read_text()
    # the usual rule (common practice): formula-like text cells get a leading quote
    assert text.splitlines()[1].startswith("'=cmd") and text.splitlines()[1].endswith(",-1.5")


def test_convert_overwrite_refuses_a_store_with_foreign_files(data, tmp_path, capsys):
    ens, folder = data
    store = save(ens, tmp_path / "s")
    (store / "results.csv").write_text("mine")
    assert main(["convert", str(folder), str(store), "--overwrite", "--no-progress"]) == 1
    assert "did not write" in capsys.readouterr().err
    assert (store / "results.csv").read_text() == "mine"


@pytest.mark.parametrize("args", [
    ["info", "/nonexistent/ensemble"],
    ["convert", "/nonexistent/ensemble", "/tmp/never-written"],
    ["report", "/nonexistent/ensemble", "--out", "/tmp/never-written-report"],
])
def test_cli_user_errors_print_no_traceback(args):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("ENSEMBLELAB_DEBUG", None)
    proc = subprocess.run([sys.executable, "-m", "ensemblelab", *args], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    assert "/nonexistent/ensemble" in proc.stderr and "error" in proc.stderr
    assert not Path("/tmp/never-written").exists()


def test_cli_hostile_manifest_is_one_clean_line(tmp_path, capsys):
    store = save(make_toy_ensemble(2), tmp_path / "s")
    (store / "manifest.json").write_text('{"format": "ensemblelab-store", "schema_version": '
                                         'true, "arrays": {}}')
    assert main(["info", str(store)]) == 1
    err = capsys.readouterr().err
    assert "schema_version" in err and "Traceback" not in err and err.count("\n") == 1


def test_cli_error_text_is_sanitised():
    from ensemblelab.cli import _message
    from ensemblelab.errors import StoreError

    text = _message(StoreError("bad \u202e name\x1b[31m" + "x" * 5000))
    assert "\u202e" not in text and "\x1b" not in text and len(text) < 2100
    assert np.isclose(len(text), 2004, atol=10)
