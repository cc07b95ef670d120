from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from ensemblelab.widgets._ngl import EnsembleStructure, pdb_block


def test_pdb_block_uses_fixed_pdb_columns():
    # column layout of ATOM/HETATM records: x 31-38, y 39-46, z 47-54, element 77-78
    # (PDB format description, common practice)
    text = pdb_block(["C", "Cl"], np.array([[1.234, -5.0, 10.5], [0.0, 0.0, 0.0]]))
    first, second = text.splitlines()[:2]
    assert first.startswith("HETATM")
    assert float(first[30:38]) == pytest.approx(1.234)
    assert float(first[38:46]) == pytest.approx(-5.0)
    assert float(first[46:54]) == pytest.approx(10.5)
    assert first[76:78].strip() == "C"
    assert second[76:78].strip() == "CL"
    assert text.rstrip().endswith("END")


def test_pdb_block_gives_each_copy_its_own_chain():
    xyz = np.zeros((6, 3))
    lines = pdb_block(["O", "H", "H"], xyz, copies=2).splitlines()[:-1]
    assert [ln[21] for ln in lines] == ["A"] * 3 + ["B"] * 3
    with pytest.raises(ValueError, match="copies \\* n_atoms"):
        pdb_block(["O"], xyz, copies=2)


def test_ensemblestructure_serves_frames_in_angstrom():
    frames = np.arange(2 * 3 * 3, dtype=float).reshape(2, 3, 3)
    s = EnsembleStructure(["O", "H", "H"], frames)
    assert s.n_frames == 2
    np.testing.assert_array_equal(s.get_coordinates(1), frames[1].astype(np.float32))
    assert "HETATM" in s.get_structure_string()
    with pytest.raises(ValueError, match="frames must have shape"):
        EnsembleStructure(["O"], frames)


def test_nglview_python_side_matches_installed_front_end():
    # a broken combination (Python side asking for a front end that is not installed)
    # leaves a blank viewer: compare the versions (common practice)
    import sys

    import nglview
    from nglview._frontend import __frontend_version__

    candidates = [Path(sys.prefix) / "share" / "jupyter" / "labextensions" /
                  "nglview-js-widgets" / "package.json"]
    found = [p for p in candidates if p.exists()]
    assert found, f"nglview labextension not installed under {candidates[0].parent}"
    installed = json.loads(found[0].read_text())["version"]
    assert installed == __frontend_version__, (
        f"nglview {nglview.__version__} wants front end {__frontend_version__}, "
        f"installed {installed}")
    view = nglview.NGLWidget()
    assert view._view_module_version == installed
