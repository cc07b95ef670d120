"""Structure export: XYZ / extended XYZ read back by ASE (reference reader), PDB, CSV, atomicity."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab.errors import MissingDependencyError, SchemaError
from ensemblelab.io.structures import write_pdb, write_structures, write_xyz

WATER = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
FRAMES = np.stack([WATER, WATER + 0.1])
INFO = pd.DataFrame({"cluster": ["S1:0", "S2:1"], "weight": [0.25, 0.75], "snapshot": [3, 9]})


def test_extxyz_round_trip_through_ase(tmp_path):
    ase_io = pytest.importorskip("ase.io")
    path = write_xyz(tmp_path / "w.xyz", FRAMES, ["O", "H", "H"], info=INFO, extended=True)
    frames = ase_io.read(path, index=":", format="extxyz")
    assert len(frames) == 2
    for f, atoms in enumerate(frames):
        np.testing.assert_allclose(atoms.positions, FRAMES[f], atol=1e-8)
        assert atoms.get_chemical_symbols() == ["O", "H", "H"]
        assert str(atoms.info["cluster"]) == INFO["cluster"][f]
        assert float(atoms.info["weight"]) == INFO["weight"][f]
        assert int(atoms.info["snapshot"]) == INFO["snapshot"][f]


def test_plain_xyz_comment_and_ase_read(tmp_path):
    ase_io = pytest.importorskip("ase.io")
    path = write_xyz(tmp_path / "w.xyz", FRAMES, ["O", "H", "H"], info=INFO)
    lines = path.read_text().splitlines()
    assert lines[0] == "3" and lines[1] == "cluster=S1:0 weight=0.25 snapshot=3"
    frames = ase_io.read(path, index=":", format="xyz")
    np.testing.assert_allclose(frames[1].positions, FRAMES[1], atol=1e-8)


def test_pdb_has_models_and_remarks(tmp_path):
    pytest.importorskip("ase")
    import ase.io

    path = write_pdb(tmp_path / "w.pdb", FRAMES, ["O", "H", "H"], info=INFO)
    text = path.read_text()
    assert text.count("MODEL") == 2
    assert "REMARK 250 cluster=S2:1 weight=0.75 snapshot=9" in text
    frames = ase.io.read(path, index=":")
    np.testing.assert_allclose(frames[1].positions, FRAMES[1], atol=1e-3)  # PDB: 3 decimals


def test_write_structures_csv_and_overwrite(tmp_path):
    out, csv = write_structures(tmp_path / "reps.xyz", FRAMES, ["O", "H", "H"], INFO)
    table = pd.read_csv(csv)
    assert table["frame"].tolist() == [0, 1]
    assert table["cluster"].tolist() == ["S1:0", "S2:1"]
    before = out.read_bytes()
    with pytest.raises(FileExistsError, match="overwrite=True"):
        write_structures(tmp_path / "reps.xyz", FRAMES, ["O", "H", "H"], INFO)
    assert out.read_bytes() == before  # untouched after the refusal
    write_structures(tmp_path / "reps.xyz", FRAMES[:1], ["O", "H", "H"], INFO[:1], overwrite=True)
    assert out.read_text().count("\n3\n") == 0 and out.read_text().startswith("3\n")
    assert not list(tmp_path.glob(".*tmp"))  # no temporary files left behind


def test_errors(tmp_path):
    with pytest.raises(SchemaError, match="symbols must have"):
        write_xyz(tmp_path / "a.xyz", FRAMES, ["O"])
    with pytest.raises(SchemaError, match="non-finite"):
        write_xyz(tmp_path / "a.xyz", FRAMES * np.nan, ["O", "H", "H"])
    with pytest.raises(SchemaError, match="format"):
        write_structures(tmp_path / "a.mol", FRAMES, ["O", "H", "H"], INFO)


def test_missing_ase_gives_clear_error(tmp_path, monkeypatch):
    import builtins

    real_import = builtins.__import__

    def fake(name, *args, **kwargs):
        if name == "ase" or name.startswith("ase."):
            raise ImportError("no ase")
        return real_import(name, *args, **kwargs)

    import sys

    for mod in [m for m in sys.modules if m == "ase" or m.startswith("ase.")]:
        monkeypatch.delitem(sys.modules, mod)
    monkeypatch.setattr(builtins, "__import__", fake)
    with pytest.raises(MissingDependencyError, match=r"ensemblelab\[structures\]"):
        write_pdb(tmp_path / "w.pdb", FRAMES, ["O", "H", "H"])
