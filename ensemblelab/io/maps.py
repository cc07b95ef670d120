"""TRPES map files: save and load simulated maps, load measured ones (CSV grid or NPZ).

:func:`save_map` / :func:`load_map` write and read a :class:`TRPESMap` with everything
(NPZ) or its total (CSV); :func:`load_measured_map` reads a measured map in the looser
layout below.

CSV grid layout (comma, semicolon, tab or whitespace separated; ``#`` comments):

* first row: a corner cell (any label, e.g. ``delay_fs``, or empty), then the
  photoelectron kinetic energies;
* every further row: the delay, then one intensity per energy.

NPZ: arrays named ``kinetic_energies`` (or ``energies``, ``energy``), ``delays`` (or ``delay``) and
``intensity`` (or ``signal``), with ``intensity`` shaped (n_delays, n_energies) or
(n_energies, n_delays) (transposed automatically when unambiguous). Read with
``allow_pickle=False``.

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
from ..data.spectrum import TRPESMap
from ..errors import ParseError
from ..units import energy_factor, time_factor

__all__ = ["load_measured_map", "save_map", "load_map", "TRPES_FORMAT"]

#: tag written into saved maps (npz key ``format`` / first CSV comment line)
TRPES_FORMAT = "ensemblelab-trpes-map-v1"

_SPLIT = re.compile(r"[,;\t ]+")


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


def _load_npz(path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise ParseError(f"not a readable npz file without pickles ({exc})", path=path) from exc

    def pick(*names: str) -> np.ndarray:
        for n in names:
            if n in data:
                return np.asarray(data[n], dtype=float)
        raise ParseError(f"missing array {names[0]!r} (or {list(names[1:])}); found "
                         f"{sorted(data)}", path=path, field=names[0])

    e = pick("kinetic_energies", "energies", "energy")
    d = pick("delays", "delay")
    inten = pick("intensity", "signal")
    if inten.shape == (d.size, e.size):
        return e, d, inten
    if inten.shape == (e.size, d.size):
        return e, d, inten.T
    raise ParseError(f"intensity has shape {inten.shape}; expected (n_delays, n_energies) = "
                     f"{(d.size, e.size)}", path=path, field="intensity")


def load_measured_map(path: str | os.PathLike[str], *, energy_unit: str = "eV",
                      time_unit: str = "fs") -> TRPESMap:
    """Load a measured TRPES map.

    Parameters
    ----------
    path : path-like
        ``.csv`` / ``.txt`` / ``.dat`` grid or ``.npz`` file.
    energy_unit, time_unit : str
        Units of the file's kinetic energies and delays (converted to eV and fs).

    Returns
    -------
    TRPESMap
        ``params`` records the source file name and ``"measured": True``.

    Raises
    ------
    ParseError
        With the file, line and a hint when the layout is wrong.
    """
    path = Path(path)
    if not path.is_file():
        raise ParseError("file not found", path=path)
    if path.suffix.lower() == ".npz":
        e, d, inten = _load_npz(path)
    else:
        e, d, inten = _load_csv(path)
    e = e * energy_factor(energy_unit)
    d = d * time_factor(time_unit)
    if not (np.all(np.isfinite(e)) and np.all(np.isfinite(d))):
        raise ParseError("energies and delays must be finite", path=path)
    oe, od = np.argsort(e, kind="stable"), np.argsort(d, kind="stable")
    e, d, inten = e[oe], d[od], inten[np.ix_(od, oe)]
    for name, arr in (("energies", e), ("delays", d)):
        if np.any(np.diff(arr) == 0):
            raise ParseError(f"duplicated {name}", path=path, field=name)
    if not np.all(np.isfinite(inten)):
        raise ParseError("intensities must be finite (no NaN/Inf)", path=path,
                         hint="fill or crop missing cells before loading")
    return TRPESMap(kinetic_energies=e, delays=d, intensity=inten,
                    params={"measured": True, "source": path.name})


def save_map(trpes_map: TRPESMap, path: str | os.PathLike[str], *,
             overwrite: bool = False) -> Path:
    """Write a map atomically as ``.npz`` (everything) or ``.csv`` (total only).

    NPZ keys: ``format``, ``kinetic_energies``, ``delays``, ``intensity``, ``alive``,
    ``alive_count``, ``component_labels`` (unicode array), ``components``
    (n_components, n_delays, n_energies) and ``params`` (a JSON string); a map with an
    interval adds ``lower``, ``upper``, ``rel_se`` (n_delays, n_energies) and
    ``component_lower``, ``component_upper`` (n_components, n_delays, n_energies). Written
    without pickles, read back with ``allow_pickle=False``.

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
        np.savez_compressed(
            buf, format=np.array(TRPES_FORMAT), kinetic_energies=m.kinetic_energies,
            delays=m.delays, intensity=m.intensity, alive=m.alive, alive_count=m.alive_count,
            component_labels=np.array(labels, dtype=np.str_), components=comps,
            params=np.array(json.dumps(m.params)),
            **_interval_arrays(m, labels))  # type: ignore[arg-type]
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
                        params=params, **_intervals_from(data, labels))
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
