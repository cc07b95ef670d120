"""Selection table: what makes the selected band, grouped by cluster, state or trajectory."""

from __future__ import annotations

import html
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel

__all__ = ["SelectionTable", "group_band"]

_GROUP_LABELS = {"cluster": "cluster", "state": "state", "traj": "trajectory"}
_N_ROWS = 25


def group_band(band: pd.DataFrame, by: str, *, state_labels: Any = None,
               cluster_names: dict[str, str] | None = None) -> pd.DataFrame:
    """Sum the per-snapshot contributions of a band over groups.

    Parameters
    ----------
    band : DataFrame
        ``SelectionModel.band``: one row per contributing snapshot with
        ``share``, ``intensity`` and the grouping columns.
    by : {"cluster", "state", "traj"}
        Grouping (``"state"`` groups by the active state).
    state_labels : sequence of str, optional
        Names of the neutral states, for the ``label`` column.
    cluster_names : dict, optional
        Display name of each cluster code (keys: the code as a string).

    Returns
    -------
    DataFrame
        ``key`` (group value), ``label``, ``share`` (sums to the band's covered
        share), ``intensity``, ``n_snapshots``, ``n_trajectories``; largest
        share first.
    """
    column = {"cluster": "cluster", "state": "active", "traj": "traj"}[by]
    grouped = band.groupby(column, sort=False)
    out = pd.DataFrame({
        "share": grouped["share"].sum(),
        "intensity": grouped["intensity"].sum() if "intensity" in band else np.nan,
        "n_snapshots": grouped.size(),
        "n_trajectories": grouped["traj"].nunique(),
    })
    out.index.name = "key"
    out = out.reset_index().sort_values("share", ascending=False, kind="stable")
    return _labelled(out.reset_index(drop=True), by, state_labels=state_labels,
                     cluster_names=cluster_names)


def _labelled(out: pd.DataFrame, by: str, *, state_labels: Any = None,
              cluster_names: dict[str, str] | None = None) -> pd.DataFrame:
    """Insert the display ``label`` of each group key (column 1) of a grouped table."""
    if by == "state" and state_labels is not None:
        labels = [state_labels[int(k)] for k in out["key"]]
    elif by == "cluster":
        names = cluster_names or {}
        labels = ["unclustered" if int(k) < 0 else f"cluster {names.get(str(int(k)), int(k))}"
                  for k in out["key"]]
    elif by == "state":
        labels = [f"state {int(k)}" for k in out["key"]]
    else:
        labels = [f"trajectory {int(k)}" for k in out["key"]]
    out.insert(1, "label", labels)
    return out.reset_index(drop=True)


class SelectionTable(View):
    """Contributions of the selected band, grouped, with shares; a chosen row is shown.

    Observes ``model.band`` and ``model.group_by``; the shares are exact over every
    contributing snapshot (``model.group_table``), also when ``model.band`` keeps only
    the strongest ones. Choosing a row calls ``model.select_group`` (the structure
    view then shows that group's strongest snapshots).

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    table : DataFrame or None
        The grouped contributions shown (see :func:`group_band`).
    rows : ipywidgets.Select
        One option per group; choosing one selects its snapshots.
    summary : ipywidgets.HTML
        The band and its total; ``html`` holds the table.
    """

    title = "selection table"

    def __init__(self, model: SelectionModel | Ensemble, *,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        self.table: pd.DataFrame | None = None
        self.group = widgets.ToggleButtons(
            options=[("cluster", "cluster"), ("state", "state"), ("trajectory", "traj")],
            value=self.model.group_by, description="group by", style={"button_width": "80px"})
        self.summary = widgets.HTML(value="<i>No band selected.</i>")
        self.summary.add_class("ensemblelab-selection-summary")
        self.rows = widgets.Select(options=[], rows=8,
                                   layout=widgets.Layout(width="100%"))
        self.rows.add_class("ensemblelab-selection-rows")
        self.html = widgets.HTML()
        self.html.add_class("ensemblelab-selection-table")
        self._syncing = False
        self.group.observe(self._guard(self._on_group_click), names="value")
        self.rows.observe(self._guard(self._on_row_change), names="value")
        self._observe(self._on_band_change, ["band", "group_by"])
        self._finish(self.group, self.summary, self.rows, self.html)
        self._render()

    def _on_group_click(self, change: dict) -> None:
        self.model.group_by = change["new"]

    def _on_band_change(self, change: dict) -> None:
        if self.group.value != self.model.group_by:
            self._syncing = True
            try:
                self.group.value = self.model.group_by
            finally:
                self._syncing = False
        self._render()

    def _on_row_change(self, change: dict) -> None:
        if self._syncing or change["new"] is None:
            return
        self.choose(change["new"])

    def choose(self, key: Any) -> tuple[int, ...]:
        """Show the band's snapshots of group `key` (as a click on its row does)."""
        return self.model.select_group(self.model.group_by, key)

    def _render(self) -> None:
        band = self.model.band
        self._syncing = True
        try:
            if band is None or band.empty:
                self.table = None
                self.rows.options = []
                self.html.value = ""
                self.summary.value = ("<i>No band selected.</i>" if band is None else
                                      "<i>Nothing contributes to this band.</i>")
                return
            table = self.model.group_table(self.model.group_by)
            self.table = table
            e, d = self.model.energy_range, self.model.delay_range
            where = (f"{e[0]:.2f}–{e[1]:.2f} eV, {d[0]:.0f}–{d[1]:.0f} fs"
                     if e is not None and d is not None else "")
            info = self.model.band_summary()
            self.summary.value = (
                f"<b>band {html.escape(where)}</b>: {info['n_snapshots']} contributing "
                f"snapshots from {info['n_trajectories']} trajectories; integrated intensity "
                f"{info['total']:.4g}")
            shown = table.head(_N_ROWS)
            self.rows.options = [
                (f"{r.label:<16s} {100 * r.share:6.1f} %  ({r.n_snapshots} snapshots, "
                 f"{r.n_trajectories} traj.)", _plain(r.key))
                for r in shown.itertuples()
            ]
            self.rows.value = None
            head = "".join(f"<th>{h}</th>" for h in (
                _GROUP_LABELS[self.model.group_by], "share", "snapshots", "trajectories"))
            body = "".join(
                f"<tr><td>{html.escape(r.label)}</td><td>{100 * r.share:.1f} %</td>"
                f"<td>{r.n_snapshots}</td><td>{r.n_trajectories}</td></tr>"
                for r in shown.itertuples())
            self.html.value = f"<table style='font-size:12px'><tr>{head}</tr>{body}</table>"
        finally:
            self._syncing = False


def _plain(value: Any) -> Any:
    return int(value) if isinstance(value, (np.integer, int)) else value
