"""Structure view: the geometries behind the current selection, in the 3-D viewer."""

from __future__ import annotations

import html
from typing import Any

import ipywidgets as widgets
import nglview
import numpy as np

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._ngl import CHAINS, EnsembleStructure
from ._selection import SelectionModel
from ._util import format_percent

__all__ = ["StructureView", "OVERLAY_COLORS"]

#: colour of each overlaid copy (its row in the table carries the same colour)
OVERLAY_COLORS = ("#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b",
                  "#e377c2", "#7f7f7f", "#bcbd22", "#17becf")


class StructureView(View):
    """The geometries of the selected snapshots, aligned, overlaid or stepped through.

    Observes ``model.selected`` (what to show) and ``model.frame`` (the current
    snapshot, also moved by the trajectory view's player); writes
    ``model.frame`` when the user steps.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    n_top : int
        How many of the strongest selected snapshots the overlay shows.
    mode : {"overlay", "step"}
        Overlay the top `n_top` geometries, or show one at a time.
    align : bool
        Align every shown geometry onto the first one (Kabsch, mass-weighted).
    mirror : bool
        When aligning, also allow a reflection, so that mirror-image geometries (a
        +25 and a -25 degree twist) are shown with one handedness (display only;
        the data keep theirs). Off by default: the user allows it.
    width, height : str
        Size of the 3-D viewer (CSS).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    view : nglview.NGLWidget
        The 3-D viewer.
    caption : ipywidgets.HTML
        Trajectory, time, state, cluster and weight of what is shown.
    shown_ids : tuple of int
        Snapshot ids loaded in the viewer (overlay: all copies; step: one per frame).
    """

    title = "structure view"

    def __init__(
        self,
        model: SelectionModel | Ensemble,
        *,
        n_top: int = 8,
        mode: str = "overlay",
        align: bool = True,
        mirror: bool = False,
        width: str = "420px",
        height: str = "360px",
        messages: MessageArea | None = None,
    ) -> None:
        super().__init__(model, messages=messages)
        if mode not in ("overlay", "step"):
            raise ValueError(f"mode must be 'overlay' or 'step'; got {mode!r}.")
        self.view = nglview.NGLWidget(width=width, height=height)
        self.view.add_class("ensemblelab-ngl")
        self.caption = widgets.HTML(value="<i>Select a band in the map.</i>")
        self.caption.add_class("ensemblelab-structure-caption")
        self.mode = widgets.ToggleButtons(options=["overlay", "step"], value=mode,
                                          description="show", style={"button_width": "70px"})
        self.n_top = widgets.BoundedIntText(value=n_top, min=1, max=64, description="top N",
                                            layout=widgets.Layout(width="140px"))
        self.align = widgets.Checkbox(value=align, description="align", indent=False,
                                      layout=widgets.Layout(width="70px"))
        self.mirror = widgets.Checkbox(
            value=mirror, description="mirror images as one", indent=False,
            tooltip="align mirror images onto one handedness (display only)",
            layout=widgets.Layout(width="170px"))
        self.medoids = widgets.Button(description="cluster medoids",
                                      tooltip="show the medoid geometry of every cluster")
        self.step = widgets.IntSlider(value=0, min=0, max=0, description="frame",
                                      continuous_update=True)
        self.shown_ids: tuple[int, ...] = ()
        self._component: Any = None
        self._copies = 1
        self._syncing = False

        self.mode.observe(self._guard(self._redraw), names="value")
        self.n_top.observe(self._guard(self._redraw), names="value")
        self.align.observe(self._guard(self._redraw), names="value")
        self.mirror.observe(self._guard(self._redraw), names="value")
        self.medoids.on_click(self._guard(self._on_medoids_click))
        self.step.observe(self._guard(self._on_step_change), names="value")
        self._observe(self._on_selected_change, "selected")
        self._observe(self._on_frame_change, "frame")
        controls = widgets.VBox([widgets.HBox([self.mode, self.n_top]),
                                 widgets.HBox([self.align, self.mirror, self.medoids])])
        self._finish(controls, self.view, self.step, self.caption)
        if self.model.selected:
            self._redraw()

    # ------------------------------------------------------------------ handlers
    def _on_selected_change(self, change: dict) -> None:
        self._redraw()

    def _redraw(self, change: dict | None = None) -> None:
        ids = tuple(self.model.selected)
        if not ids:
            self._clear()
            return
        if self.mode.value == "overlay":
            self._show(ids[: self.n_top.value], overlay=True)
        else:
            self._show(ids, overlay=False)

    def _on_frame_change(self, change: dict) -> None:
        frame = int(change["new"])
        if frame < 0 or self._syncing:
            return
        if frame in self.shown_ids:
            if self._copies == 1:
                self._set_index(self.shown_ids.index(frame))
            self._caption()
            return
        # a snapshot from elsewhere (e.g. the trajectory player): step through its trajectory
        info = self.model.snapshot_info(frame)
        snap = self.model.ens.snapshots
        ids = tuple(snap.loc[snap["traj"].to_numpy() == info["traj"], "snapshot"].tolist())
        self._syncing = True
        try:
            self.mode.value = "step"
        finally:
            self._syncing = False
        self._show(ids, overlay=False, current=frame)

    def _on_step_change(self, change: dict) -> None:
        if self._syncing or self._copies != 1 or not self.shown_ids:
            return
        index = int(change["new"])
        if 0 <= index < len(self.shown_ids):
            self._set_index(index)
            self._syncing = True
            try:
                self.model.frame = int(self.shown_ids[index])
            finally:
                self._syncing = False
            self._caption()

    def _on_medoids_click(self, button: Any = None) -> None:
        self.show_medoids()

    # ------------------------------------------------------------------ public
    def show_medoids(self) -> tuple[int, ...]:
        """Select the medoid snapshot of every cluster (needs ``model.clusters``).

        Returns
        -------
        tuple of int
            The medoid snapshot ids (also written to ``model.selected``).
        """
        if not self.model.cluster_medoids:
            raise ValueError("no cluster medoids are known: cluster the ensemble first "
                             "(Explorer(..., clusters='auto') or set model.cluster_medoids).")
        ids = tuple(int(i) for i in self.model.cluster_medoids)
        self.mode.value = "overlay"
        self.n_top.value = max(1, min(64, len(ids)))
        self.model.selected = ids
        return ids

    def coordinates(self) -> np.ndarray:
        """The coordinates currently loaded, shape (n_frames, copies * n_atoms, 3), Angstrom."""
        if self._component is None:
            return np.zeros((0, 0, 3))
        return self._struct.frames.copy()

    # ------------------------------------------------------------------ drawing
    def _geometries(self, ids: tuple[int, ...]) -> np.ndarray:
        rows = self.model.rows(ids)
        xyz = np.asarray(self.model.ens.geometries[rows], dtype=np.float64)
        if self.align.value and len(ids) > 1:
            from ..compute.structures.geometry import kabsch_align

            result = kabsch_align(xyz, reference=xyz[0], weights="mass",
                                  masses=self.model.ens.masses,
                                  allow_reflection=bool(self.mirror.value))
            xyz = np.asarray(result.aligned, dtype=np.float64)
        return xyz

    def _show(self, ids: tuple[int, ...], *, overlay: bool, current: int | None = None) -> None:
        xyz = self._geometries(ids)
        n_atoms = self.model.ens.n_atoms
        if overlay:
            frames = xyz.reshape(1, len(ids) * n_atoms, 3)
            struct = EnsembleStructure(self.model.ens.symbols, frames, copies=len(ids))
        else:
            struct = EnsembleStructure(self.model.ens.symbols, xyz, copies=1)
        self._load(struct)
        self.shown_ids = tuple(int(i) for i in ids)
        self._copies = len(ids) if overlay else 1
        self._syncing = True
        try:
            self.step.max = 0 if overlay else max(0, len(ids) - 1)
            self.step.value = 0
            self.step.disabled = overlay
        finally:
            self._syncing = False
        start = ids[0] if current is None else current
        if not overlay:
            self._set_index(self.shown_ids.index(int(start)))
        self._syncing = True
        try:
            self.model.frame = int(start)
        finally:
            self._syncing = False
        self._caption()

    def _load(self, struct: EnsembleStructure) -> None:
        if self._component is not None:
            self.view.remove_component(self._component)
        self._component = self.view.add_trajectory(struct, default_representation=False)
        self._struct = struct
        if struct.copies > 1:  # one colour per copy, the same as its row's key in the table
            self.overlay_colors = [OVERLAY_COLORS[c % len(OVERLAY_COLORS)]
                                   for c in range(struct.copies)]
            for c, color in enumerate(self.overlay_colors):
                self._component.add_representation(
                    "ball+stick", selection=f":{CHAINS[c % len(CHAINS)]}", color=color)
        else:
            self.overlay_colors = []
            self._component.add_representation("ball+stick", colorScheme="element")
        self.view.center()

    def _set_index(self, index: int) -> None:
        self._syncing = True
        try:
            if self.view.frame != index:
                self.view.frame = index
            if self.step.value != index:
                self.step.value = index
        finally:
            self._syncing = False

    def _clear(self) -> None:
        if self._component is not None:
            self.view.remove_component(self._component)
            self._component = None
        self.shown_ids = ()
        self.caption.value = "<i>Nothing selected.</i>"

    def _caption(self) -> None:
        model = self.model
        if not self.shown_ids:
            self.caption.value = "<i>Nothing selected.</i>"
            return
        if self._copies == 1:
            frame = model.frame if model.frame in self.shown_ids else self.shown_ids[0]
            self.caption.value = _caption_line(model.snapshot_info(frame))
            return
        colors = list(getattr(self, "overlay_colors", [])) or ["#888"] * len(self.shown_ids)

        def key(i: int) -> str:  # the colour of copy i in the viewer
            return (f"<span class='ensemblelab-overlay-key' style='color:{colors[i]}'>"
                    f"&#9632;</span> ")

        rows = ""
        for i, s in enumerate(self.shown_ids):
            cells = [html.escape(str(v)) for v in _cells(i + 1, model.snapshot_info(s))]
            cells[0] = key(i) + cells[0]
            rows += "<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>"
        head = "".join(f"<th>{h}</th>" for h in
                       ("#", "trajectory", "time / fs", "state", "cluster", "weight", "share"))
        first = _caption_line(model.snapshot_info(self.shown_ids[0]))
        self.caption.value = (
            f"{first}<table class='ensemblelab-overlay-table' style='font-size:11px'>"
            f"<tr>{head}</tr>{rows}</table>"
        )


def _cells(i: int, info: dict[str, Any]) -> list[Any]:
    share = info.get("share")
    return [i, info["traj"], f"{info['time']:.1f}", info["state"],
            info["cluster_name"], f"{info['weight']:.3g}",
            format_percent(share)]


def _caption_line(info: dict[str, Any]) -> str:
    cluster = info["cluster_name"]
    text = (f"trajectory {info['traj']} · t = {info['time']:.1f} fs · state {info['state']} · "
            f"cluster {cluster} · weight {info['weight']:.3g}")
    if info.get("share") is not None:
        text += f" · share {format_percent(info['share'])}"
    return f"<b class='ensemblelab-caption-line'>{html.escape(text)}</b>"
