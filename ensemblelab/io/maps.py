"""TRPES map files: save and load simulated maps, load measured ones (CSV, NPZ, HDF5, NetCDF).

:func:`save_map` / :func:`load_map` write and read a :class:`TRPESMap` with everything
(NPZ) or its total (CSV); :func:`load_measured_map` reads a measured map, with an
optional uncertainty (one standard deviation per pixel), in the looser layouts below.

CSV grid layout (comma, semicolon, tab or whitespace separated; ``#`` comments):

* first row: a corner cell (any label, e.g. ``delay_fs``, or empty), then the
  photoelectron kinetic energies;
* every further row: the delay, then one intensity per energy.

The uncertainty of a CSV map is a second file in the same layout, on the same grid
(``uncertainty="sigma.csv"``).

NPZ (``.npz``) and HDF5 (``.h5``, ``.hdf5``; needs h5py, extra ``maps``): arrays
(datasets, at the root or in ``group``) named ``kinetic_energies`` (or ``energies``,
``energy``), ``delays`` (or ``delay``), ``intensity`` (or ``signal``) and optionally
``uncertainty`` (or ``sigma``, ``error``, ``std``), the 2-D arrays shaped (n_delays,
n_energies) or (n_energies, n_delays) (transposed automatically when unambiguous).
NPZ is read with ``allow_pickle=False``.

NetCDF (``.nc``, ``.nc4``, ``.cdf``; read with xarray): a 2-D data variable
``intensity`` (or ``signal``, or the only 2-D variable) over a delay dimension
(``delay``, ``delays``, ``time``) and an energy dimension (``kinetic_energy``,
``kinetic_energies``, ``energy``, ``energies``) in either order, optionally an
``uncertainty`` variable on the same dimensions. A coordinate's ``units`` attribute
is used when no unit is passed. NetCDF-3 files need only scipy; NetCDF-4 files need
the h5netcdf or netCDF4 package.

Rows/columns are sorted into increasing order; the input file is never modified.
"""

from __future__ import annotations

import io as _io
import json
import os
import re
from pathlib import Path
from typing import Any

import numpy as np

from .._atomic import atomic_write_bytes
from .._optional import import_optional
from ..data.spectrum import TRPESMap
from ..errors import ParseError
from ..units import energy_factor, time_factor

__all__ = ["load_measured_map", "save_map", "load_map", "TRPES_FORMAT", "MEASURED_SUFFIXES"]

#: tag written into saved maps (npz key ``format`` / first CSV comment line)
TRPES_FORMAT = "ensemblelab-trpes-map-v1"

#: file suffix -> measured-map format
MEASURED_SUFFIXES = {".csv": "csv", ".txt": "csv", ".dat": "csv", ".npz": "npz", ".h5": "hdf5",
                     ".hdf5": "hdf5", ".hdf": "hdf5", ".nc": "netcdf", ".nc4": "netcdf",
                     ".cdf": "netcdf"}

_SPLIT = re.compile(r"[,;\t ]+")
_E_NAMES = ("kinetic_energies", "energies", "energy", "kinetic_energy")
_D_NAMES = ("delays", "delay", "time")
_I_NAMES = ("intensity", "signal")
_U_NAMES = ("uncertainty", "sigma", "error", "std")


