"""Trajectory view: every state energy against time, the active state drawn, hops marked."""

from __future__ import annotations

from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel
from ._util import legend_html

__all__ = ["TrajectoryView", "STATE_COLORS"]

#: line colours of the neutral states (matplotlib's tab10 order)
STATE_COLORS = ("#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2",
                "#7f7f7f", "#bcbd22", "#17becf")


class TrajectoryView(View):
    """State energies of one trajectory with a player synchronised through ``model.frame``.

    Observes ``model.trajectory`` and ``model.frame``; the player writes
    ``model.frame`` (the snapshot id at the player's step) and ``model.time``.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    trajectory : int, optional
        Trajectory id shown first (default: the first one).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    figure : bqplot.Figure
    lines : bqplot.Lines
        One line per neutral state, shape (n_states, n_steps), eV.
    active_line : bqplot.Lines
        The active-state energy.
    hop_marks : bqplot.Scatter
        The hops (time, energy of the new state).
    cursor : bqplot.Lines
        Vertical line at the player's time.
    player : ipywidgets.Play
    slider : ipywidgets.IntSlider
        Step index within the trajectory (linked to the player in the front end).
    """

    title = "trajectory view"

    def __init__(self, model: SelectionModel | Ensemble, *, trajectory: int | None = None,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        ens = self.model.ens
        ids = ens.trajectories["traj"].to_numpy()
        self.x = bqplot.LinearScale()
        self.y = bqplot.LinearScale()
        n_states = ens.n_states
        colors = [STATE_COLORS[i % len(STATE_COLORS)] for i in range(n_states)]
        self.lines = bqplot.Lines(x=np.zeros(1), y=np.zeros((n_states, 1)),
                                  scales={"x": self.x, "y": self.y}, colors=colors,
                                  stroke_width=1.2, labels=list(ens.state_labels),
                                  opacities=[0.8] * n_states)
        self.active_line = bqplot.Lines(x=np.zeros(1), y=np.zeros(1),
                                        scales={"x": self.x, "y": self.y}, colors=["black"],
                                        stroke_width=3.0, labels=["active"])
        self.hop_marks = bqplot.Scatter(x=np.zeros(0), y=np.zeros(0),
                                        scales={"x": self.x, "y": self.y}, colors=["red"],
                                        marker="diamond", default_size=60, labels=["hops"])
        self.cursor = bqplot.Lines(x=[0.0, 0.0], y=[0.0, 1.0],
                                   scales={"x": self.x, "y": self.y}, colors=["#555"],
                                   line_style="dashed")
        ax = bqplot.Axis(scale=self.x, label="time / fs")
        ay = bqplot.Axis(scale=self.y, side="left", label="energy / eV", tick_format=".2f")
        self.figure = bqplot.Figure(
            marks=[self.lines, self.active_line, self.hop_marks, self.cursor], axes=[ax, ay],
            layout=widgets.Layout(width="100%", height="300px"),
            fig_margin={"top": 20, "bottom": 40, "left": 60, "right": 36},
        )
        # the legend beside the plot, never over the curves
        self.legend = widgets.HTML(legend_html(
            [(str(lab), c, "solid") for lab, c in zip(ens.state_labels, colors, strict=True)]
            + [("active state", "black", "solid"), ("hop", "red", "marker")]))
        self.choose = widgets.Dropdown(options=[int(i) for i in ids], description="trajectory",
                                       layout=widgets.Layout(width="220px"))
        self.player = widgets.Play(value=0, min=0, max=0, interval=100, description="play")
        self.slider = widgets.IntSlider(value=0, min=0, max=0, description="step",
                                        continuous_update=True)
        widgets.jslink((self.player, "value"), (self.slider, "value"))
        widgets.jslink((self.player, "max"), (self.slider, "max"))
        self.info = widgets.HTML()
        self.info.add_class("ensemblelab-trajectory-info")
        self._ids: np.ndarray = np.zeros(0, dtype=np.int64)
        self._times: np.ndarray = np.zeros(0)
        self._syncing = False
        self.shown: int | None = None

        self.choose.observe(self._guard(self._on_choose_change), names="value")
        self.slider.observe(self._guard(self._on_slider_change), names="value")
        self._observe(self._on_trajectory_change, "trajectory")
        self._observe(self._on_frame_change, "frame")
        self._finish(widgets.HBox([self.choose, self.player, self.slider]), self.figure,
                     self.legend, self.info)
        first = trajectory if trajectory is not None else (
            self.model.trajectory if self.model.trajectory is not None else
            (int(ids[0]) if len(ids) else None))
        if first is not None:
            self.show(int(first))

    # ------------------------------------------------------------------ public
    def show(self, traj: int, *, step: int = 0) -> None:
        """Draw trajectory `traj` and put the player at `step`."""
        ens = self.model.ens
        snap = ens.snapshots
        rows = np.flatnonzero(snap["traj"].to_numpy() == int(traj))
        if rows.size == 0:
            raise KeyError(f"unknown trajectory id {traj}.")
        t = snap["time"].to_numpy()[rows]
        e = ens.energies[rows]
        active = snap["active"].to_numpy()[rows]
        e_active = e[np.arange(rows.size), active]
        hops = np.flatnonzero(active[1:] != active[:-1]) + 1
        finite = np.where(np.isfinite(e), e, np.nan)
        with self.figure.hold_sync():
            self.lines.x = t
            self.lines.y = finite.T
            self.active_line.x = t
            self.active_line.y = e_active
            self.hop_marks.x = t[hops]
            self.hop_marks.y = e_active[hops]
            lo, hi = np.nanmin(finite), np.nanmax(finite)
            self.cursor.y = [float(lo), float(hi)] if np.isfinite(lo) else [0.0, 1.0]
        self._ids = snap["snapshot"].to_numpy()[rows]
        self._times = t
        self.shown = int(traj)
        self._syncing = True
        try:
            if self.choose.value != int(traj):
                self.choose.value = int(traj)
            self.player.max = int(rows.size - 1)
            self.slider.max = int(rows.size - 1)
            self.slider.value = int(step)
            self.player.value = int(step)
        finally:
            self._syncing = False
        self._place_cursor(int(step))
        self.info.value = (
            f"trajectory {int(traj)}: {rows.size} steps, {len(hops)} hop(s)"
            + (" at " + ", ".join(f"{x:.1f} fs" for x in t[hops][:8]) if len(hops) else "")
        )

    @property
    def hop_times(self) -> np.ndarray:
        """Times (fs) of the hops marked on the shown trajectory."""
        return np.asarray(self.hop_marks.x, dtype=float)

    # ------------------------------------------------------------------ handlers
    def _place_cursor(self, step: int) -> None:
        if self._times.size:
            t = float(self._times[min(step, self._times.size - 1)])
            self.cursor.x = [t, t]

    def _on_choose_change(self, change: dict) -> None:
        if self._syncing or change["new"] is None:
            return
        self.model.trajectory = int(change["new"])

    def _on_trajectory_change(self, change: dict) -> None:
        if change["new"] is None or int(change["new"]) == self.shown:
            return
        self.show(int(change["new"]))

    def _on_slider_change(self, change: dict) -> None:
        if self._syncing or not self._ids.size:
            return
        step = int(change["new"])
        self._place_cursor(step)
        self._syncing = True
        try:
            with self.model.hold_trait_notifications():
                self.model.frame = int(self._ids[step])
                self.model.time = float(self._times[step])
        finally:
            self._syncing = False

    def _on_frame_change(self, change: dict) -> None:
        if self._syncing:
            return
        frame = int(change["new"])
        if frame < 0:
            return
        hit = np.flatnonzero(self._ids == frame)
        if hit.size == 0:
            info: dict[str, Any] = self.model.snapshot_info(frame)
            rows = np.flatnonzero(self.model.ens.snapshots["traj"].to_numpy() == info["traj"])
            step = int(np.flatnonzero(self.model.ens.snapshots["snapshot"].to_numpy()[rows]
                                      == frame)[0])
            self.show(info["traj"], step=step)
            return
        step = int(hit[0])
        self._syncing = True
        try:
            self.slider.value = step
            self.player.value = step
        finally:
            self._syncing = False
        self._place_cursor(step)
