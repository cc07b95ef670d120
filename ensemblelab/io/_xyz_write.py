"""Writing the extended-XYZ folder layout (documented in :mod:`ensemblelab.io.xyz`)."""

from __future__ import annotations

import gzip
import io
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .._csv import to_csv_text
from ..data.elements import masses_for
from ..data.ensemble import Ensemble
from ..errors import SchemaError
from ._common import atomic_folder, dumps_json, encode_metadata
from ._extxyz_comment import ARRAY_KEYS, RESERVED, SUFFIXES
from ._xyz_props import WRITE_PROPERTIES, velocities_to_momenta

__all__ = ["write_extxyz"]


def _is_extxyz_folder(path: Path) -> bool:
    names = [p.name for p in path.iterdir()]
    return bool(names) and all(
        n.endswith(SUFFIXES) or n in ("trajectories.csv", "metadata.json") for n in names
    ) and any(n.endswith(SUFFIXES) for n in names)


def _quote(value: str, key: str) -> str:
    if '"' in value or "\n" in value:
        raise SchemaError(f"column {key!r} holds text with a quote or newline: {value[:40]!r}; "
                          "it cannot be written to an XYZ comment line.")
    return f'"{value}"' if (not value or any(c.isspace() for c in value) or "=" in value) \
        else value


def write_extxyz(
    ens: Ensemble,
    folder: str | Path,
    *,
    compress: bool = False,
    precision: int | None = None,
    overwrite: bool = False,
    progress: bool = False,
) -> Path:
    """Write `ens` in the open extended-XYZ folder layout, atomically.

    Parameters
    ----------
    ens : Ensemble
        The ensemble.
    folder : str or Path
        Target folder (created; written to a temporary folder beside it first).
    compress : bool
        Write ``traj_<id>.xyz.gz`` instead of ``traj_<id>.xyz``.
    precision : int, optional
        Significant digits of floating-point numbers; default None writes the
        shortest representation that reads back exactly.
    overwrite : bool
        Replace an existing folder written in this layout.
    progress : bool
        Show a progress bar over trajectories.

    Returns
    -------
    Path
        The folder.

    Notes
    -----
    Units in the files: fs, eV, Angstrom, Angstrom/fs. Every file states them in
    its first comment line. With velocities, every comment line declares
    ``Properties=species:S:1:pos:R:3:vel:R:3:momenta:R:3:masses:R:1``: ``vel``
    (Angstrom/fs) reads back exactly here, and readers of the common convention
    (e.g. ASE) get the velocities from ``momenta`` and ``masses``.
    ``trajectories.csv`` and ``metadata.json`` are written beside the trajectory
    files.
    """
    from tqdm.auto import tqdm

    folder = Path(folder)
    F = "%r" if precision is None else f"%.{int(precision)}g"
    frame = ens.snapshots
    extra_cols = [c for c in frame.columns if c not in ("snapshot", "traj", "step", "time",
                                                        "active")]
    for c in extra_cols:
        if c in RESERVED or not re.fullmatch(r"[A-Za-z_][\w.\-]*", c):
            raise SchemaError(f"column name {c!r} cannot be written as an XYZ comment key.")
    write_snapshot = not np.array_equal(frame["snapshot"].to_numpy(), np.arange(len(frame)))
    masses_default = np.array_equal(ens.masses, masses_for(ens.symbols)) \
        if all(_known(s) for s in ens.symbols) else False

    header = [
        "energy_unit=eV", "time_unit=fs", "length_unit=Angstrom",
        f'state_labels="{" ".join(ens.state_labels)}"',
    ]
    if ens.cation_labels:
        header.append(f'cation_labels="{" ".join(ens.cation_labels)}"')
    if ens.dyson is not None and ens.dyson.ndim == 3:
        header.append(f'dyson_shape="{ens.n_states} {ens.n_cation}"')
    if not masses_default:
        header.append('masses="' + " ".join(repr(float(m)) for m in ens.masses) + '"')
    for lab in (*ens.state_labels, *ens.cation_labels):
        if not lab or any(ch.isspace() or ch == '"' for ch in lab):
            raise SchemaError(f"state label {lab!r} cannot be written (no spaces or quotes).")

    # one template and one object table per snapshot: "%" formatting does all the work
    parts: list[str] = ["time=" + F]
    if ens.velocities is not None:  # declared in every frame, as the convention reads it
        parts.insert(0, f"Properties={WRITE_PROPERTIES}")
    blocks: list[np.ndarray] = [frame["time"].to_numpy()[:, None]]
    parts.append("step=%d")
    blocks.append(frame["step"].to_numpy()[:, None])
    if write_snapshot:
        parts.append("snapshot=%d")
        blocks.append(frame["snapshot"].to_numpy()[:, None])
    parts.append("active=%d")
    blocks.append(frame["active"].to_numpy()[:, None])
    for key in ARRAY_KEYS:
        arr = getattr(ens, key)
        if arr is None:
            continue
        flat = arr.reshape(len(frame), -1)
        parts.append(f'{key}="' + " ".join([F] * flat.shape[1]) + '"')
        blocks.append(flat)
    for c in extra_cols:
        values = frame[c].to_numpy()
        if values.dtype == bool:
            parts.append(f"{c}=%s")
            blocks.append(np.where(values, "True", "False").astype(object)[:, None])
        elif np.issubdtype(values.dtype, np.integer):
            parts.append(f"{c}=%d")
            blocks.append(values[:, None])
        elif np.issubdtype(values.dtype, np.floating):
            parts.append(f"{c}={F}")
            blocks.append(values[:, None])
        else:
            parts.append(f"{c}=%s")
            blocks.append(np.array([_quote(str(v), c) for v in values], dtype=object)[:, None])
    width = sum(b.shape[1] for b in blocks)
    table = np.empty((len(frame), width), dtype=object)
    j = 0
    for b in blocks:
        table[:, j:j + b.shape[1]] = b
        j += b.shape[1]
    comment_tpl = " ".join(parts)
    first_tpl = " ".join(header) + " " + comment_tpl
    atoms = ens.geometries
    if ens.velocities is not None:
        m = np.broadcast_to(ens.masses[None, :, None], (*atoms.shape[:2], 1))
        atoms = np.concatenate(
            [atoms, ens.velocities, velocities_to_momenta(ens.velocities, ens.masses), m],
            axis=2)
    per_atom = atoms.shape[2]
    atom_tpl = "".join(f"{s} " + " ".join([F] * per_atom) + "\n" for s in ens.symbols)
    coords = atoms.reshape(len(frame), -1)
    count_line = f"{ens.n_atoms}\n"

    traj = frame["traj"].to_numpy()
    bounds = np.r_[0, np.flatnonzero(np.diff(traj)) + 1, len(traj)]
    suffix = ".xyz.gz" if compress else ".xyz"
    with atomic_folder(folder, overwrite=overwrite, is_ours=_is_extxyz_folder,
                       kind="extended-XYZ ensemble folder") as tmp:
        for a, b in tqdm(list(zip(bounds[:-1], bounds[1:], strict=True)), desc="writing",
                         unit="traj", disable=not progress, leave=False):
            rows = table[a:b].tolist()
            xyz = coords[a:b].tolist()
            out = io.StringIO()
            for k, (row, pos) in enumerate(zip(rows, xyz, strict=True)):
                out.write(count_line)
                out.write((first_tpl if k == 0 else comment_tpl) % tuple(row))
                out.write("\n")
                out.write(atom_tpl % tuple(pos))
            data = out.getvalue().encode("utf-8")
            target = tmp / f"traj_{int(traj[a])}{suffix}"
            if compress:
                with open(target, "wb") as raw, gzip.GzipFile(
                        filename="", mode="wb", fileobj=raw, compresslevel=6, mtime=0) as gz:
                    gz.write(data)
            else:
                target.write_bytes(data)
        write_trajectories_csv(ens, tmp / "trajectories.csv")
        meta = {k: v for k, v in ens.metadata.items() if k not in ("units", "schema_version")}
        (tmp / "metadata.json").write_text(dumps_json(encode_metadata(meta)))
    return folder


