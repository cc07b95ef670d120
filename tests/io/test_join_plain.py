"""Electronic data computed at a stride, joined by (traj, step) or time; plain XYZ + state table.

Check values are the arrays of the ensemble the tables were cut from (computed independently,
not published): a join must give them back at the computed steps and NaN elsewhere.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from io_helpers import random_ensemble

import ensemblelab as el
from ensemblelab.demo import make_ensemble
from ensemblelab.errors import ParseError


@pytest.fixture(scope="module")
def full() -> el.Ensemble:
    # another seed than the shipped demo, with one trajectory cut short (a truncated run)
    ens = make_ensemble(5, seed=11, t_max=40.0, faults=False)
    s = ens.snapshots
    keep = ~((s["traj"] == s["traj"].iloc[0]) & (s["time"] > 21.0)).to_numpy()
    return ens.select(keep)


def _bare(ens: el.Ensemble) -> el.Ensemble:
    return ens.replace(cation_energies=None, dyson=None, adt_cation=None, cation_labels=())


def _strided(ens: el.Ensemble, k: int) -> tuple[pd.DataFrame, np.ndarray]:
    s = ens.snapshots
    sel = (s["step"] % k == 0).to_numpy()
    table = pd.DataFrame({"traj": s["traj"][sel].to_numpy(), "step": s["step"][sel].to_numpy()})
    for j in range(ens.n_cation):
        table[f"cation_e_{j}"] = ens.cation_energies[sel, j]
    for i in range(ens.n_states):
        for j in range(ens.n_cation):
            table[f"dyson_{i}_{j}"] = ens.dyson[sel, i, j]
    table["method_tag"] = np.where(s["step"][sel] % 2 == 0, "even", "odd")
    return table, sel


@pytest.mark.parametrize("k", [3, 5])
def test_join_by_step_gives_values_back_and_nan_elsewhere(full, k):
    table, sel = _strided(full, k)
    shuffled = table.sample(frac=1.0, random_state=k)  # row order must not matter
    joined = el.join_snapshot_table(_bare(full), shuffled)
    np.testing.assert_array_equal(joined.cation_energies[sel], full.cation_energies[sel])
    np.testing.assert_array_equal(joined.dyson[sel], full.dyson[sel])
    assert np.isnan(joined.cation_energies[~sel]).all() and np.isnan(joined.dyson[~sel]).all()
    assert joined.snapshots["method_tag"][~sel].isna().all()
    cov = el.snapshot_coverage(joined).set_index("traj")
    for t, n in full.snapshots.groupby("traj").size().items():
        expect = np.ceil(n / k) / n  # steps 0, k, 2k, ... of n steps (computed independently)
        assert cov.loc[t, "cation_energies"] == pytest.approx(expect)
        assert cov.loc[t, "dyson"] == pytest.approx(expect)
        assert cov.loc[t, "n_snapshots"] == n
    record = joined.metadata["joins"][-1]
    assert record["matched"] == len(table) and record["dropped"] == 0 and record["on"] == "step"


def test_join_from_csv_names_unmatched_row_line_then_ignores_on_request(full, tmp_path):
    table, sel = _strided(full, 4)
    extra = pd.DataFrame([{**table.iloc[0].to_dict(), "traj": 999}])  # a trajectory not loaded
    path = tmp_path / "cation.csv"
    pd.concat([table, extra], ignore_index=True).to_csv(path, index=False)
    before = path.read_bytes()
    with pytest.raises(ParseError) as info:
        el.join_snapshot_table(_bare(full), path)
    err = info.value
    assert err.line == len(table) + 2 and err.field == "step" and "unmatched" in err.hint
    joined = el.join_snapshot_table(_bare(full), path, unmatched="ignore")
    np.testing.assert_array_equal(joined.cation_energies[sel], full.cation_energies[sel])
    assert joined.metadata["joins"][-1]["dropped"] == 1
    assert path.read_bytes() == before  # input never modified


def test_join_by_time_within_tolerance_with_units(full):
    table, sel = _strided(full, 2)
    times = full.snapshots["time"].to_numpy()[sel]
    jitter = np.random.default_rng(0).uniform(-0.004, 0.004, size=times.size)  # fs, invented
    by_time = table.drop(columns="step").assign(time=(times + jitter) / 1000.0)  # in ps
    joined = el.join_snapshot_table(_bare(full), by_time, on="time", time_unit="ps")
    np.testing.assert_array_equal(joined.cation_energies[sel], full.cation_energies[sel])
    assert np.isnan(joined.cation_energies[~sel]).all()
    with pytest.raises(ParseError, match="match no snapshot"):
        el.join_snapshot_table(_bare(full), by_time, on="time", time_unit="ps",
                               tolerance=1e-4)


def test_join_energy_unit_and_user_columns(full):
    table, sel = _strided(full, 3)
    hartree = table.copy()
    from ensemblelab.units import HARTREE_EV  # CODATA via scipy.constants

    for j in range(full.n_cation):
        hartree[f"cation_e_{j}"] = table[f"cation_e_{j}"] / HARTREE_EV
    joined = el.join_snapshot_table(_bare(full), hartree, energy_unit="hartree")
    np.testing.assert_allclose(joined.cation_energies[sel], full.cation_energies[sel],
                               rtol=1e-13)


def test_join_refuses_to_overwrite_and_duplicates(full):
    table, _ = _strided(full, 3)
    with pytest.raises(ParseError) as info:
        el.join_snapshot_table(full, table)  # already holds cation energies
    assert info.value.field == "cation_energies" and info.value.hint
    with pytest.raises(ParseError, match="would replace"):
        el.join_snapshot_table(_bare(full), table.assign(e_0=1.0))
    with pytest.raises(ParseError, match="both match"):
        el.join_snapshot_table(_bare(full), pd.concat([table, table.iloc[:1]]))


def test_join_on_ragged_random_ensembles():
    for seed in range(3):
        ens = random_ensemble(seed, n_traj=4, max_len=7)
        s = ens.snapshots
        sel = np.random.default_rng(seed).uniform(size=len(s)) < 0.4
        table = pd.DataFrame({"traj": s["traj"][sel], "step": s["step"][sel],
                              "cation_e_0": np.arange(sel.sum(), dtype=float)})
        joined = el.join_snapshot_table(ens, table)
        np.testing.assert_array_equal(joined.cation_energies[sel, 0], np.arange(sel.sum()))
        cov = el.snapshot_coverage(joined, ["cation_energies"])
        got = (cov["cation_energies"] * cov["n_snapshots"]).round().astype(int).to_numpy()
        want = pd.Series(sel).groupby(s["traj"].to_numpy()).sum().to_numpy()
        np.testing.assert_array_equal(got, want)


# --------------------------------------------------------------------- plain XYZ + states
def _plain_files(ens: el.Ensemble, folder: Path, stride: int = 1) -> Path:
    folder.mkdir()
    for t in ens.trajectories["traj"]:
        rows = np.flatnonzero((ens.snapshots["traj"] == t).to_numpy())[::stride]
        out = []
        for k, r in enumerate(rows):
            out += [str(ens.n_atoms), f"frame {k} written by an invented program"]
            out += [f"{s} {x:.10f} {y:.10f} {z:.10f}"
                    for s, (x, y, z) in zip(ens.symbols, ens.geometries[r], strict=True)]
        (folder / f"run_{t}.xyz").write_text("\n".join(out) + "\n")
    return folder


def _state_table(ens: el.Ensemble) -> pd.DataFrame:
    s = ens.snapshots
    table = pd.DataFrame({"traj": s["traj"], "step": s["step"], "time": s["time"],
                          "active": s["active"]})
    for i in range(ens.n_states):
        table[f"e_{i}"] = ens.energies[:, i]
    for j in range(ens.n_cation):
        table[f"cation_e_{j}"] = ens.cation_energies[:, j]
    return table


def test_plain_xyz_with_time_step_and_state_table(full, tmp_path):
    folder = _plain_files(full, tmp_path / "xyz")
    states = tmp_path / "states.csv"
    _state_table(full).to_csv(states, index=False)
    dt = float(np.median(np.diff(full.snapshots["time"].to_numpy()[:5])))
    ens = el.load_plain_xyz(folder, states, time_step=dt, progress=False)
    np.testing.assert_allclose(ens.geometries, full.geometries, atol=1e-10)  # 10 decimals
    np.testing.assert_array_equal(ens.snapshots["active"], full.snapshots["active"])
    np.testing.assert_array_equal(ens.energies, full.energies)
    np.testing.assert_allclose(ens.snapshots["time"], full.snapshots["time"], atol=1e-9)
    np.testing.assert_array_equal(ens.cation_energies, full.cation_energies)  # joined
    assert ens.symbols == full.symbols and ens.velocities is None
    # a wrong time step disagrees with the time column: refused, naming the field
    with pytest.raises(ParseError) as info:
        el.load_plain_xyz(folder, states, time_step=dt * 2, progress=False)
    assert info.value.field == "time" and info.value.line is not None


def test_plain_xyz_stride_and_missing_rows(full, tmp_path):
    folder = _plain_files(full, tmp_path / "xyz", stride=2)
    table = _state_table(full).drop(columns="time")
    dt = float(np.median(np.diff(full.snapshots["time"].to_numpy()[:5])))
    with pytest.raises(ParseError, match="no geometry frame"):
        el.load_plain_xyz(folder, table, time_step=dt, stride=2, progress=False)
    ens = el.load_plain_xyz(folder, table, time_step=dt, stride=2, unmatched="ignore",
                            progress=False)
    even = (full.snapshots["step"] % 2 == 0).to_numpy()
    np.testing.assert_array_equal(ens.energies, full.energies[even])
    np.testing.assert_allclose(ens.snapshots["time"], full.snapshots["time"][even], atol=1e-9)
    gap = table[~((table["traj"] == table["traj"].iloc[0]) & (table["step"] == 2))]
    with pytest.raises(ParseError) as info:
        el.load_plain_xyz(folder, gap, time_step=dt, stride=2, unmatched="ignore",
                          progress=False)
    err = info.value
    assert (err.frame, err.line, err.field) == (1, 1 + full.n_atoms + 2, "step")
    assert str(err.path).endswith(f"run_{table['traj'].iloc[0]}.xyz")


def test_plain_xyz_written_by_mdanalysis(tmp_path):
    mda = pytest.importorskip("MDAnalysis")
    rng = np.random.default_rng(5)
    base = np.array([[0.0, 0.0, 0.117], [0.0, 0.757, -0.469], [0.0, -0.757, -0.469]])
    frames = [base + rng.normal(scale=0.02, size=base.shape) for _ in range(6)]  # invented
    u = mda.Universe.empty(3, trajectory=True)
    u.add_TopologyAttr("elements", ["O", "H", "H"])
    u.add_TopologyAttr("names", ["O", "H1", "H2"])
    path = tmp_path / "water_7.xyz"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with mda.Writer(str(path), n_atoms=3) as w:
            for pos in frames:
                u.atoms.positions = pos
                w.write(u)
    states = pd.DataFrame({"traj": 7, "step": range(6), "active": [1, 1, 1, 0, 0, 0],
                           "e_0": 0.0, "e_1": 3.0})
    ens = el.load_plain_xyz(path, states, time_step=0.5, progress=False)
    # MDAnalysis writes 5 decimals and float32 positions: 1e-5 Angstrom (from memory)
    np.testing.assert_allclose(ens.geometries, np.stack(frames), atol=2e-5)
    assert ens.symbols == ("O", "H", "H") and ens.trajectories["traj"].tolist() == [7]
    np.testing.assert_allclose(ens.snapshots["time"], np.arange(6) * 0.5)


def test_plain_xyz_and_table_geometries_written_by_ase_with_momenta(tmp_path):
    import ase  # in the test extra (ensemblelab[structures])
    import ase.io
    import ase.units
    from ase.calculators.singlepoint import SinglePointCalculator

    rng = np.random.default_rng(2)
    pos = rng.normal(size=(4, 3, 3))
    vel = rng.normal(size=(4, 3, 3)) * 0.005  # Angstrom/fs, invented
    frames = []
    for k in range(4):
        a = ase.Atoms("NH2", positions=pos[k])
        a.set_velocities(vel[k] / ase.units.fs)
        a.calc = SinglePointCalculator(a, forces=np.ones((3, 3)))
        frames.append(a)
    path = tmp_path / "geo.xyz"
    ase.io.write(path, frames, format="extxyz")
    states = pd.DataFrame({"traj": 0, "step": range(4), "active": 1, "e_0": 0.0, "e_1": 2.5})
    with pytest.raises(ParseError, match="skip_atom_columns"):
        el.load_plain_xyz(path, states, time_step=1.0, progress=False)
    ens = el.load_plain_xyz(path, states, time_step=1.0, progress=False,
                            skip_atom_columns=["forces"], masses=frames[0].get_masses())
    # ASE writes 8 decimals: ~1e-9 Angstrom/fs (computed independently, not published)
    np.testing.assert_allclose(ens.velocities, vel, rtol=1e-6, atol=2e-9)
    np.testing.assert_allclose(ens.geometries, pos, atol=1e-8)
    # the table loader takes only the positions of such a file
    table = states.assign(time=np.arange(4.0))
    table.to_csv(tmp_path / "geo.csv", index=False)
    tab = el.load(tmp_path / "geo.csv", progress=False)
    np.testing.assert_allclose(tab.geometries, pos, atol=1e-8)
