"""Export selected structures: multi-frame XYZ / extended XYZ (own writer), PDB (via ASE).

Every writer is atomic (temporary file in the target folder, then ``os.replace``)
and refuses to overwrite an existing file unless ``overwrite=True``.
:func:`write_structures` also writes a CSV table of what was exported (one row
per frame, same order) next to the structure file.

Comment / info conventions (our own): every frame carries ``key=value`` pairs from
its row of `info` (for example ``cluster``, ``weight``, ``snapshot``, ``traj``,
``time`` in fs). In extended XYZ they are in the comment line after
``Properties=species:S:1:pos:R:3``; string values are double-quoted. In PDB they
are ``REMARK 250`` lines after each ``MODEL`` record.
"""

from __future__ import annotations

import io
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd

from .._atomic import atomic_write_text
from .._csv import to_csv_text
from .._optional import import_optional
from ..errors import SchemaError

__all__ = ["write_xyz", "write_pdb", "write_structures", "write_representatives"]


def _check(geometries: npt.ArrayLike, symbols: Sequence[str], info: pd.DataFrame | None
           ) -> tuple[np.ndarray, list[str], pd.DataFrame]:
    X = np.asarray(geometries, dtype=np.float64)
    if X.ndim == 2:
        X = X[None]
    if X.ndim != 3 or X.shape[2] != 3:
        raise SchemaError(f"geometries must have shape (n_frames, n_atoms, 3); got {X.shape}.")
    sym = [str(s) for s in symbols]
    if len(sym) != X.shape[1]:
        raise SchemaError(f"symbols must have n_atoms={X.shape[1]} entries; got {len(sym)}.")
    if not np.all(np.isfinite(X)):
        raise SchemaError("geometries hold non-finite coordinates; cannot export them.")
    table = pd.DataFrame(index=range(len(X))) if info is None else info.reset_index(drop=True)
    if len(table) != len(X):
        raise SchemaError(f"info must have one row per frame ({len(X)}); got {len(table)}.")
    return X, sym, table


def _value(v: object, *, quote: bool) -> str:
    if isinstance(v, (bool, np.bool_)):
        return "T" if v else "F"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return repr(float(v))
    s = str(v).replace('"', "'").replace("\n", " ")
    return f'"{s}"' if quote else s


def _key(k: object) -> str:
    key = "".join(ch if ch.isalnum() or ch == "_" else "_" for ch in str(k))
    return key or "key"


def write_xyz(
    path: str | os.PathLike[str],
    geometries: npt.ArrayLike,
    symbols: Sequence[str],
    *,
    info: pd.DataFrame | None = None,
    extended: bool = False,
    precision: int = 8,
    overwrite: bool = False,
) -> Path:
    """Write frames as multi-frame XYZ (plain or extended).

    Parameters
    ----------
    path : path-like
        Output file.
    geometries : array_like, shape (n_frames, n_atoms, 3)
        Coordinates in Angstrom.
    symbols : sequence of str, length n_atoms
    info : DataFrame, optional
        One row per frame; its columns become ``key=value`` pairs in each comment.
    extended : bool
        Extended XYZ comment line (``Properties=species:S:1:pos:R:3`` plus quoted
        values), readable by ASE; plain XYZ otherwise.
    precision : int
        Decimals of the coordinates.
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    Path

    Examples
    --------
    >>> import numpy as np, pandas as pd, tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "h2.xyz"
    >>> p = write_xyz(out, np.array([[[0, 0, 0], [0.74, 0, 0]]]), ["H", "H"],
    ...               info=pd.DataFrame({"cluster": ["S1:0"], "weight": [0.5]}))
    >>> p.read_text().splitlines()[1]
    'cluster=S1:0 weight=0.5'
    """
    X, sym, table = _check(geometries, symbols, info)
    buf = io.StringIO()
    width = precision + 6
    for f in range(len(X)):
        row = table.iloc[f] if len(table.columns) else pd.Series(dtype=object)
        pairs = [f"{_key(k)}={_value(v, quote=extended)}" for k, v in row.items()]
        if extended:
            pairs = ["Properties=species:S:1:pos:R:3", *pairs, 'pbc="F F F"']
        buf.write(f"{X.shape[1]}\n{' '.join(pairs)}\n")
        for s, (x, y, z) in zip(sym, X[f], strict=True):
            buf.write(f"{s:<3s} {x:{width}.{precision}f} {y:{width}.{precision}f} "
                      f"{z:{width}.{precision}f}\n")
    return atomic_write_text(Path(path), buf.getvalue(), overwrite=overwrite)


