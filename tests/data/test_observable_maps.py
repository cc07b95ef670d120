"""Map objects of the further observables: validation, files, xarray export.

Check values here are built in the test (round trips); no external numbers.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab import (
    AbsorptionMap,
    GaussianPulse,
    ScatteringMap,
    TRPESMap,
    compute_scattering,
    compute_transient_absorption,
    load_observable_map,
    save_observable_map,
)
from ensemblelab.errors import ParseError, SchemaError
from ensemblelab.testing import make_toy_ensemble


def _with_strengths(ens):
    from ensemblelab import Ensemble

    rng = np.random.default_rng(0)
    ts = rng.uniform(0.0, 0.2, (ens.n_snapshots, ens.n_states, ens.n_states))
    return Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                                active=ens.snapshots["active"], geometries=ens.geometries,
                                symbols=ens.symbols, energies=ens.energies,
                                transition_strengths=ts)


@pytest.fixture(scope="module")
def maps():
    pytest.importorskip("xraydb")
    ens = make_toy_ensemble(6, t_max=40.0, seed=3)
    pump = GaussianPulse(photon_energy=4.0, fwhm=20.0)
    probe = GaussianPulse(photon_energy=5.0, fwhm=20.0)
    sc = compute_scattering(ens, kind="electron", q=np.linspace(0.5, 8.0, 20),
                            delays=np.arange(-10.0, 41.0, 10.0), pump=pump, probe=probe)
    ta = compute_transient_absorption(_with_strengths(ens), probe=probe, pump=pump,
                                      photon_energies=np.linspace(0.5, 5.0, 30),
                                      delays=np.arange(-10.0, 41.0, 10.0), by="state")
    return sc, ta


def _same(a, b):
    assert type(a) is type(b)
    for name in a.__dataclass_fields__:
        va, vb = getattr(a, name), getattr(b, name)
        if isinstance(va, np.ndarray):
            assert np.array_equal(va, vb), name
    assert a.components.keys() == b.components.keys()
    for k in a.components:
        assert np.array_equal(a.components[k], b.components[k])
    assert a.params == b.params


def test_save_and_load_round_trip(maps, tmp_path):
    for m in maps:
        path = save_observable_map(m, tmp_path / f"{type(m).__name__}.npz")
        _same(m, load_observable_map(path))
        with pytest.raises(FileExistsError):
            save_observable_map(m, path)
        save_observable_map(m, path, overwrite=True)


def test_loading_something_else_is_a_parse_error(tmp_path):
    np.savez(tmp_path / "x.npz", a=np.zeros(3))
    with pytest.raises(ParseError, match="not a saved"):
        load_observable_map(tmp_path / "x.npz")


def test_maps_are_read_only_and_validated(maps):
    sc, ta = maps
    with pytest.raises(ValueError):
        sc.intensity[0, 0] = 1.0
    with pytest.raises(SchemaError, match="percent_difference"):
        ScatteringMap(q=[1.0, 2.0], delays=[0.0], intensity=np.zeros((1, 2)),
                      reference=[1.0, 1.0], percent_difference=np.zeros((2, 2)))
    with pytest.raises(SchemaError, match="increase"):
        AbsorptionMap(photon_energies=[2.0, 1.0], delays=[0.0], intensity=np.zeros((1, 2)))
    assert "ScatteringMap" in repr(sc) and "AbsorptionMap" in repr(ta)
    frame = ta.to_frame()
    assert len(frame) == (1 + len(ta.components)) * ta.intensity.size


def test_to_xarray_for_every_map(maps):
    xr = pytest.importorskip("xarray")
    sc, ta = maps
    ds = sc.to_xarray()
    assert isinstance(ds, xr.Dataset)
    assert np.array_equal(ds["percent_difference"].values, sc.percent_difference)
    assert ds["q"].attrs["units"] == "1/Angstrom" and ds["delay"].attrs["units"] == "fs"
    assert ds["intensity"].attrs["units"] == "Angstrom^2"  # electrons
    assert np.array_equal(ds["delta_pdf"].values, sc.delta_pdf)
    ds = ta.to_xarray()
    assert ds["component_GSB"].attrs["units"] == "Angstrom^2"
    assert ds["photon_energy"].attrs["units"] == "eV"
    assert np.array_equal(ds["intensity"].sel(delay=10.0).values, ta.intensity[2])
    m = TRPESMap(kinetic_energies=np.linspace(0, 2, 5), delays=np.array([0.0, 10.0]),
                 intensity=np.arange(10.0).reshape(2, 5), components={"S1": np.ones((2, 5))},
                 alive=np.array([3.0, 2.0]))
    ds = m.to_xarray()
    assert ds["intensity"].dims == ("delay", "kinetic_energy")
    assert np.array_equal(ds["component_S1"].values, np.ones((2, 5)))
    assert ds["kinetic_energy"].attrs["units"] == "eV"


def test_netcdf_round_trip(maps, tmp_path):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("scipy")
    for m in maps:
        path = tmp_path / f"{type(m).__name__}.nc"
        m.to_xarray().to_netcdf(path)
        with xr.open_dataset(path) as ds:
            assert np.allclose(ds["intensity"].values, m.intensity, equal_nan=True)
            for label, arr in m.components.items():
                assert np.allclose(ds[f"component_{label}"].values, arr, equal_nan=True)