def _known(symbol: str) -> bool:
    try:
        masses_for([symbol])
    except SchemaError:
        return False
    return True


def write_trajectories_csv(ens: Ensemble, path: Any) -> None:
    table = ens.trajectories.drop(columns=["n_steps", "t_end"])
    extra = {}
    if ens.excitation_energies is not None:
        for i in range(ens.excitation_energies.shape[1]):
            extra[f"exc_{i}"] = ens.excitation_energies[:, i]
    if ens.oscillator_strengths is not None:
        for i in range(ens.oscillator_strengths.shape[1]):
            extra[f"f_{i}"] = ens.oscillator_strengths[:, i]
    if ens.transition_dipoles is not None:
        for i in range(ens.transition_dipoles.shape[1]):
            for j, ax in enumerate("xyz"):
                extra[f"tdm_{i}_{ax}"] = ens.transition_dipoles[:, i, j]
    clash = set(extra) & set(table.columns)
    if clash:
        raise SchemaError(f"trajectories column(s) {sorted(clash)} clash with reserved names.")
    table = pd.concat([table, pd.DataFrame(extra, index=table.index)], axis=1)
    text = to_csv_text(table)  # formula-like text cells neutralised (ensemblelab._csv)
    if hasattr(path, "write"):
        path.write(text)
    else:
        Path(path).write_text(text, encoding="utf-8")
