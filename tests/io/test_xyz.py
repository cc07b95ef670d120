"""Round trips and behaviour of the extended-XYZ folder layout."""

from __future__ import annotations

import gzip
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from io_helpers import random_ensemble

import ensemblelab
from ensemblelab.errors import ParseError, UnitWarning
from ensemblelab.io import load, load_extxyz, write_extxyz
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble
from ensemblelab.units import AU_TIME_FS, BOHR_ANGSTROM, HARTREE_EV

OPTIONAL = ["cation", "dyson", "adt_cation", "amplitudes", "adt", "overlaps", "velocities",
            "initial"]


def _bytes_and_mtimes(folder: Path) -> dict[str, tuple[bytes, int]]:
    return {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in sorted(folder.iterdir())}


@pytest.mark.parametrize("compress", [False, True])
def test_extxyz_round_trip_toy_exact(tmp_path, compress):
    ens = make_toy_ensemble(6, ragged=True)
    folder = write_extxyz(ens, tmp_path / "ens", compress=compress)
    suffix = ".xyz.gz" if compress else ".xyz"
    assert sorted(p.name for p in folder.glob(f"*{suffix}")) == [
        f"traj_{i}{suffix}" for i in range(6)]
    back = load(folder, progress=False)
    # repr floats read back bit for bit: exact round trip (common practice: shortest repr)
    assert_ensemble_equal(ens, back, check_metadata=True)


def test_extxyz_gzip_is_real_gzip_and_deterministic(tmp_path):
    ens = make_toy_ensemble(2)
    a = write_extxyz(ens, tmp_path / "a", compress=True)
    b = write_extxyz(ens, tmp_path / "b", compress=True)
    raw = (a / "traj_0.xyz.gz").read_bytes()
    assert raw[:2] == b"\x1f\x8b"  # gzip magic number (RFC 1952)
    assert gzip.decompress(raw).startswith(b"4\n")
    assert raw == (b / "traj_0.xyz.gz").read_bytes()


def test_extxyz_precision_round_trip_within_digits(tmp_path):
    ens = make_toy_ensemble(3)
    back = load(write_extxyz(ens, tmp_path / "p", precision=6), progress=False)
    # 6 significant digits: relative error below 5e-6 (common practice: %.6g rounding)
    np.testing.assert_allclose(back.geometries, ens.geometries, rtol=5e-6, atol=1e-12)
    np.testing.assert_allclose(back.energies, ens.energies, rtol=5e-6, atol=1e-12)
    assert not np.array_equal(back.geometries, ens.geometries)  # it really rounded


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**31 - 1),
    n_traj=st.integers(1, 4),
    n_atoms=st.integers(1, 3),
    n_states=st.integers(1, 3),
    n_cation=st.integers(1, 2),
    optional=st.sets(st.sampled_from(OPTIONAL)),
    dyson_per_state=st.booleans(),
    text=st.booleans(),
    compress=st.booleans(),
)
def test_extxyz_round_trip_random_ensembles(seed, n_traj, n_atoms, n_states, n_cation,
                                            optional, dyson_per_state, text, compress):
    ens = random_ensemble(seed, n_traj=n_traj, n_atoms=n_atoms, n_states=n_states,
                          n_cation=n_cation, optional=frozenset(optional),
                          dyson_per_state=dyson_per_state, text_column=text)
    with tempfile.TemporaryDirectory() as tmp:
        folder = write_extxyz(ens, Path(tmp) / "e", compress=compress)
        back = load(folder, progress=False)
    assert_ensemble_equal(ens, back, check_metadata=True)


def test_extxyz_selection_keeps_snapshot_ids(tmp_path):
    ens = make_toy_ensemble(4)
    sub = ens.select(ens.snapshots["time"] > 100)
    back = load(write_extxyz(sub, tmp_path / "s"), progress=False)
    assert_ensemble_equal(sub, back)
    assert back.snapshots["snapshot"].iloc[0] == sub.snapshots["snapshot"].iloc[0] > 0


def test_extxyz_metadata_int_keys_restored(tmp_path):
    ens = make_toy_ensemble(3).replace(metadata={"injected_faults": {1: "nan_step", 2: "x"}})
    back = load(write_extxyz(ens, tmp_path / "m"), progress=False)
    assert back.metadata["injected_faults"] == {1: "nan_step", 2: "x"}
    assert back.metadata["sources"][0]["path"].endswith("traj_0.xyz")


def test_extxyz_loader_does_not_modify_sources(tmp_path):
    folder = write_extxyz(make_toy_ensemble(3), tmp_path / "ro", compress=True)
    before = _bytes_and_mtimes(folder)
    load(folder, progress=False)
    assert _bytes_and_mtimes(folder) == before


def test_extxyz_overwrite_rules(tmp_path):
    ens = make_toy_ensemble(2)
    folder = write_extxyz(ens, tmp_path / "o")
    with pytest.raises(ensemblelab.StoreError, match="overwrite=True"):
        write_extxyz(ens, folder)
    write_extxyz(ens.select([1]), folder, overwrite=True)
    assert load(folder, progress=False).n_trajectories == 1
    other = tmp_path / "notours"
    other.mkdir()
    (other / "thesis.tex").write_text("keep me")
    with pytest.raises(ensemblelab.StoreError, match="not a extended-XYZ"):
        write_extxyz(ens, other, overwrite=True)
    assert (other / "thesis.tex").read_text() == "keep me"


