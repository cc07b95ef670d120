"""Export what is selected: structures (XYZ, PDB), figures (PNG, SVG), tables (CSV).

Every file is written atomically (temporary file + ``os.replace``) into an
export folder; nothing is ever written into the data. The panel's folder field
is confined to the export folder chosen at start (a relative sub-folder, or an
absolute path inside it): anything that resolves outside it, through ``..`` or a
symbolic link, is refused with a message. CSV tables are written with
formula-like text cells neutralised (:mod:`ensemblelab._csv`).
"""

from __future__ import annotations

import io as _io
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any, cast

import ipywidgets as widgets
import numpy as np
import pandas as pd

from .._atomic import atomic_write_bytes, atomic_write_text
from .._csv import to_csv_text
from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel

__all__ = ["ExportPanel", "confined_export_folder", "export_structures", "export_tables",
           "export_figures", "write_text_atomic", "write_bytes_atomic"]


def write_bytes_atomic(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write `data` to `path` through a temporary file in the same folder."""
    return atomic_write_bytes(path, data)


def write_text_atomic(path: str | os.PathLike[str], text: str) -> Path:
    """Write `text` (UTF-8) to `path` atomically."""
    return atomic_write_text(path, text)


def confined_export_folder(root: str | os.PathLike[str], value: str) -> Path:
    """The folder `value` (relative to `root`, or absolute) if it lies inside `root`.

    Raises
    ------
    ValueError
        When it resolves (through ``..`` or a symbolic link) to a place outside `root`.
    """
    base = Path(root).expanduser().resolve()
    text = str(value).strip()
    target = Path(text).expanduser() if text else base
    target = (target if target.is_absolute() else base / target).resolve()
    if target != base and base not in target.parents:
        raise ValueError(f"export folder {value!r} is outside the export folder {base}; "
                         "refused. Hint: give a sub-folder name (or leave the field as it is).")
    return target


def export_structures(model: SelectionModel, folder: str | os.PathLike[str], *,
                      fmt: str = "xyz", ids: Any = None, name: str = "selection",
                      align: bool = True) -> Path:
    """Write the selected geometries as one multi-frame XYZ or PDB file.

    Parameters
    ----------
    model : SelectionModel
    folder : path
        Export folder (created).
    fmt : {"xyz", "pdb"}
    ids : sequence of int, optional
        Snapshot ids (default ``model.selected``).
    name : str
        File stem.
    align : bool
        Superimpose every frame on the first (Kabsch, mass-weighted).

    Returns
    -------
    Path
        The written file; each frame's comment holds trajectory, time, state,
        cluster and weight.
    """
    if fmt not in ("xyz", "pdb"):
        raise ValueError(f"fmt must be 'xyz' or 'pdb'; got {fmt!r}.")
    ids = list(model.selected if ids is None else ids)
    if not ids:
        raise ValueError("nothing is selected: select a band or a group first.")
    from ..io.structures import write_pdb, write_xyz

    rows = model.rows(ids)
    xyz = np.asarray(model.ens.geometries[rows], dtype=np.float64)
    if align and len(ids) > 1:
        from ..compute.structures.geometry import kabsch_align

        xyz = kabsch_align(xyz, reference=xyz[0], weights="mass",
                           masses=model.ens.masses).aligned
    infos = [model.snapshot_info(int(s)) for s in ids]
    info = pd.DataFrame({
        "snapshot": [i["snapshot"] for i in infos],
        "traj": [i["traj"] for i in infos],
        "time": [i["time"] for i in infos],
        "state": [i["state"] for i in infos],
        "cluster": [i["cluster_name"] for i in infos],
        "weight": [i["weight"] for i in infos],
    })
    if model.band is not None:
        info["share"] = [i.get("share", 0.0) for i in infos]
    path = Path(folder) / f"{name}.{fmt}"
    path.parent.mkdir(parents=True, exist_ok=True)
    writer = write_xyz if fmt == "xyz" else write_pdb
    writer(path, xyz, model.ens.symbols, info=info, overwrite=True)
    return path


def export_tables(model: SelectionModel, folder: str | os.PathLike[str], *,
                  extra: dict[str, pd.DataFrame] | None = None) -> list[Path]:
    """Write the band, its grouped shares, the flags and the map as CSV files.

    Returns
    -------
    list of Path
        ``band_snapshots.csv``, ``band_by_<group>.csv``, ``flags.csv``,
        ``trpes_map.csv`` and one file per entry of `extra` (those that exist).
    """
    folder = Path(folder)
    out = []
    tables: dict[str, pd.DataFrame] = {}
    if model.band is not None:
        # every contributing snapshot (computed now: the brush keeps only the strongest)
        # both are None only without a band
        tables["band_snapshots"] = cast(pd.DataFrame, model.full_band())
        for by in ("cluster", "state", "traj"):
            tables[f"band_by_{by}"] = cast(pd.DataFrame, model.group_table(by))
    if model.flags is not None:
        tables["flags"] = model.flags
    if model.trpes_map is not None:
        tables["trpes_map"] = model.trpes_map.to_frame()
    tables.update(extra or {})
    for stem, table in tables.items():
        buf = _io.StringIO()
        buf.write(to_csv_text(table))
        out.append(write_text_atomic(folder / f"{stem}.csv", buf.getvalue()))
    return out


def export_figures(model: SelectionModel, folder: str | os.PathLike[str], *,
                   fmt: str = "png", populations: pd.DataFrame | None = None) -> list[Path]:
    """Save the map (with the selected band) and the populations as PNG or SVG.

    Returns
    -------
    list of Path
        ``trpes_map.<fmt>`` and, when `populations` is given, ``populations.<fmt>``.
    """
    if fmt not in ("png", "svg"):
        raise ValueError(f"fmt must be 'png' or 'svg'; got {fmt!r}.")
    # publication figures (column width, 300 dpi, rasterised map cells): ensemblelab.plotting
    from ..plotting.populations import plot_populations
    from ..plotting.spectra import plot_map

    folder = Path(folder)
    out = []
    if model.trpes_map is not None:
        fig = plot_map(model.trpes_map)
        ax = fig.axes[0]
        if model.energy_range is not None and model.delay_range is not None:
            (e0, e1), (d0, d1) = model.energy_range, model.delay_range
            ax.plot([e0, e1, e1, e0, e0], [d0, d0, d1, d1, d0], "w--", lw=1.5)
        out.append(_save(fig, folder / f"trpes_map.{fmt}", fmt))
    if populations is not None and len(populations):
        if "label" not in populations:
            populations = populations.assign(label=[model.ens.state_labels[int(s)]
                                                    for s in populations["state"]])
        fig = plot_populations(populations, band_alpha=0.2)
        if model.delay_range is not None:
            fig.axes[0].axvspan(*model.delay_range, color="0.7", alpha=0.3)
        out.append(_save(fig, folder / f"populations.{fmt}", fmt))
    return out


def _save(fig: Any, path: Path, fmt: str) -> Path:
    buf = _io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=300)  # >= 300 dpi for print (common practice)
    return write_bytes_atomic(path, buf.getvalue())


class ExportPanel(View):
    """Buttons that export structures, figures, tables, and save or restore the session.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    folder : path, optional
        Export folder (default ``./ensemblelab-export``); every export stays inside it.
    populations : callable, optional
        Returns the populations table to draw and save (the explorer passes it).
    save_session, restore_session : callable, optional
        Called by the session buttons (the explorer passes them; hidden otherwise).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    written : list of Path
        Every file written so far.
    """

    title = "export"

    def __init__(self, model: SelectionModel | Ensemble, *,
                 folder: str | os.PathLike[str] | None = None,
                 populations: Callable[[], pd.DataFrame | None] | None = None,
                 save_session: Callable[[], Path] | None = None,
                 restore_session: Callable[[], Any] | None = None,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        self._populations = populations
        self.written: list[Path] = []
        default = Path(folder) if folder is not None else Path.cwd() / "ensemblelab-export"
        self.root = default.expanduser().resolve()
        self.folder = widgets.Text(value=str(self.root), description="folder",
                                   layout=widgets.Layout(width="420px"))
        buttons = []
        actions: list[tuple[str, Callable[[], Any]]] = [
            ("structures XYZ", lambda: [export_structures(self.model, self._dest(),
                                                          fmt="xyz")]),
            ("structures PDB", lambda: [export_structures(self.model, self._dest(),
                                                          fmt="pdb")]),
            ("figures PNG", lambda: export_figures(self.model, self._dest(), fmt="png",
                                                   populations=self._pop())),
            ("figures SVG", lambda: export_figures(self.model, self._dest(), fmt="svg",
                                                   populations=self._pop())),
            ("tables CSV", lambda: export_tables(
                self.model, self._dest(),
                extra={"populations": p} if (p := self._pop()) is not None else None)),
        ]
        if save_session is not None:
            actions.append(("save session", lambda: [save_session()]))
        if restore_session is not None:
            actions.append(("restore session", lambda: restore_session() and []))
        self.buttons: dict[str, widgets.Button] = {}
        for label, action in actions:
            b = widgets.Button(description=label)
            b.add_class("ensemblelab-export-" + label.replace(" ", "-").lower())
            b.on_click(self._guard(lambda _b, a=action, lab=label: self._run(lab, a)))
            self.buttons[label] = b
            buttons.append(b)
        self.result = widgets.HTML()
        self._finish(self.folder, widgets.HBox(buttons[:5]), widgets.HBox(buttons[5:]),
                     self.result)

    def _dest(self) -> Path:
        """The folder typed in the field, confined to :attr:`root`."""
        return confined_export_folder(self.root, self.folder.value)

    def _pop(self) -> pd.DataFrame | None:
        return None if self._populations is None else self._populations()

    def _run(self, label: str, action: Callable[[], Any]) -> None:
        paths = [Path(p) for p in (action() or [])]
        self.written.extend(paths)
        self.result.value = f"{label}: " + (", ".join(p.name for p in paths) or "done")
        self.messages.info(f"{label}: wrote {len(paths)} file(s) to {self.folder.value}"
                           if paths else f"{label}: done")

    def click(self, label: str) -> None:
        """Press a button by its label (as the browser does)."""
        self.buttons[label].click()
