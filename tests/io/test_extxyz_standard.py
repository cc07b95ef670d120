"""The extended-XYZ ``Properties=`` convention: files written by ASE, files ASE reads back.

Unit facts used as check values:

* ASE's momentum unit is amu * Angstrom / t0 with t0 = Angstrom * sqrt(amu / eV), about
  10.18 fs (ASE documentation, ``ase.units``: the time unit of ASE; 10.18 fs from memory).
  ``ase.units.fs`` is 1 fs in that unit. The same t0 from CODATA via scipy.constants is
  computed independently in the test below (different CODATA editions agree to about 1e-8).
"""

from __future__ import annotations

import math
from pathlib import Path

import ase
import ase.io
import ase.units
import numpy as np
import pytest
from ase.calculators.singlepoint import SinglePointCalculator
from scipy import constants

from ensemblelab.demo import make_ensemble
from ensemblelab.errors import ParseError
from ensemblelab.io import load, write_extxyz

# invented water-like molecule and velocities of typical thermal size (Angstrom/fs)
POSITIONS = np.array([[0.0, 0.0, 0.117], [0.0, 0.757, -0.469], [0.0, -0.757, -0.469]])
VELOCITIES = np.array([[0.00098, -0.0002, 0.0001], [0.004, 0.0035, -0.009],
                       [-0.006, 0.002, 0.0071]])  # invented


def _ase_frames(n: int = 4, forces: bool = False) -> list:
    frames = []
    for k in range(n):
        a = ase.Atoms("OH2", positions=POSITIONS + 0.01 * k)
        a.set_velocities(VELOCITIES * (1 + 0.1 * k) / ase.units.fs)  # ASE velocity unit
        a.info.update(time=0.5 * k, active=1, energies=np.array([0.0, 3.1 + 0.01 * k]))
        if forces:
            a.calc = SinglePointCalculator(a, forces=np.full((3, 3), 0.5), energy=-1.0)
        frames.append(a)
    return frames


def _expected(n: int = 4) -> np.ndarray:
    return np.stack([VELOCITIES * (1 + 0.1 * k) for k in range(n)])


def test_time_unit_of_momenta_matches_ase_and_codata():
    from ensemblelab.io._xyz_props import ASE_TIME_FS

    # t0 = 1e-10 m * sqrt(m_u / e) -> fs; computed independently (not published) from CODATA
    t0 = 1e-10 * math.sqrt(constants.physical_constants["atomic mass constant"][0]
                           / constants.e) * 1e15
    assert ASE_TIME_FS == pytest.approx(t0, rel=1e-12)
    assert ASE_TIME_FS == pytest.approx(1.0 / ase.units.fs, rel=1e-7)  # ase.units (ASE docs)
    assert ASE_TIME_FS == pytest.approx(10.1805, abs=1e-4)  # from memory


