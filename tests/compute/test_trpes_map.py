"""TRPESMap and StickSpectrum: immutability, tidy frame, npz/CSV round trips."""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.data.spectrum import StickSpectrum, TRPESMap
from ensemblelab.errors import ParseError, SchemaError
from ensemblelab.io.maps import load_map, save_map


def _map():
    rng = np.random.default_rng(0)
    return TRPESMap(kinetic_energies=np.linspace(0, 3, 7), delays=np.array([-10.0, 0.0, 25.5]),
                    intensity=rng.uniform(size=(3, 7)),
                    components={"S1": rng.uniform(size=(3, 7)), "S2": rng.uniform(size=(3, 7))},
                    alive=np.array([5.0, 5.0, 4.0]), alive_count=np.array([6.0, 6.0, 4.5]),
                    params={"probe": {"fwhm": 30.0}})


def test_trpes_map_arrays_are_read_only():
    m = _map()
    for arr in (m.kinetic_energies, m.delays, m.intensity, m.alive, m.alive_count,
                m.components["S1"]):
        with pytest.raises(ValueError):
            arr[0] = 1.0
    bare = m.replace(alive=None, alive_count=None)  # unknown: NaN, read-only too
    for arr in (bare.alive, bare.alive_count):
        assert np.all(np.isnan(arr))
        with pytest.raises(ValueError):
            arr[0] = 1.0


@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_trpes_map_round_trip(tmp_path, suffix):
    m = _map()
    path = save_map(m, tmp_path / f"map{suffix}")
    back = load_map(path)
    np.testing.assert_array_equal(back.intensity, m.intensity)  # repr() floats: exact
    np.testing.assert_array_equal(back.kinetic_energies, m.kinetic_energies)
    np.testing.assert_array_equal(back.delays, m.delays)
    np.testing.assert_array_equal(back.alive, m.alive)
    np.testing.assert_array_equal(back.alive_count, m.alive_count)
    assert back.params == m.params
    if suffix == ".npz":
        assert set(back.components) == {"S1", "S2"}
        np.testing.assert_array_equal(back.components["S2"], m.components["S2"])
        with np.load(path, allow_pickle=False) as z:  # written without pickles
            assert "intensity" in z.files


def test_trpes_map_to_frame_is_tidy():
    m = _map()
    df = m.to_frame()
    assert list(df.columns) == ["component", "delay", "energy", "intensity", "alive",
                                "alive_count"]
    assert len(df) == 3 * 3 * 7
    total = df[df.component == "total"].pivot(index="delay", columns="energy",
                                              values="intensity")
    np.testing.assert_array_equal(total.to_numpy(), m.intensity)


def test_trpes_map_rejects_bad_shapes(tmp_path):
    with pytest.raises(SchemaError, match="intensity must have shape"):
        TRPESMap(kinetic_energies=[0, 1], delays=[0, 1, 2], intensity=np.zeros((2, 2)))
    with pytest.raises(SchemaError, match="increase strictly"):
        TRPESMap(kinetic_energies=[1, 0], delays=[0], intensity=np.zeros((1, 2)))
    bad = tmp_path / "bad.csv"
    bad.write_text("delay_fs,0.0,1.0\n0.0,abc,1\n")
    with pytest.raises(ParseError, match="line 2"):
        load_map(bad)


def test_stick_spectrum_frame_and_checks():
    s = StickSpectrum(snapshot=[0, 1], traj=[0, 0], time=[0.0, 1.0], state=[1, 1],
                      channel=[0, 0], energy=[1.0, 1.1], weight=[0.9, 0.8])
    assert s.to_frame().shape == (2, 7)
    with pytest.raises(SchemaError, match="n_sticks=2"):
        StickSpectrum(snapshot=[0, 1], traj=[0], time=[0.0, 1.0], state=[1, 1],
                      channel=[0, 0], energy=[1.0, 1.1], weight=[0.9, 0.8])
