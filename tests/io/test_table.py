"""Tidy snapshot tables (CSV / Parquet) with geometries in a multi-frame XYZ file."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from io_helpers import random_ensemble

from ensemblelab.errors import ParseError
from ensemblelab.io import load, load_table
from ensemblelab.io.table import write_table
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble
from ensemblelab.units import AU_TIME_FS, HARTREE_EV


def _table_part(ens):
    """What the table layout holds: no matrices, velocities or snapshot ids."""
    return ens.replace(adt=None, adt_cation=None, overlaps=None, velocities=None)


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_table_round_trip_toy_exact(tmp_path, suffix):
    ens = make_toy_ensemble(4, ragged=True)
    path = write_table(ens, tmp_path / f"run{suffix}")
    assert (tmp_path / "run.xyz").is_file() and (tmp_path / "run.trajectories.csv").is_file()
    back = load(path, progress=False)
    assert_ensemble_equal(_table_part(ens), back)


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n_traj=st.integers(1, 4), n_states=st.integers(1, 3),
       optional=st.sets(st.sampled_from(["cation", "dyson", "amplitudes", "initial"])),
       per_state=st.booleans(), parquet=st.booleans())
def test_table_round_trip_random_ensembles(seed, n_traj, n_states, optional, per_state, parquet):
    ens = random_ensemble(seed, n_traj=n_traj, n_states=n_states, optional=frozenset(optional),
                          dyson_per_state=per_state)
    with tempfile.TemporaryDirectory() as tmp:
        path = write_table(ens, Path(tmp) / ("t.parquet" if parquet else "t.csv"))
        back = load(path, progress=False)
    assert_ensemble_equal(ens, back)


def _hand_table(tmp_path, rows=None):
    df = pd.DataFrame(rows or {
        "traj": [2, 1, 1], "time": [0.0, 10.0, 0.0], "active": [2, 1, 2],
        "e_0": [-0.5, -0.5, -0.5], "e_1": [-0.40, -0.41, -0.40], "e_2": [-0.35, -0.36, -0.35],
        "temperature": [300.0, 301.0, 302.0],
    })
    path = tmp_path / "scan.csv"
    df.to_csv(path, index=False)
    xyz = "".join(f"1\nrow {i}\nH 0 0 {i}.5\n" for i in range(len(df)))
    (tmp_path / "scan.xyz").write_text(xyz)
    return path


def test_table_units_converted_and_rows_sorted(tmp_path):
    path = _hand_table(tmp_path)
    ens = load_table(path, energy_unit="hartree", time_unit="au", state_base=1)
    # CODATA 2022 via scipy.constants (ensemblelab.units) and its literal value
    assert ens.energies[0, 1] == pytest.approx(-0.40 * 27.211386245981, rel=1e-8)
    np.testing.assert_allclose(ens.energies[:, 0], -0.5 * HARTREE_EV, rtol=1e-15)
    assert ens.snapshots["time"].tolist() == [0.0, 10 * AU_TIME_FS, 0.0]
    # rows sorted by (traj, time); geometry of table row i follows its row
    assert ens.snapshots["traj"].tolist() == [1, 1, 2]
    assert ens.geometries[:, 0, 2].tolist() == [2.5, 1.5, 0.5]
    assert ens.snapshots["temperature"].tolist() == [302.0, 301.0, 300.0]
    assert ens.snapshots["active"].tolist() == [1, 0, 1]


def test_table_missing_geometry_file_names_both_options(tmp_path):
    path = _hand_table(tmp_path)
    (tmp_path / "scan.xyz").unlink()
    with pytest.raises(ParseError, match=r"no geometry file found; looked for scan.xyz and "
                       r"scan.xyz.gz.*geometries=False"):
        load_table(path, state_base=1, energy_unit="hartree")
    ens = load_table(path, geometries=False, state_base=1, energy_unit="hartree")
    assert ens.n_atoms == 0 and ens.n_snapshots == 3


def test_table_frame_count_mismatch(tmp_path):
    path = _hand_table(tmp_path)
    (tmp_path / "scan.xyz").write_text("1\nrow\nH 0 0 0\n")
    with pytest.raises(ParseError, match=r"scan.xyz, field 'frames': expected one frame per "
                       r"table row \(3 rows\), found 1 frames"):
        load_table(path, state_base=1, energy_unit="hartree")


def test_table_bad_values_name_row_and_column(tmp_path):
    path = _hand_table(tmp_path)
    text = path.read_text().replace("-0.41", "oops")
    path.write_text(text)
    with pytest.raises(ParseError, match=r"scan.csv, line 3, field 'e_1': expected a number, "
                       r"found 'oops' \(row 1\)"):
        load_table(path, state_base=1, energy_unit="hartree")


def test_table_missing_required_columns(tmp_path):
    path = tmp_path / "t.csv"
    pd.DataFrame({"traj": [0], "time": [0.0]}).to_csv(path, index=False)
    with pytest.raises(ParseError, match=r"missing required column\(s\) \['active', 'e_0, e_1, "
                       r"...'\]; found \['traj', 'time'\]"):
        load_table(path, geometries=False)


def test_table_duplicated_time_in_a_trajectory(tmp_path):
    path = _hand_table(tmp_path, {"traj": [0, 0], "time": [1.0, 1.0], "active": [0, 0],
                                  "e_0": [0.0, 0.0]})
    with pytest.raises(ParseError, match=r"duplicated time 1 in trajectory 0 \(rows 0 and 1\)"):
        load_table(path)


def test_table_loader_does_not_modify_sources(tmp_path):
    path = write_table(make_toy_ensemble(2), tmp_path / "r.csv")
    files = sorted(tmp_path.iterdir())
    before = [(p.read_bytes(), p.stat().st_mtime_ns) for p in files]
    load(path, progress=False)
    assert [(p.read_bytes(), p.stat().st_mtime_ns) for p in files] == before
