"""Layer 2: loaders and writers (depends on data only).

``load(path)`` detects the format (native store, extended-XYZ folder, tidy
table) and returns an :class:`~ensemblelab.Ensemble` in internal units;
``save(ens, path)`` writes the native store atomically. Format details are in
the docstrings of :mod:`ensemblelab.io.xyz`, :mod:`ensemblelab.io.store` and
:mod:`ensemblelab.io.table`.
"""

from __future__ import annotations

import inspect
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, overload

from ._registry import detect_format, get_loader

if TYPE_CHECKING:
    from ..data.ensemble import Ensemble
    from .lazy import LazyEnsemble

__all__ = ["load", "save", "write_extxyz", "load_extxyz", "load_table", "load_store",
           "save_store", "detect_format", "save_map", "load_map", "load_measured_map",
           "join_snapshot_table", "load_plain_xyz"]


@overload
def load(
    path: str | Path,
    *,
    lazy: Literal[False] = False,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
    format: str | None = None,
    **kw: Any,
) -> Ensemble: ...


@overload
def load(
    path: str | Path,
    *,
    lazy: Literal[True],
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
    format: str | None = None,
    **kw: Any,
) -> LazyEnsemble: ...


@overload
def load(
    path: str | Path,
    *,
    lazy: bool,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
    format: str | None = None,
    **kw: Any,
) -> Ensemble | LazyEnsemble: ...


def load(
    path: str | Path,
    *,
    lazy: bool = False,
    energy_unit: str | None = None,
    time_unit: str | None = None,
    length_unit: str | None = None,
    nonfinite: str = "raise",
    progress: bool = True,
    format: str | None = None,
    **kw: Any,
) -> Ensemble | LazyEnsemble:
    """Load an ensemble from any supported input.

    Parameters
    ----------
    path : str or Path
        A native store folder, a folder of extended-XYZ files (one per
        trajectory), a single ``.xyz``/``.xyz.gz`` trajectory, or a CSV/Parquet
        snapshot table.
    lazy : bool
        Return a :class:`~ensemblelab.io.lazy.LazyEnsemble` (Dask arrays over the
        chunks) of a chunked store (``ensemblelab convert --chunked``). Other inputs
        are refused with a hint to convert them first.
    energy_unit, time_unit, length_unit : str, optional
        Units of the input when it does not declare them (default eV, fs,
        Angstrom); converted to internal units at the boundary. Ignored for
        the native store, which is always in internal units.
    nonfinite : {"raise", "keep"}
        NaN/Inf in coordinates, velocities, energies, arrays or ``e_kin``/
        ``e_pot``/``e_tot``: raise a ParseError, or keep them with an
        EnsembleWarning naming where (recorded in ``metadata["nonfinite"]``).
    progress : bool
        Show a progress bar on long loads.
    format : {"store", "extxyz", "table"}, optional
        Skip detection.
    **kw
        Passed to the format's loader (e.g. ``mmap_mode="r"`` for the store,
        ``state_base=1``, ``masses={"H": 2.014}`` or ``skip_atom_columns=["forces"]``
        for extended XYZ, ``geometries=`` or ``masses=`` for tables).

    Returns
    -------
    Ensemble or LazyEnsemble
        An Ensemble; a LazyEnsemble with ``lazy=True`` (the static type follows
        the literal value of `lazy`).

    Raises
    ------
    ParseError, SchemaError, StoreError, UnknownFormatError
        With the file, frame/line, field and a hint.
    """
    from .chunked import is_chunked_store

    if lazy or is_chunked_store(path):  # chunked store: a LazyEnsemble (or all of it)
        from .lazy import LazyEnsemble, lazy_from

        lz = lazy_from(path, format=format) if lazy else LazyEnsemble(path)
        return lz if lazy else lz.compute()
    name = format or detect_format(path)
    loader = get_loader(name)
    if name == "store":
        given = {k: v for k, v in (("energy_unit", energy_unit), ("time_unit", time_unit),
                                   ("length_unit", length_unit)) if v is not None}
        if given:
            raise ValueError(f"{path}: a native store is always in internal units (fs, eV, "
                             f"Angstrom); do not pass {sorted(given)}.")
        return loader(path, progress=progress, **kw)
    options = {"energy_unit": energy_unit, "time_unit": time_unit, "length_unit": length_unit,
               "nonfinite": nonfinite, "progress": progress, **kw}
    accepted = inspect.signature(loader).parameters
    unknown = sorted(set(options) - set(accepted))
    if unknown:
        raise TypeError(f"load() got option(s) {unknown} that the {name!r} loader does not "
                        f"take; it takes {sorted(p for p in accepted if p != 'path')}.")
    return loader(path, **options)


def save(ens: Ensemble, path: str | Path, *, overwrite: bool = False) -> Path:
    """Write `ens` as a native store folder (atomic; see :mod:`ensemblelab.io.store`).

    Parameters
    ----------
    ens : Ensemble
    path : str or Path
        Target folder.
    overwrite : bool
        Replace an existing store (never a folder that is not a store).

    Returns
    -------
    Path
    """
    from .store import save_store

    return save_store(ens, path, overwrite=overwrite)


def __getattr__(name: str) -> Any:
    lazy = {
        "write_extxyz": ("xyz", "write_extxyz"),
        "load_extxyz": ("xyz", "load_extxyz"),
        "load_table": ("table", "load_table"),
        "load_store": ("store", "load_store"),
        "save_store": ("store", "save_store"),
        "save_map": ("maps", "save_map"),
        "load_map": ("maps", "load_map"),
        "load_measured_map": ("maps", "load_measured_map"),
        "join_snapshot_table": ("join", "join_snapshot_table"),
        "load_plain_xyz": ("plain", "load_plain_xyz"),
    }
    if name in lazy:
        import importlib

        mod, func = lazy[name]
        value = getattr(importlib.import_module(f"ensemblelab.io.{mod}"), func)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'ensemblelab.io' has no attribute {name!r}")