def _load_csv(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    header: list[float] | None = None
    delays: list[float] = []
    rows: list[list[float]] = []
    with open(path, encoding="utf-8-sig") as fh:
        for lineno, line in enumerate(fh, start=1):
            s = line.strip()
            if not s or s.startswith("#"):
                continue
            cells = [c for c in _SPLIT.split(s)]
            if header is None:
                rest = cells[1:] if len(cells) > 1 else []
                try:
                    header = [float(c) for c in rest]
                except ValueError as exc:
                    raise ParseError(
                        f"the first row must hold the kinetic energies after a corner cell; "
                        f"found a non-numeric cell ({exc})", path=path, line=lineno,
                        hint="first row: label, E1, E2, ...; then one row per delay.") from exc
                if not header:
                    raise ParseError("the first row holds no kinetic energies", path=path,
                                     line=lineno)
                continue
            if len(cells) != len(header) + 1:
                raise ParseError(
                    f"expected {len(header) + 1} cells (delay + {len(header)} intensities); "
                    f"found {len(cells)}", path=path, line=lineno)
            try:
                vals = [float(c) for c in cells]
            except ValueError as exc:
                raise ParseError(f"non-numeric cell ({exc})", path=path, line=lineno) from exc
            delays.append(vals[0])
            rows.append(vals[1:])
    if header is None or not rows:
        raise ParseError("no map found (need a header row of energies and at least one row)",
                         path=path)
    return np.array(header), np.array(delays), np.array(rows)


def _orient(arr: np.ndarray, e: np.ndarray, d: np.ndarray, path: Path, name: str
            ) -> np.ndarray:
    """`arr` as (n_delays, n_energies), transposing when the shape says so."""
    if arr.shape == (d.size, e.size):
        return arr
    if arr.shape == (e.size, d.size):
        return arr.T
    raise ParseError(f"{name} has shape {arr.shape}; expected (n_delays, n_energies) = "
                     f"{(d.size, e.size)}", path=path, field=name,
                     hint="store the map as (delays, energies) with matching axis arrays.")


def _from_arrays(data: dict[str, Any], path: Path, where: str
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    def pick(names: tuple[str, ...], required: bool = True) -> np.ndarray | None:
        for n in names:
            if n in data:
                try:
                    return np.asarray(data[n], dtype=float)
                except (TypeError, ValueError) as exc:
                    raise ParseError(f"array {n!r} is not numeric ({exc})", path=path,
                                     field=n) from exc
        if not required:
            return None
        raise ParseError(f"missing array {names[0]!r} (or {list(names[1:])}) {where}; found "
                         f"{sorted(data)}", path=path, field=names[0],
                         hint=f"name the arrays {_E_NAMES[0]!r}, {_D_NAMES[0]!r}, "
                              f"{_I_NAMES[0]!r} (and optionally {_U_NAMES[0]!r}).")

    e, d, inten = pick(_E_NAMES), pick(_D_NAMES), pick(_I_NAMES)
    assert e is not None and d is not None and inten is not None
    e, d = e.ravel(), d.ravel()
    unc = pick(_U_NAMES, required=False)
    inten = _orient(inten, e, d, path, "intensity")
    if unc is not None:
        unc = _orient(unc, e, d, path, "uncertainty")
    return e, d, inten, unc


def _load_npz(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise ParseError(f"not a readable npz file without pickles ({exc})", path=path) from exc
    return _from_arrays(data, path, "in the npz file")


def _load_hdf5(path: Path, group: str | None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    h5py = import_optional("h5py", extra="maps", purpose="reading HDF5 maps")
    try:
        with h5py.File(path, "r") as f:
            g = f if group is None else f.get(group)
            if g is None or not hasattr(g, "keys"):
                raise ParseError(f"no group {group!r}; groups at the root: "
                                 f"{[k for k in f if hasattr(f[k], 'keys')]}", path=path,
                                 field=group, hint="pass group= naming the map's group.")
            data = {k: g[k][()] for k in g.keys() if isinstance(g[k], h5py.Dataset)}
    except OSError as exc:
        raise ParseError(f"not a readable HDF5 file ({exc})", path=path) from exc
    where = "at the root" if group is None else f"in group {group!r}"
    return _from_arrays(data, path, where)


def _load_netcdf(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None,
                                      dict[str, str]]:
    xr = import_optional("xarray", extra="maps", purpose="reading NetCDF maps")
    try:
        ds = xr.open_dataset(path)
    except (OSError, ValueError) as exc:
        raise ParseError(f"not a readable NetCDF file ({exc})", path=path,
                         hint="NetCDF-4 (HDF5-based) files need the h5netcdf or netCDF4 "
                              "package; NetCDF-3 files need scipy.") from exc
    with ds:
        two_d = [str(k) for k, v in ds.data_vars.items() if v.ndim == 2]
        name = next((n for n in _I_NAMES if n in ds.data_vars), None)
        if name is None and len(two_d) == 1:
            name = two_d[0]
        if name is None:
            raise ParseError(f"no 2-D intensity variable; 2-D variables: {two_d}", path=path,
                             field="intensity",
                             hint="name the map variable 'intensity' (dims: delay, energy).")
        var = ds[name]
        dims = [str(x) for x in var.dims]
        d_dim = next((x for x in dims if x in _D_NAMES), None)
        e_dim = next((x for x in dims if x in _E_NAMES), None)
        if d_dim is None or e_dim is None:
            raise ParseError(f"variable {name!r} has dimensions {dims}; expected a delay "
                             f"dimension {list(_D_NAMES)} and an energy dimension "
                             f"{list(_E_NAMES)}", path=path, field=name)
        e = np.asarray(ds[e_dim].values, float)
        d = np.asarray(ds[d_dim].values, float)
        inten = np.asarray(var.transpose(d_dim, e_dim).values, float)
        unc = None
        uname = next((n for n in _U_NAMES if n in ds.data_vars), None)
        if uname is not None:
            uvar = ds[uname]
            if sorted(str(x) for x in uvar.dims) != sorted([d_dim, e_dim]):
                raise ParseError(f"uncertainty variable {uname!r} has dimensions "
                                 f"{list(uvar.dims)}; expected ({d_dim}, {e_dim})", path=path,
                                 field=uname)
            unc = np.asarray(uvar.transpose(d_dim, e_dim).values, float)
        units = {"energy": str(ds[e_dim].attrs.get("units", "")),
                 "time": str(ds[d_dim].attrs.get("units", ""))}
    return e, d, inten, unc, units


def load_measured_map(path: str | os.PathLike[str], *, energy_unit: str | None = None,
                      time_unit: str | None = None,
                      uncertainty: str | os.PathLike[str] | None = None,
                      format: str | None = None, group: str | None = None) -> TRPESMap:
    """Load a measured TRPES map (and its uncertainty, when the file has one).

    Parameters
    ----------
    path : path-like
        ``.csv`` / ``.txt`` / ``.dat`` grid, ``.npz``, ``.h5`` / ``.hdf5`` or ``.nc``
        file (see the module docstring for the layouts).
    energy_unit, time_unit : str, optional
        Units of the file's kinetic energies and delays (converted to eV and fs).
        Default: a NetCDF coordinate's ``units`` attribute when it names a known
        unit, else eV and fs.
    uncertainty : path-like, optional
        For a CSV map: a second CSV grid (same energies and delays) holding one
        standard deviation per pixel.
    format : {"csv", "npz", "hdf5", "netcdf"}, optional
        Overrides the format taken from the suffix.
    group : str, optional
        HDF5 group holding the arrays (default the root).

    Returns
    -------
    TRPESMap
        ``uncertainty`` set when the file (or `uncertainty`) has one; ``params``
        records the source file name, the format and ``"measured": True``.

    Raises
    ------
    ParseError
        Naming the file, the line or field and a hint when the layout is wrong.
    MissingDependencyError
        When h5py (HDF5) or xarray (NetCDF) is not installed.
    """
    path = Path(path)
    if not path.is_file():
        raise ParseError("file not found", path=path)
    fmt = format or MEASURED_SUFFIXES.get(path.suffix.lower(), "csv")
    if fmt not in ("csv", "npz", "hdf5", "netcdf"):
        raise ParseError(f"unknown measured-map format {fmt!r}", path=path,
                         hint="format must be 'csv', 'npz', 'hdf5' or 'netcdf'.")
    if uncertainty is not None and fmt != "csv":
        raise ParseError("uncertainty= (a second file) is for CSV maps; store the "
                         "uncertainty array in the same file", path=path, field="uncertainty",
                         hint=f"name it {_U_NAMES[0]!r} beside the intensity.")
    units = {"energy": "", "time": ""}
    unc: np.ndarray | None = None
    if fmt == "npz":
        e, d, inten, unc = _load_npz(path)
    elif fmt == "hdf5":
        e, d, inten, unc = _load_hdf5(path, group)
    elif fmt == "netcdf":
        e, d, inten, unc, units = _load_netcdf(path)
    else:
        e, d, inten = _load_csv(path)
        if uncertainty is not None:
            upath = Path(uncertainty)
            if not upath.is_file():
                raise ParseError("uncertainty file not found", path=upath)
            ue, ud, unc = _load_csv(upath)
            if ue.shape != e.shape or ud.shape != d.shape or not (
                    np.allclose(ue, e) and np.allclose(ud, d)):
                raise ParseError("the uncertainty grid's energies/delays differ from the map's "
                                 f"({path.name})", path=upath, field="uncertainty",
                                 hint="write the uncertainty on the same grid as the map.")
    e = e * energy_factor(_unit(energy_unit, units["energy"], "eV", energy_factor))
    d = d * time_factor(_unit(time_unit, units["time"], "fs", time_factor))
    if not (np.all(np.isfinite(e)) and np.all(np.isfinite(d))):
        raise ParseError("energies and delays must be finite", path=path)
    oe, od = np.argsort(e, kind="stable"), np.argsort(d, kind="stable")
    e, d, inten = e[oe], d[od], inten[np.ix_(od, oe)]
    for name, arr in (("energies", e), ("delays", d)):
        if np.any(np.diff(arr) == 0):
            raise ParseError(f"duplicated {name}", path=path, field=name)
    if not np.all(np.isfinite(inten)):
        raise ParseError("intensities must be finite (no NaN/Inf)", path=path, field="intensity",
                         hint="fill or crop missing cells before loading")
    if unc is not None:
        unc = unc[np.ix_(od, oe)]
        if np.any(unc < 0):
            raise ParseError("uncertainties must be >= 0 (one standard deviation; NaN marks an "
                             "unknown pixel)", path=path, field="uncertainty")
    return TRPESMap(kinetic_energies=e, delays=d, intensity=inten, uncertainty=unc,
                    params={"measured": True, "source": path.name, "format": fmt})


def _unit(given: str | None, attr: str, default: str, check: Any) -> str:
    """The unit to use: the caller's, else a recognised file attribute, else the default."""
    if given is not None:
        return given
    if attr:
        try:
            check(attr)
            return attr
        except (KeyError, ValueError):
            pass
    return default


def save_map(trpes_map: TRPESMap, path: str | os.PathLike[str], *,
             overwrite: bool = False) -> Path:
    """Write a map atomically as ``.npz`` (everything) or ``.csv`` (total only).

    NPZ keys: ``format``, ``kinetic_energies``, ``delays``, ``intensity``, ``alive``,
    ``alive_count``, ``component_labels`` (unicode array), ``components``
    (n_components, n_delays, n_energies), ``params`` (a JSON string) and, when the map
    has one, ``uncertainty``; a map with an interval adds ``lower``, ``upper``, ``rel_se``
    (n_delays, n_energies) and ``component_lower``, ``component_upper`` (n_components,
    n_delays, n_energies). The CSV holds the total only (no uncertainty, no interval).
    Written without pickles, read back with ``allow_pickle=False``.

    CSV (the total only; intervals are kept in NPZ files): comment lines
    ``# ensemblelab-trpes-map-v1``, ``# params: {json}``, ``# alive: v1,v2,...``,
    ``# alive_count: n1,n2,...``; then a grid whose first row is ``delay_fs`` followed
    by the kinetic energies (eV) and whose first column holds the delays (fs). The same
    grid layout is read by :func:`load_measured_map`.

    Parameters
    ----------
    trpes_map : TRPESMap
        The map.
    path : path-like
        Target file; the suffix (``.npz`` or ``.csv``) picks the format.
    overwrite : bool, default False
        Replace an existing file (never done unless asked).

    Returns
    -------
    Path
        The written file.
    """
    m = trpes_map
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".npz", ".csv"):
        raise ValueError(f"path must end in .npz or .csv; got {path.name!r}.")
    if path.exists() and not overwrite:
        raise FileExistsError(f"{path} exists; pass overwrite=True to replace it.")
    assert m.alive is not None and m.alive_count is not None  # set in __post_init__
    if suffix == ".npz":
        labels = list(m.components)
        comps = (np.stack([m.components[k] for k in labels]) if labels
                 else np.zeros((0, *m.shape)))
        buf = _io.BytesIO()
        arrays: dict[str, np.ndarray] = {
            "format": np.array(TRPES_FORMAT), "kinetic_energies": m.kinetic_energies,
            "delays": m.delays, "intensity": m.intensity, "alive": m.alive,
            "alive_count": m.alive_count, "component_labels": np.array(labels, dtype=np.str_),
            "components": comps, "params": np.array(json.dumps(m.params))}
        arrays.update(_interval_arrays(m, labels))
        if m.uncertainty is not None:
            arrays["uncertainty"] = m.uncertainty
        np.savez_compressed(buf, **arrays)  # type: ignore[arg-type]
        atomic_write_bytes(path, buf.getvalue())
        return path
    lines = [
        f"# {TRPES_FORMAT}",
        f"# params: {json.dumps(m.params)}",
        "# alive: " + ",".join(repr(float(a)) for a in m.alive),
        "# alive_count: " + ",".join(repr(float(a)) for a in m.alive_count),
        "delay_fs," + ",".join(repr(float(e)) for e in m.kinetic_energies),
    ]
    for d, row in zip(m.delays, m.intensity, strict=True):
        lines.append(repr(float(d)) + "," + ",".join(repr(float(v)) for v in row))
    atomic_write_bytes(path, ("\n".join(lines) + "\n").encode())
    return path


def _interval_arrays(m: TRPESMap, labels: list[str]) -> dict[str, np.ndarray]:
    """NPZ arrays of a map's interval (none without one)."""
    out = {k: getattr(m, k) for k in ("lower", "upper", "rel_se") if getattr(m, k) is not None}
    for name in ("component_lower", "component_upper"):
        d = getattr(m, name)
        if d:
            out[name] = np.stack([d[k] for k in labels])
    return out


def _intervals_from(data: dict[str, np.ndarray], labels: list[str]) -> dict[str, Any]:
    """TRPESMap keywords of the interval arrays of a saved map."""
    out: dict[str, Any] = {k: data[k] for k in ("lower", "upper", "rel_se") if k in data}
    for name in ("component_lower", "component_upper"):
        if name in data and len(data[name]) == len(labels):
            out[name] = {lab: data[name][i] for i, lab in enumerate(labels)}
    return out


def load_map(path: str | os.PathLike[str]) -> TRPESMap:
    """Read a map written by :func:`save_map` (``.npz`` or ``.csv``).

    Files written before the kinetic-energy axis was named ``kinetic_energies`` (NPZ key
    ``energies``) are read too.

    Parameters
    ----------
    path : path-like
        The file.

    Returns
    -------
    TRPESMap

    Raises
    ------
    ParseError
        When the file is not a saved TRPES map.
    """
    path = Path(path)
    if path.suffix.lower() == ".npz":
        try:
            with np.load(path, allow_pickle=False) as z:
                data = {k: z[k] for k in z.files}
        except (OSError, ValueError) as exc:
            raise ParseError(f"not a readable npz file ({exc})", path=path) from exc
        if "kinetic_energies" not in data and "energies" in data:
            data["kinetic_energies"] = data["energies"]
        need = ("kinetic_energies", "delays", "intensity")
        missing = [k for k in need if k not in data]
        if missing:
            raise ParseError(f"missing array(s) {missing}; found {sorted(data)}", path=path,
                             hint="save maps with ensemblelab.io.maps.save_map(...).")
        labels = [str(x) for x in data.get("component_labels", np.array([], dtype=str))]
        comps = data.get("components", np.zeros((0,)))
        params: dict[str, Any] = (json.loads(str(data["params"])) if "params" in data
                                  else {})
        return TRPESMap(kinetic_energies=data["kinetic_energies"], delays=data["delays"],
                        intensity=data["intensity"],
                        components={lab: comps[i] for i, lab in enumerate(labels)},
                        alive=data.get("alive"), alive_count=data.get("alive_count"),
                        params=params, uncertainty=data.get("uncertainty"),
                        **_intervals_from(data, labels))
    text = path.read_text()
    params = {}
    alive = count = None
    rows: list[list[float]] = []
    header: list[float] | None = None
    for lineno, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            body = s[1:].strip()
            if body.startswith("params:"):
                params = json.loads(body[len("params:"):])
            elif body.startswith("alive:"):
                alive = [float(x) for x in body[len("alive:"):].split(",") if x.strip()]
            elif body.startswith("alive_count:"):
                count = [float(x) for x in body[len("alive_count:"):].split(",") if x.strip()]
            continue
        cells = s.split(",")
        try:
            if header is None:
                header = [float(x) for x in cells[1:]]
            else:
                rows.append([float(x) for x in cells])
        except ValueError as exc:
            raise ParseError(f"non-numeric cell ({exc})", path=path, line=lineno) from exc
    if header is None or not rows:
        raise ParseError("no grid found", path=path, hint="expected a header row of energies")
    grid = np.array(rows)
    return TRPESMap(kinetic_energies=np.array(header), delays=grid[:, 0], intensity=grid[:, 1:],
                    alive=None if alive is None else np.array(alive),
                    alive_count=None if count is None else np.array(count), params=params)
