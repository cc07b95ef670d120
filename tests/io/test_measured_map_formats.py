"""Measured maps with an uncertainty, from CSV, NPZ, HDF5 and NetCDF: round trips and errors.

The maps are invented random arrays; each check compares what was written by the
reference writer (plain text, numpy, h5py, xarray) with what load_measured_map returns
(computed independently (not published)).
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.errors import ParseError, SchemaError
from ensemblelab.io.maps import load_map, load_measured_map, save_map

E = np.array([0.25, 0.5, 1.0, 1.5])
D = np.array([-20.0, 0.0, 10.0, 50.0, 120.0])
RNG = np.random.default_rng(5)
INTEN = RNG.uniform(0, 2, size=(D.size, E.size))
SIGMA = RNG.uniform(0.01, 0.1, size=(D.size, E.size))


def _grid_text(values: np.ndarray) -> str:
    lines = ["# invented test map", "delay_fs," + ",".join(repr(float(e)) for e in E)]
    lines += [repr(float(d)) + "," + ",".join(repr(float(v)) for v in row)
              for d, row in zip(D, values, strict=True)]
    return "\n".join(lines) + "\n"


def _check(m: TRPESMap, *, unc: bool = True) -> None:
    np.testing.assert_array_equal(m.kinetic_energies, E)
    np.testing.assert_array_equal(m.delays, D)
    np.testing.assert_array_equal(m.intensity, INTEN)
    if unc:
        assert m.uncertainty is not None
        np.testing.assert_array_equal(m.uncertainty, SIGMA)
    else:
        assert m.uncertainty is None


def test_csv_with_uncertainty_file(tmp_path):
    (tmp_path / "m.csv").write_text(_grid_text(INTEN))
    (tmp_path / "s.csv").write_text(_grid_text(SIGMA))
    _check(load_measured_map(tmp_path / "m.csv", uncertainty=tmp_path / "s.csv"))
    _check(load_measured_map(tmp_path / "m.csv"), unc=False)
    # an uncertainty on another grid is refused, naming the file and the field
    (tmp_path / "s2.csv").write_text(_grid_text(SIGMA).replace("0.25,", "0.3,", 1))
    with pytest.raises(ParseError, match=r"s2\.csv.*uncertainty.*Hint"):
        load_measured_map(tmp_path / "m.csv", uncertainty=tmp_path / "s2.csv")


def test_npz_round_trip_and_transposed_uncertainty(tmp_path):
    np.savez(tmp_path / "m.npz", kinetic_energies=E, delays=D, intensity=INTEN,
             sigma=SIGMA.T)
    m = load_measured_map(tmp_path / "m.npz")
    _check(m)
    assert m.params["format"] == "npz"
    np.savez(tmp_path / "bad.npz", kinetic_energies=E, delays=D, intensity=INTEN,
             uncertainty=SIGMA[:, :2])
    with pytest.raises(ParseError, match=r"bad\.npz.*uncertainty.*shape"):
        load_measured_map(tmp_path / "bad.npz")
    np.savez(tmp_path / "neg.npz", kinetic_energies=E, delays=D, intensity=INTEN,
             uncertainty=-SIGMA)
    with pytest.raises(ParseError, match="uncertainty.*>= 0"):
        load_measured_map(tmp_path / "neg.npz")


def test_hdf5_round_trip_root_and_group(tmp_path):
    h5py = pytest.importorskip("h5py")
    with h5py.File(tmp_path / "m.h5", "w") as f:
        f["energy"] = E
        f["delay"] = D
        f["intensity"] = INTEN
        f["uncertainty"] = SIGMA
        g = f.create_group("scan2")
        g["kinetic_energies"] = E
        g["delays"] = D
        g["signal"] = INTEN.T  # (energies, delays): transposed back
    _check(load_measured_map(tmp_path / "m.h5"))
    _check(load_measured_map(tmp_path / "m.h5", group="scan2"), unc=False)
    with pytest.raises(ParseError, match=r"m\.h5.*no group 'scan3'.*Hint"):
        load_measured_map(tmp_path / "m.h5", group="scan3")
    with h5py.File(tmp_path / "noint.hdf5", "w") as f:
        f["energy"] = E
        f["delay"] = D
    with pytest.raises(ParseError, match=r"noint\.hdf5.*field 'intensity'|intensity.*noint"):
        load_measured_map(tmp_path / "noint.hdf5")


def test_netcdf_round_trip_with_units_attribute(tmp_path):
    xr = pytest.importorskip("xarray")
    ds = xr.Dataset(
        {"intensity": (("kinetic_energy", "delay"), INTEN.T),
         "uncertainty": (("delay", "kinetic_energy"), SIGMA)},
        coords={"kinetic_energy": E, "delay": D / 1000.0})
    ds["delay"].attrs["units"] = "ps"  # converted to fs (1 ps = 1000 fs, common practice)
    ds.to_netcdf(tmp_path / "m.nc", engine="scipy")
    m = load_measured_map(tmp_path / "m.nc")
    np.testing.assert_allclose(m.delays, D)
    np.testing.assert_array_equal(m.intensity, INTEN)
    np.testing.assert_array_equal(m.uncertainty, SIGMA)
    assert m.params["format"] == "netcdf"
    # an explicit unit wins over the attribute
    m_fs = load_measured_map(tmp_path / "m.nc", time_unit="fs")
    np.testing.assert_allclose(m_fs.delays, D / 1000.0)
    xr.Dataset({"intensity": (("x", "y"), INTEN)}).to_netcdf(tmp_path / "dims.nc",
                                                            engine="scipy")
    with pytest.raises(ParseError, match=r"dims\.nc.*intensity.*dimensions"):
        load_measured_map(tmp_path / "dims.nc")


def test_format_errors_name_the_file(tmp_path):
    (tmp_path / "m.npz").write_bytes(b"not a zip")
    with pytest.raises(ParseError, match=r"m\.npz"):
        load_measured_map(tmp_path / "m.npz")
    (tmp_path / "m.csv").write_text(_grid_text(INTEN))
    with pytest.raises(ParseError, match="unknown measured-map format"):
        load_measured_map(tmp_path / "m.csv", format="xlsx")
    np.savez(tmp_path / "u.npz", kinetic_energies=E, delays=D, intensity=INTEN)
    with pytest.raises(ParseError, match="uncertainty=.*CSV"):
        load_measured_map(tmp_path / "u.npz", uncertainty=tmp_path / "m.csv")


def test_save_map_keeps_the_uncertainty(tmp_path):
    m = TRPESMap(kinetic_energies=E, delays=D, intensity=INTEN, uncertainty=SIGMA)
    back = load_map(save_map(m, tmp_path / "m.npz"))
    np.testing.assert_array_equal(back.uncertainty, SIGMA)
    with pytest.raises(SchemaError, match="uncertainty"):
        TRPESMap(kinetic_energies=E, delays=D, intensity=INTEN, uncertainty=SIGMA[:2])