HAND_WRITTEN = """\
2
time=0 active=2 energies="-0.5 -0.4 -0.35" energy_unit=hartree time_unit=au length_unit=bohr
H 0.0 0.0 0.0
H 0.0 0.0 1.4
2
time=10 active=1 energies="-0.5 -0.41 -0.36"
H 0.0 0.0 0.0
H 0.0 0.0 1.5
"""


def test_extxyz_header_units_converted_with_codata(tmp_path):
    path = tmp_path / "run_7.xyz"
    path.write_text(HAND_WRITTEN)
    ens = load_extxyz(path, state_base=1, progress=False)
    # conversion factors: CODATA 2022 via scipy.constants (ensemblelab.units)
    np.testing.assert_allclose(ens.energies[0], np.array([-0.5, -0.4, -0.35]) * HARTREE_EV,
                               rtol=1e-15)
    np.testing.assert_allclose(ens.snapshots["time"], [0.0, 10 * AU_TIME_FS], rtol=1e-15)
    np.testing.assert_allclose(ens.geometries[1, 1, 2], 1.5 * BOHR_ANGSTROM, rtol=1e-15)
    # literal check values, CODATA 2022 (via scipy.constants), rel 1e-8
    assert ens.energies[0, 0] == pytest.approx(-0.5 * 27.211386245981, rel=1e-8)
    assert ens.snapshots["time"].iloc[1] == pytest.approx(10 * 0.024188843265864, rel=1e-8)
    assert ens.geometries[1, 1, 2] == pytest.approx(1.5 * 0.529177210544, rel=1e-8)
    assert ens.snapshots["active"].tolist() == [1, 0]  # state_base=1 shifts to 0-based
    assert ens.trajectories["traj"].tolist() == [7]  # id from the file name


def test_extxyz_unit_argument_conflict_is_an_error(tmp_path):
    path = tmp_path / "t_0.xyz"
    path.write_text(HAND_WRITTEN)
    with pytest.raises(ParseError, match="declares energy_unit=hartree"):
        load_extxyz(path, energy_unit="eV", state_base=1, progress=False)


def test_extxyz_unit_argument_applies_to_undeclared_files(tmp_path):
    text = HAND_WRITTEN.replace(" energy_unit=hartree time_unit=au length_unit=bohr", "")
    path = tmp_path / "t_0.xyz"
    path.write_text(text)
    with pytest.warns(UnitWarning, match="look like hartree"):
        load_extxyz(path, state_base=1, progress=False)
    ens = load_extxyz(path, state_base=1, energy_unit="hartree", time_unit="au",
                      length_unit="bohr", progress=False)
    assert ens.energies[1, 1] == pytest.approx(-0.41 * HARTREE_EV, rel=1e-14)


def test_extxyz_velocities_unit_conversion(tmp_path):
    text = ("1\ntime=0 active=0 energies=\"0.0\" length_unit=bohr time_unit=au\n"
            "H 0 0 0 1.0 0 0\n")
    path = tmp_path / "v_0.xyz"
    path.write_text(text)
    ens = load_extxyz(path, progress=False)
    # bohr / atomic time unit in Angstrom/fs: CODATA 2022 literal 21.876912622
    assert ens.velocities[0, 0, 0] == pytest.approx(21.876912622, rel=1e-8)


def test_extxyz_progress_bar_writes_to_stderr(tmp_path, capsys):
    folder = write_extxyz(make_toy_ensemble(2), tmp_path / "pb")
    load(folder, progress=True)
    err = capsys.readouterr().err
    assert "loading" in err and "0/2" in err
    load(folder, progress=False)
    assert capsys.readouterr().err == ""


def test_load_lazy_needs_a_chunked_store(tmp_path):
    from ensemblelab.errors import StoreError

    folder = write_extxyz(make_toy_ensemble(2), tmp_path / "lz")
    with pytest.raises(StoreError, match="lazy=True needs a chunked native store"):
        load(folder, lazy=True)


def test_extxyz_nonfinite_keep_on_a_long_trajectory(tmp_path):
    # long enough (>4000 numbers per key) to go through the bulk parser, not the small path
    ens = make_toy_ensemble(1, t_max=2500.0)
    energies = np.array(ens.energies)
    energies[1234, 1] = np.nan
    broken = ens.replace(energies=energies)
    folder = write_extxyz(broken, tmp_path / "nan")
    # line: 1234 frames x (4 atoms + 2 lines) + 2 = 7406, the 1-based comment line (derived)
    with pytest.raises(ParseError, match=r"traj_0.xyz, frame 1234, line 7406, field 'energies'"):
        load(folder, progress=False)
    with pytest.warns(ensemblelab.EnsembleWarning, match="first at frame 1234"):
        back = load(folder, progress=False, nonfinite="keep")
    assert_ensemble_equal(broken, back)


def test_extxyz_windows_line_endings(tmp_path):
    path = tmp_path / "crlf_0.xyz"
    path.write_bytes(HAND_WRITTEN.replace("\n", "\r\n").encode())
    ens = load_extxyz(path, state_base=1, progress=False)
    assert ens.n_snapshots == 2 and ens.symbols == ("H", "H")