def test_ase_momenta_become_velocities_in_angstrom_per_fs(tmp_path):
    path = tmp_path / "traj_5.xyz"
    ase.io.write(path, _ase_frames(), format="extxyz")
    assert "momenta:R:3" in path.read_text().splitlines()[1]  # ASE's own layout
    ens = load(path, progress=False)
    # ASE's mass table and ours may differ in the 4th-5th digit: rtol 1e-3 (common practice)
    np.testing.assert_allclose(ens.velocities, _expected(), rtol=1e-3, atol=1e-9)
    assert np.abs(ens.velocities).max() < 0.02  # not the momenta (0.1-0.2) read as velocities
    # with ASE's masses the conversion is exact up to the CODATA edition (rtol 1e-7) and the
    # 8 decimals ASE writes: 5e-9 in a momentum / (1.008 amu * 10.18 fs) ~ 5e-10 Angstrom/fs
    # (computed independently, not published)
    exact = load(path, progress=False, masses=_ase_frames(1)[0].get_masses())
    np.testing.assert_allclose(exact.velocities, _expected(), rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(exact.geometries[2], POSITIONS + 0.02, atol=1e-8)
    assert ens.symbols == ("O", "H", "H")


def test_ase_forces_are_refused_by_name_then_skipped_on_request(tmp_path):
    path = tmp_path / "traj_0.xyz"
    ase.io.write(path, _ase_frames(forces=True), format="extxyz")
    with pytest.raises(ParseError) as info:
        load(path, progress=False)
    err = info.value
    assert err.field == "forces" and err.frame == 0 and err.line == 2
    assert "skip_atom_columns" in (err.hint or "")
    ens = load(path, progress=False, skip_atom_columns=["forces"])
    np.testing.assert_allclose(ens.velocities, _expected(), rtol=1e-3, atol=1e-9)
    assert ens.metadata["skipped_atom_columns"] == ["forces"]
    assert "energy" in ens.snapshots.columns  # ASE's calculator energy: a user column


def test_our_velocities_read_back_by_ase(tmp_path):
    ens = make_ensemble(3, t_max=12.0, faults=False)  # invented demo molecule
    assert ens.velocities is not None
    folder = write_extxyz(ens, tmp_path / "out")
    for tid in ens.trajectories["traj"]:
        frames = ase.io.read(folder / f"traj_{tid}.xyz", index=":")
        rows = ens.snapshots["traj"].to_numpy() == tid
        got = np.stack([f.get_velocities() for f in frames]) * ase.units.fs  # -> Angstrom/fs
        # CODATA editions of ASE and scipy differ by ~1e-8 relative (from memory)
        np.testing.assert_allclose(got, ens.velocities[rows], rtol=1e-7, atol=1e-14)
        np.testing.assert_allclose(np.stack([f.positions for f in frames]),
                                   ens.geometries[rows], rtol=0, atol=1e-12)
        np.testing.assert_allclose(frames[0].get_masses(), ens.masses, rtol=1e-12)
    back = load(folder, progress=False)
    np.testing.assert_array_equal(back.velocities, ens.velocities)  # exact: vel column


def _write(path: Path, comment: str, atoms: list[str]) -> Path:
    text = ""
    for k in range(2):
        text += f"{len(atoms)}\n{comment} time={k} active=0 energies=\"0.0 2.0\"\n"
        text += "\n".join(atoms) + "\n"
    path.write_text(text)
    return path


def test_vel_column_in_declared_units(tmp_path):
    p = _write(tmp_path / "a.xyz", "length_unit=bohr time_unit=au "
               "Properties=species:S:1:pos:R:3:vel:R:3",
               ["H 0 0 0 0.001 0 0", "H 0 0 1.4 0 0 -0.001"])
    ens = load(p, progress=False)
    from ensemblelab.units import AU_TIME_FS, BOHR_ANGSTROM  # CODATA via scipy.constants

    assert ens.velocities[0, 0, 0] == pytest.approx(0.001 * BOHR_ANGSTROM / AU_TIME_FS)
    assert ens.geometries[0, 1, 2] == pytest.approx(1.4 * BOHR_ANGSTROM)


def test_velocity_columns_and_momenta_must_agree(tmp_path):
    p = _write(tmp_path / "a.xyz", "Properties=species:S:1:pos:R:3:vel:R:3:momenta:R:3",
               ["H 0 0 0 0.01 0 0 0.5 0 0", "H 0 0 0.74 0 0 0 0 0 0"])
    with pytest.raises(ParseError) as info:
        load(p, progress=False)
    assert info.value.field == "momenta" and info.value.line == 3


def test_columns_in_another_order_and_atomic_numbers(tmp_path):
    p = _write(tmp_path / "a.xyz", 'Properties="pos:R:3:Z:I:1"',
               ["0 0 0 8", "0 0.76 -0.47 1", "0 -0.76 -0.47 1"])
    ens = load(p, progress=False)
    assert ens.symbols == ("O", "H", "H") and ens.velocities is None
    np.testing.assert_allclose(ens.geometries[0, 1], [0, 0.76, -0.47])


@pytest.mark.parametrize(("comment", "field"), [
    ('pbc="T T T" Lattice="10 0 0 0 10 0 0 0 10"', "pbc"),
    ('Lattice="10 0 0 0 10 0 0 0 10"', "Lattice"),
    ('pbc="F F X"', "pbc"),
    ("Properties=species:S:1:pos:R:2", "Properties"),
])
def test_periodic_or_malformed_layouts_are_refused(tmp_path, comment, field):
    p = _write(tmp_path / "a.xyz", comment, ["H 0 0 0", "H 0 0 0.74"])
    with pytest.raises(ParseError) as info:
        load(p, progress=False)
    assert info.value.field == field and info.value.frame == 0 and info.value.hint


def test_lattice_of_a_non_periodic_box_is_kept(tmp_path):
    p = _write(tmp_path / "a.xyz", 'pbc="F F F" Lattice="10 0 0 0 11 0 0 0 12"',
               ["H 0 0 0", "H 0 0 0.74"])
    ens = load(p, progress=False)
    np.testing.assert_allclose(ens.metadata["lattice"], np.diag([10.0, 11.0, 12.0]))
    assert "pbc" not in ens.snapshots.columns and "Lattice" not in ens.snapshots.columns


def test_unknown_element_names_frame_line_field_and_masses_option_works(tmp_path):
    p = _write(tmp_path / "a.xyz", "", ["H 0 0 0", "Xq 0 0 1.0"])
    with pytest.raises(ParseError) as info:
        load(p, progress=False)
    err = info.value
    assert (err.frame, err.line, err.field) == (0, 4, "element")
    assert "masses=" in (err.hint or "") and str(p) in str(err)
    ens = load(p, progress=False, masses={"Xq": 42.0})
    np.testing.assert_allclose(ens.masses, [1.008, 42.0])  # H: IUPAC abridged weight (memory)
    ens2 = load(p, progress=False, masses=[2.014, 42.0])
    np.testing.assert_allclose(ens2.masses, [2.014, 42.0])
    with pytest.raises(ParseError, match="one mass per atom"):
        load(p, progress=False, masses=[1.0])


def test_masses_option_overrides_standard_weights_in_a_folder(tmp_path):
    ens = make_ensemble(2, t_max=5.0, faults=False)
    folder = write_extxyz(ens, tmp_path / "f")
    heavy = load(folder, progress=False, masses={"H": 2.014})  # deuterated
    is_h = np.array([s == "H" for s in ens.symbols])
    assert is_h.any()
    np.testing.assert_allclose(heavy.masses[is_h], 2.014)
    np.testing.assert_allclose(heavy.masses[~is_h], ens.masses[~is_h])


def test_cli_skip_atom_columns_and_masses(tmp_path, capsys):
    from ensemblelab.cli import main

    path = tmp_path / "traj_0.xyz"
    ase.io.write(path, _ase_frames(forces=True), format="extxyz")
    assert main(["info", str(path), "--no-progress"]) == 1
    err = capsys.readouterr().err
    assert "forces" in err and "--skip-atom-columns forces" in err
    out_dir = tmp_path / "store"
    assert main(["convert", str(path), str(out_dir), "--skip-atom-columns", "forces",
                 "--masses", "H=2.014", "--no-progress"]) == 0
    ens = load(out_dir)
    np.testing.assert_allclose(ens.masses, [15.999, 2.014, 2.014])  # O: IUPAC weight (memory)
    # momenta / deuterium masses: velocities follow the masses given (computed independently)
    np.testing.assert_allclose(ens.velocities[:, 1:], _expected()[:, 1:] * 1.008 / 2.014,
                               rtol=1e-3)
    assert main(["info", str(path), "--masses", "H2.0", "--no-progress"]) == 1
    assert "EL=AMU" in capsys.readouterr().err


@pytest.mark.parametrize("pbc", [False, True])
def test_ase_cell_kept_when_not_periodic_refused_when_periodic(tmp_path, pbc):
    frames = _ase_frames(2)
    for a in frames:
        a.set_cell([12.0, 13.0, 14.0])  # invented box
        a.set_pbc(pbc)
    path = tmp_path / "boxed.xyz"
    ase.io.write(path, frames, format="extxyz")
    if pbc:
        with pytest.raises(ParseError) as info:
            load(path, progress=False)
        assert info.value.field == "pbc" and "unwrap" in info.value.hint
    else:
        ens = load(path, progress=False)
        np.testing.assert_allclose(ens.metadata["lattice"], np.diag([12.0, 13.0, 14.0]))


@pytest.mark.parametrize("spec", ["species:S:1:pos:R:3:tags:I:99999999",
                                  "species:S:1:pos:R:3:x:R:" + "9" * 5000])
def test_hostile_properties_counts_are_refused_cheaply(tmp_path, spec):
    p = _write(tmp_path / "a.xyz", f"Properties={spec}", ["H 0 0 0", "H 0 0 0.74"])
    with pytest.raises(ParseError) as info:
        load(p, progress=False, skip_atom_columns=["tags", "x"])
    assert info.value.field in ("Properties", "atom line")


def test_from_arrays_takes_a_mass_mapping():
    from ensemblelab import Ensemble

    ens = Ensemble.from_arrays(traj=[0, 0], time=[0.0, 1.0], active=[0, 0],
                               geometries=np.zeros((2, 2, 3)), symbols=["H", "Mu"],
                               energies=np.zeros((2, 1)), masses={"Mu": 0.1134})
    # muonium: 0.1134 amu (from memory); H: IUPAC abridged weight 1.008 (from memory)
    np.testing.assert_allclose(ens.masses, [1.008, 0.1134])


def test_cli_atom_options_are_refused_for_a_store(tmp_path, capsys):
    from ensemblelab.cli import main
    from ensemblelab.io import save

    store = save(make_ensemble(2, t_max=4.0, faults=False), tmp_path / "s")
    assert main(["info", str(store), "--masses", "H=2.014", "--no-progress"]) == 1
    assert "native store keeps the masses" in capsys.readouterr().err


def test_properties_changing_between_frames_is_refused(tmp_path):
    p = tmp_path / "a.xyz"
    p.write_text('2\nProperties=species:S:1:pos:R:3 time=0 active=0 energies="0 2"\n'
                 "H 0 0 0\nH 0 0 0.74\n"
                 '2\nProperties=species:S:1:pos:R:3:vel:R:3 time=1 active=0 energies="0 2"\n'
                 "H 0 0 0 0 0 0\nH 0 0 0.74 0 0 0\n")
    with pytest.raises(ParseError) as info:
        load(p, progress=False)
    assert (info.value.field, info.value.frame, info.value.line) == ("Properties", 1, 6)


def test_any_column_order_reads_the_same_arrays(tmp_path):
    """Random layouts of the same invented data read back equal (computed independently)."""
    rng = np.random.default_rng(3)
    symbols = ["C", "O", "H", "H"]
    masses = np.array([12.011, 15.999, 1.008, 1.008])  # IUPAC abridged weights (from memory)
    n_frames = 3
    pos = rng.normal(size=(n_frames, 4, 3))
    vel = rng.normal(size=(n_frames, 4, 3)) * 0.01  # Angstrom/fs
    columns = {
        "species": ("S", 1, lambda f, a: [symbols[a]]),
        "pos": ("R", 3, lambda f, a: list(pos[f, a])),
        "momenta": ("R", 3, lambda f, a: list(vel[f, a] * masses[a] * ASE_T0)),
        "masses": ("R", 1, lambda f, a: [masses[a]]),
        "forces": ("R", 3, lambda f, a: [1.0, -2.0, 0.5]),
        "tags": ("I", 1, lambda f, a: [a]),
        "flag": ("L", 1, lambda f, a: ["T"]),
    }
    for trial in range(12):
        names = list(rng.permutation(list(columns)))
        spec = ":".join(f"{n}:{columns[n][0]}:{columns[n][1]}" for n in names)
        text = ""
        for f in range(n_frames):
            text += f'4\nProperties={spec} time={f} active=0 energies="0 1"\n'
            for a in range(4):
                text += " ".join(str(v) if isinstance(v, str) else repr(float(v))
                                 for n in names for v in columns[n][2](f, a)) + "\n"
        path = tmp_path / f"t{trial}.xyz"
        path.write_text(text)
        ens = load(path, progress=False, skip_atom_columns=["forces", "tags", "flag"])
        assert list(ens.symbols) == symbols
        np.testing.assert_array_equal(ens.geometries, pos)
        np.testing.assert_allclose(ens.velocities, vel, rtol=1e-12)
        np.testing.assert_array_equal(ens.masses, masses)
        assert sorted(ens.metadata["skipped_atom_columns"]) == ["flag", "forces", "tags"]


ASE_T0 = 1e-10 * math.sqrt(constants.physical_constants["atomic mass constant"][0]
                           / constants.e) * 1e15  # fs, CODATA via scipy (computed independently)
