"""Chunked native store and LazyEnsemble: round trips, incremental writing, atomicity."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from ensemblelab.errors import SchemaError, StoreError
from ensemblelab.io.chunked import (
    ChunkedStoreWriter,
    convert_extxyz_chunked,
    is_chunked_store,
    load_chunk,
    read_chunked_manifest,
    save_chunked,
)
from ensemblelab.io.lazy import LazyEnsemble, is_lazy
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble

pytest.importorskip("dask")


@pytest.fixture(scope="module")
def toy():
    return make_toy_ensemble(13, t_max=20.0, ragged=True, seed=2)


def test_chunked_round_trip_exact(tmp_path, toy):
    # check value: the ensemble itself (a store must give back exactly what was saved;
    # common practice)
    path = save_chunked(toy, tmp_path / "s.ens", chunk_size=4)
    assert is_chunked_store(path)
    manifest = read_chunked_manifest(path)
    assert manifest["layout"] == "chunked"
    assert [c["n_trajectories"] for c in manifest["chunks"]] == [4, 4, 4, 1]
    lazy = LazyEnsemble(path)
    assert is_lazy(lazy) and not is_lazy(toy)
    assert (lazy.n_snapshots, lazy.n_trajectories, lazy.n_states, lazy.n_cation) == (
        toy.n_snapshots, toy.n_trajectories, toy.n_states, toy.n_cation)
    assert_ensemble_equal(lazy.compute(), toy)
    np.testing.assert_array_equal(lazy.times, toy.times)


def test_lazy_arrays_are_dask_over_chunks(tmp_path, toy):
    import dask.array as da

    lazy = LazyEnsemble(save_chunked(toy, tmp_path / "s.ens", chunk_size=5))
    assert isinstance(lazy.geometries, da.Array)
    assert lazy.geometries.numblocks[0] == lazy.n_chunks == 3
    # check value: the in-memory arrays (computed independently, not published)
    np.testing.assert_array_equal(lazy.energies.compute(), toy.energies)
    np.testing.assert_array_equal(lazy.dyson.compute(), toy.dyson)
    assert lazy.velocities is None
    snaps = lazy.snapshots.compute().reset_index(drop=True)
    np.testing.assert_array_equal(snaps["time"].to_numpy(), toy.snapshots["time"].to_numpy())
    np.testing.assert_array_equal(lazy.snapshot_column("traj").compute(),
                                  toy.snapshots["traj"].to_numpy())


def test_lazy_select_reads_only_whole_trajectories(tmp_path, toy):
    lazy = LazyEnsemble(save_chunked(toy, tmp_path / "s.ens", chunk_size=4))
    sub = lazy.select([1, 6, 12])
    assert_ensemble_equal(sub, toy.select([1, 6, 12]))
    assert_ensemble_equal(lazy.trajectory(3), toy.trajectory(3))
    with pytest.raises(KeyError, match="unknown trajectory"):
        lazy.select([99])
    with pytest.raises(SchemaError, match="whole trajectories by id"):
        lazy.select(np.ones(lazy.n_snapshots, dtype=bool))


def test_iter_chunks_concatenate_to_the_ensemble(tmp_path, toy):
    lazy = LazyEnsemble(save_chunked(toy, tmp_path / "s.ens", chunk_size=3))
    parts = list(lazy.iter_chunks())
    assert sum(p.n_trajectories for p in parts) == toy.n_trajectories
    ids = np.concatenate([p.trajectories["traj"].to_numpy() for p in parts])
    np.testing.assert_array_equal(ids, toy.trajectories["traj"].to_numpy())
    light = lazy.chunk(0, fields=[])
    assert light.dyson is None and light.geometries.shape == parts[0].geometries.shape


def test_writer_streams_and_renumbers(tmp_path, toy):
    with ChunkedStoreWriter(tmp_path / "w.ens", chunk_size=5) as w:
        for i in toy.trajectories["traj"]:
            w.append(toy.trajectory(i))  # one trajectory at a time, ids 0..n-1 each
        assert w.n_chunks == 2  # two full chunks on disk, the rest still buffered
    lazy = LazyEnsemble(tmp_path / "w.ens")
    assert lazy.n_chunks == 3
    assert_ensemble_equal(lazy.compute(), toy)  # snapshot ids 0..n-1 again


def test_writer_keeps_stored_dtype(tmp_path, toy):
    with ChunkedStoreWriter(tmp_path / "f.ens", chunk_size=100) as w:
        w.write_chunk(toy, arrays={"geometries": toy.geometries.astype(np.float32)})
    lazy = LazyEnsemble(tmp_path / "f.ens")
    assert lazy.geometries.dtype == np.float32
    back = lazy.compute()
    np.testing.assert_allclose(back.geometries, toy.geometries, rtol=1e-6)  # float32 eps


def test_writer_refuses_decreasing_ids_and_leaves_nothing(tmp_path, toy):
    target = tmp_path / "bad.ens"
    with pytest.raises(SchemaError, match="increase from chunk to chunk"):
        with ChunkedStoreWriter(target, chunk_size=1) as w:
            w.append(toy.trajectory(3))
            w.append(toy.trajectory(1))
    assert not target.exists()
    assert not list(tmp_path.iterdir())  # no temporary folder left behind


def test_writer_refuses_schema_change(tmp_path, toy):
    other = make_toy_ensemble(2, t_max=5.0, n_atoms=3)
    with pytest.raises(SchemaError, match="does not match the first chunk"):
        with ChunkedStoreWriter(tmp_path / "x.ens", chunk_size=1) as w:
            w.append(toy.trajectory(0))
            w.append(other.trajectory(1))


def test_overwrite_keeps_old_store_until_done(tmp_path, toy):
    path = save_chunked(toy, tmp_path / "s.ens", chunk_size=4)
    with pytest.raises(StoreError, match="already exists"):
        save_chunked(toy, path)
    with pytest.raises(RuntimeError):
        with ChunkedStoreWriter(path, chunk_size=2, overwrite=True) as w:
            w.append(toy.trajectory(0))
            raise RuntimeError("interrupted")
    assert LazyEnsemble(path).n_trajectories == toy.n_trajectories  # old store intact


def test_corrupt_chunk_is_a_store_error(tmp_path, toy):
    path = save_chunked(toy, tmp_path / "s.ens", chunk_size=4)
    chunk = read_chunked_manifest(path)["chunks"][1]["dir"]
    (path / chunk / "energies.npy").write_bytes(b"not an array")
    with pytest.raises(StoreError, match="cannot read the array"):
        load_chunk(path, 1)


def test_convert_extxyz_folder_streams_to_the_eager_result(tmp_path, toy):
    from ensemblelab.io import load_extxyz, write_extxyz

    folder = write_extxyz(toy, tmp_path / "xyz")
    eager = load_extxyz(folder, progress=False)
    store = convert_extxyz_chunked(folder, tmp_path / "c.ens", chunk_size=4, progress=False)
    # check value: the eager load of the same folder (computed independently)
    assert_ensemble_equal(LazyEnsemble(store).compute(), eager)


def test_import_does_not_import_dask():
    code = ("import sys, ensemblelab, ensemblelab.io, ensemblelab.io.lazy, "
            "ensemblelab.io.chunked, ensemblelab.compute.engine; "
            "print('dask' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"


def test_cli_convert_chunked_streams_extxyz(tmp_path, toy, capsys):
    from ensemblelab.cli import main
    from ensemblelab.io import load, write_extxyz

    folder = write_extxyz(toy, tmp_path / "xyz")
    rc = main(["convert", str(folder), str(tmp_path / "c.ens"), "--chunked", "--chunk-size", "5",
               "--no-progress"])
    assert rc == 0
    assert "3 chunk(s)" in capsys.readouterr().out
    lazy = load(tmp_path / "c.ens", lazy=True)
    assert lazy.n_chunks == 3
    # an eager load of a chunked store reads every chunk
    assert_ensemble_equal(load(tmp_path / "c.ens"), load(folder, progress=False))


def test_manifest_summaries_match_the_chunk_data(tmp_path, toy):
    # check values: the same summaries computed here from the in-memory ensemble
    # (computed independently, not published)
    path = save_chunked(toy, tmp_path / "s.ens", chunk_size=4)
    manifest = read_chunked_manifest(path)
    lazy = LazyEnsemble(path)
    ids = toy.trajectories["traj"].to_numpy()
    for i, rec in enumerate(manifest["chunks"]):
        part = toy.select(ids[4 * i:4 * i + 4])
        time = part.snapshots["time"].to_numpy()
        traj = part.snapshots["traj"].to_numpy()
        u, c = np.unique(np.diff(time)[traj[1:] == traj[:-1]], return_counts=True)
        assert rec["dt_values"] == u.tolist() and rec["dt_counts"] == c.tolist()
        assert (rec["t_min"], rec["t_max"]) == (time.min(), time.max())
        ip = part.cation_energies - part.energies[np.arange(part.n_snapshots),
                                                  part.snapshots["active"].to_numpy()][:, None]
        assert (rec["ip_min"], rec["ip_max"]) == (ip.min(), ip.max())  # exact: JSON repr
        assert rec["n_times"] == np.unique(time).size
    np.testing.assert_array_equal(lazy.times, toy.times)


def test_read_chunk_fields_reads_only_what_is_asked(tmp_path, toy):
    from ensemblelab.io.chunked import read_chunk_fields

    path = save_chunked(toy, tmp_path / "s.ens", chunk_size=5)
    manifest = read_chunked_manifest(path)
    frame, trajs, arrays = read_chunk_fields(path, manifest, 1, ["energies", "velocities"])
    ref = load_chunk(path, 1)
    # check value: the validated chunk (computed independently, not published)
    assert list(frame.columns) == ["traj", "time", "active"]
    np.testing.assert_array_equal(frame["time"].to_numpy(), ref.snapshots["time"].to_numpy())
    np.testing.assert_array_equal(arrays["energies"], ref.energies)
    assert arrays["velocities"] is None  # not in the store
    assert set(arrays) == {"energies", "velocities"}  # geometries never read
    np.testing.assert_array_equal(trajs["traj"].to_numpy(), ref.trajectories["traj"].to_numpy())
    (path / manifest["chunks"][1]["dir"] / "energies.npy").write_bytes(b"broken")
    with pytest.raises(StoreError, match="cannot read the array"):
        read_chunk_fields(path, manifest, 1, ["energies"])