def write_pdb(
    path: str | os.PathLike[str],
    geometries: npt.ArrayLike,
    symbols: Sequence[str],
    *,
    info: pd.DataFrame | None = None,
    overwrite: bool = False,
) -> Path:
    """Write frames as a multi-model PDB file via ASE (extra ``structures``).

    Each ``MODEL`` record is followed by ``REMARK 250 key=value ...`` with the
    frame's row of `info`.

    Parameters
    ----------
    path : path-like
    geometries : array_like, shape (n_frames, n_atoms, 3)
        Coordinates in Angstrom.
    symbols : sequence of str
    info : DataFrame, optional
        One row per frame.
    overwrite : bool

    Returns
    -------
    Path

    Raises
    ------
    MissingDependencyError
        When ASE is not installed.
    """
    X, sym, table = _check(geometries, symbols, info)
    ase = import_optional("ase", extra="structures", purpose="PDB export")
    ase_io = import_optional("ase.io", extra="structures", purpose="PDB export")
    frames = [ase.Atoms(symbols=sym, positions=X[f]) for f in range(len(X))]
    buf = io.StringIO()
    ase_io.write(buf, frames, format="proteindatabank")
    lines = buf.getvalue().splitlines()
    out: list[str] = []
    model = 0
    for line in lines:
        out.append(line)
        if line.startswith("MODEL") and model < len(X):
            row = table.iloc[model] if len(table.columns) else pd.Series(dtype=object)
            text = " ".join(f"{_key(k)}={_value(v, quote=False)}" for k, v in row.items())
            for s in range(0, max(len(text), 1), 68):
                chunk = text[s:s + 68]
                if chunk:
                    out.append(f"REMARK 250 {chunk}")
            model += 1
    return atomic_write_text(Path(path), "\n".join(out) + "\n", overwrite=overwrite)


def write_structures(
    path: str | os.PathLike[str],
    geometries: npt.ArrayLike,
    symbols: Sequence[str],
    info: pd.DataFrame,
    *,
    format: Literal["xyz", "extxyz", "pdb"] | None = None,
    overwrite: bool = False,
) -> tuple[Path, Path]:
    """Write the structures and a CSV of what was exported (``<stem>.csv`` beside them).

    Parameters
    ----------
    path : path-like
        Structure file; the format follows the suffix (.xyz -> extended XYZ,
        .pdb -> PDB) unless `format` is given.
    geometries : array_like, shape (n_frames, n_atoms, 3)
    symbols : sequence of str
    info : DataFrame
        One row per frame (e.g. group, cluster, snapshot, traj, time, weight).
    format : {"xyz", "extxyz", "pdb"}, optional
    overwrite : bool

    Returns
    -------
    (structure_path, csv_path)
    """
    path = Path(path)
    fmt = format or {".pdb": "pdb", ".xyz": "extxyz", ".extxyz": "extxyz"}.get(
        path.suffix.lower())
    if fmt not in ("xyz", "extxyz", "pdb"):
        raise SchemaError(f"cannot tell the structure format from {path.name!r}; pass format="
                          "'xyz', 'extxyz' or 'pdb'.")
    csv_path = path.with_suffix(".csv")
    if csv_path == path:
        raise SchemaError("the structure file must not end in .csv.")
    if csv_path.exists() and not overwrite:
        raise FileExistsError(f"{csv_path} exists; pass overwrite=True to replace it.")
    if fmt == "pdb":
        out = write_pdb(path, geometries, symbols, info=info, overwrite=overwrite)
    else:
        out = write_xyz(path, geometries, symbols, info=info, extended=fmt == "extxyz",
                        overwrite=overwrite)
    table = info.reset_index(drop=True).copy()
    table.insert(0, "frame", np.arange(len(table)))
    table["file"] = out.name
    atomic_write_text(csv_path, to_csv_text(table), overwrite=overwrite)
    return out, csv_path


def write_representatives(reps: Any, path: str | os.PathLike[str], *,
                          format: Literal["xyz", "extxyz", "pdb"] | None = None,
                          overwrite: bool = False) -> tuple[Path, Path]:
    """Export representative structures as multi-frame (extended) XYZ or PDB plus a CSV.

    Parameters
    ----------
    reps : Representatives
        From :func:`~ensemblelab.cluster_representatives` (or the band and time-window
        variants): ``table``, ``geometries`` (n, n_atoms, 3) in Angstrom, ``symbols``.
    path : path
        The structure file; its suffix picks the format unless `format` is given.
    format : {"xyz", "extxyz", "pdb"}, optional
    overwrite : bool
        Replace an existing file this tool wrote.

    Returns
    -------
    (structure_path, csv_path)
        The group (cluster), kind, weight, snapshot, trajectory, time and active state of
        each structure go into its comment line (XYZ) or REMARK record (PDB) and the CSV.
    """
    cols = ["group", "kind", "weight", "snapshot", "traj", "time", "active", "size"]
    info = reps.table[[c for c in cols if c in reps.table.columns]]
    return write_structures(path, reps.geometries, reps.symbols, info, format=format,
                            overwrite=overwrite)
