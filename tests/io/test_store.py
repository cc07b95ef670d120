"""The native store: exact round trip, atomic saves, refusal rules."""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from io_helpers import random_ensemble

from ensemblelab import StoreError
from ensemblelab.io import load, save
from ensemblelab.io import store as store_mod
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble

OPTIONAL = ["cation", "dyson", "adt_cation", "amplitudes", "adt", "overlaps", "velocities",
            "initial"]


def test_store_round_trip_toy_exact(tmp_path):
    ens = make_toy_ensemble(5, ragged=True)
    path = save(ens, tmp_path / "toy.ens")
    back = load(path)
    assert_ensemble_equal(ens, back, check_metadata=True)
    manifest = json.loads((path / "manifest.json").read_text())
    assert manifest["format"] == "ensemblelab-store"
    assert manifest["layout"] == "single"
    assert {a["name"] for a in manifest["arrays"]} == {
        "geometries", "energies", "cation_energies", "dyson", "amplitudes", "adt"}
    assert back.metadata["sources"][-1]["format"] == "ensemblelab-store"


def test_store_mmap_arrays_are_read_only_maps(tmp_path):
    ens = make_toy_ensemble(3)
    back = load(save(ens, tmp_path / "m"), mmap_mode="r")
    assert isinstance(back.geometries, np.memmap) or isinstance(back.geometries.base, np.memmap)
    assert not back.geometries.flags.writeable
    assert_ensemble_equal(ens, back)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n_traj=st.integers(1, 4), n_states=st.integers(1, 3),
       optional=st.sets(st.sampled_from(OPTIONAL)), per_state=st.booleans(), text=st.booleans())
def test_store_round_trip_random_ensembles(seed, n_traj, n_states, optional, per_state, text):
    ens = random_ensemble(seed, n_traj=n_traj, n_states=n_states, optional=frozenset(optional),
                          dyson_per_state=per_state, text_column=text)
    with tempfile.TemporaryDirectory() as tmp:
        back = load(save(ens, Path(tmp) / "s"))
    assert_ensemble_equal(ens, back, check_metadata=True)
    assert back.metadata["injected_faults"] == ens.metadata["injected_faults"]
    assert all(isinstance(k, int) for k in back.metadata["injected_faults"])


def test_store_metadata_numpy_values_become_json(tmp_path):
    ens = make_toy_ensemble(2).replace(metadata={
        "seed": np.int64(3), "dt": np.float32(0.5), "grid": np.arange(3), "bad": float("nan"),
        "pair": (1, 2)})
    back = load(save(ens, tmp_path / "j"))
    assert back.metadata["seed"] == 3 and type(back.metadata["seed"]) is int
    assert back.metadata["grid"] == [0, 1, 2]
    assert np.isnan(back.metadata["bad"])
    assert back.metadata["pair"] == [1, 2]  # tuples come back as lists (documented)


def test_store_metadata_not_serialisable_fails_before_writing(tmp_path):
    ens = make_toy_ensemble(2).replace(metadata={"callback": object()})
    with pytest.raises(StoreError, match="cannot be stored as JSON"):
        save(ens, tmp_path / "x")
    assert not (tmp_path / "x").exists()
    assert list(tmp_path.iterdir()) == []


def test_store_refuses_existing_store_without_overwrite(tmp_path):
    ens = make_toy_ensemble(2)
    path = save(ens, tmp_path / "s")
    with pytest.raises(StoreError, match="overwrite=True"):
        save(ens, path)


def test_store_overwrite_replaces_atomically(tmp_path):
    path = save(make_toy_ensemble(2), tmp_path / "s")
    new = make_toy_ensemble(4, seed=1)
    save(new, path, overwrite=True)
    assert_ensemble_equal(load(path), new)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s"]  # no temp or old folders left


def test_store_writes_into_an_empty_existing_folder(tmp_path):
    (tmp_path / "empty").mkdir()
    ens = make_toy_ensemble(2)
    assert_ensemble_equal(load(save(ens, tmp_path / "empty")), ens)


def test_store_refuses_to_overwrite_foreign_folder(tmp_path):
    folder = tmp_path / "results"
    folder.mkdir()
    (folder / "notes.txt").write_text("precious")
    with pytest.raises(StoreError, match="not a native store"):
        save(make_toy_ensemble(2), folder, overwrite=True)
    assert (folder / "notes.txt").read_text() == "precious"
    file = tmp_path / "afile"
    file.write_text("x")
    with pytest.raises(StoreError, match="is a file"):
        save(make_toy_ensemble(2), file, overwrite=True)


def test_store_interrupted_save_leaves_previous_store_intact(tmp_path, monkeypatch):
    old = make_toy_ensemble(3)
    path = save(old, tmp_path / "s")
    before = {str(p.relative_to(path)): p.read_bytes() for p in path.rglob('*') if p.is_file()}
    real_save = np.save
    calls = []

    def failing_save(*args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise OSError("disk full (simulated)")
        return real_save(*args, **kwargs)

    monkeypatch.setattr(store_mod.np, "save", failing_save)
    with pytest.raises(OSError, match="simulated"):
        save(make_toy_ensemble(5, seed=9), path, overwrite=True)
    monkeypatch.undo()
    assert len(calls) == 2  # really failed mid-write, after the first array
    assert {str(p.relative_to(path)): p.read_bytes() for p in path.rglob('*')
            if p.is_file()} == before
    assert_ensemble_equal(load(path), old)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s"]


def test_store_interrupted_first_save_leaves_nothing(tmp_path, monkeypatch):
    def failing_save(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(store_mod.np, "save", failing_save)
    with pytest.raises(KeyboardInterrupt):
        save(make_toy_ensemble(2), tmp_path / "new")
    assert list(tmp_path.iterdir()) == []


def test_store_loader_does_not_modify_store(tmp_path):
    path = save(make_toy_ensemble(3), tmp_path / "s")
    before = {str(p.relative_to(path)): (p.read_bytes(), p.stat().st_mtime_ns)
              for p in path.rglob('*') if p.is_file()}
    load(path)
    load(path, mmap_mode="r")
    assert {str(p.relative_to(path)): (p.read_bytes(), p.stat().st_mtime_ns)
            for p in path.rglob('*') if p.is_file()} == before


def test_store_rejects_unit_arguments(tmp_path):
    path = save(make_toy_ensemble(2), tmp_path / "s")
    with pytest.raises(ValueError, match="internal units"):
        load(path, energy_unit="hartree")
