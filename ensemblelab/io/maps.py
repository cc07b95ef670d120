"""Load measured time-resolved photoelectron maps (CSV grid or NPZ) as :class:`TRPESMap`.

CSV grid layout (comma, semicolon, tab or whitespace separated; ``#`` comments):

* first row: a corner cell (any label, e.g. ``delay_fs``, or empty), then the
  photoelectron kinetic energies;
* every further row: the delay, then one intensity per energy.

NPZ: arrays named ``energies`` (or ``energy``), ``delays`` (or ``delay``) and
``intensity`` (or ``signal``), with ``intensity`` shaped (n_delays, n_energies) or
(n_energies, n_delays) (transposed automatically when unambiguous). Read with
``allow_pickle=False``.

Rows/columns are sorted into increasing order; the input file is never modified.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np

from ..data.spectrum import TRPESMap
from ..errors import ParseError
from ..units import energy_factor, time_factor

__all__ = ["load_measured_map"]

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

    e = pick("energies", "energy")
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
    return TRPESMap(energies=e, delays=d, intensity=inten,
                    params={"measured": True, "source": path.name})
