"""Selection table: what makes the selected band, grouped by cluster, state or trajectory."""

from __future__ import annotations

import html
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd

from ..compute.bands import group_band
from ..compute.uncertainty import band_share_table, format_share
from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel
from ._util import format_percent

__all__ = ["SelectionTable", "group_band"]

_GROUP_LABELS = {"cluster": "cluster", "state": "state", "traj": "trajectory"}
_N_ROWS = 25


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
        The grouped contributions shown (see :func:`ensemblelab.compute.bands.group_band`).
    rows : ipywidgets.Select
        The one table: one row per group (label, share, snapshots, trajectories);
        choosing one selects its snapshots. Hidden while there is no band.
    summary : ipywidgets.HTML
        The band and its total.
    html : ipywidgets.HTML
        The table's column heads (above :attr:`rows`).
    """

    title = "selection table"

    def __init__(self, model: SelectionModel | Ensemble, *,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        self.table: pd.DataFrame | None = None
        self.group = widgets.ToggleButtons(
            options=[("cluster", "cluster"), ("state", "state"), ("trajectory", "traj")],
            value=self.model.group_by, description="group by", style={"button_width": "92px"})
        self.summary = widgets.HTML(value="<i>No band selected.</i>")
        self.summary.add_class("ensemblelab-selection-summary")
        self.rows = widgets.Select(options=[], rows=8,
                                   layout=widgets.Layout(width="100%", display="none"))
        self.rows.add_class("ensemblelab-selection-rows")
        self.html = widgets.HTML()
        self.html.add_class("ensemblelab-selection-table")
        self._syncing = False
        self.group.observe(self._guard(self._on_group_click), names="value")
        self.rows.observe(self._guard(self._on_row_change), names="value")
        self._observe(self._on_band_change, ["band", "group_by"])
        self._finish(self.group, self.summary, self.html, self.rows)
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
                self.rows.layout.display = "none"  # no empty box before the first band
                self.html.value = ""
                if band is None:
                    self.summary.value = "<i>No band selected.</i>"
                elif band.attrs.get("no_signal"):
                    self.summary.value = (
                        "<i class='ensemblelab-no-signal'>No signal here: this band holds "
                        f"{format_percent(band.attrs.get('signal_fraction', 0.0))} of the "
                        f"map's intensity (below "
                        f"{format_percent(self.model.min_signal_fraction)}).</i>")
                else:
                    self.summary.value = "<i>Nothing contributes to this band.</i>"
                return
            table = self.model.group_table(self.model.group_by)
            if self.model.analysis is not None:  # the same table with bootstrap intervals
                table = band_share_table(self.model.analysis, self.model.group_by,
                                         cluster_names=self.model.cluster_names, top=_N_ROWS)
            assert table is not None  # a band is selected
            self.table = table
            e, d = self.model.energy_range, self.model.delay_range
            where = (f"{e[0]:.2f}–{e[1]:.2f} eV, {d[0]:.0f}–{d[1]:.0f} fs"
                     if e is not None and d is not None else "")
            where = str(band.attrs.get("where") or where)  # a band of another observable
            info = self.model.band_summary()
            assert info is not None  # a band is selected
            self.summary.value = (
                f"<b>band {html.escape(where)}</b>: {info['n_snapshots']} contributing "
                f"snapshots from {info['n_trajectories']} trajectories; integrated intensity "
                f"{info['total']:.4g}")
            shown = table.head(_N_ROWS)
            rows: list[Any] = list(shown.itertuples())  # fields of mixed types
            self.rows.options = [
                (f"{format_share(r.label, r.share, *_bounds(r))}  ({r.n_snapshots} snapshots, "
                 f"{r.n_trajectories} traj.)"
                 + ("  · may be 0" if bool(getattr(r, "includes_zero", False)) else ""),
                 _plain(r.key))
                for r in rows
            ]
            self.rows.value = None
            self.rows.layout.display = "flex"
            # one table: the rows are the clickable list; here only its column heads, and
            # (greyed) the groups whose interval reaches zero: they may not contribute
            zero = [r for r in rows if bool(getattr(r, "includes_zero", False))]
            grey = ", ".join(f"<span{_GREY}>{html.escape(str(r.label))}</span>" for r in zero)
            self.html.value = (
                f"<small><b>{html.escape(_GROUP_LABELS[self.model.group_by])}</b> · share "
                "[95% interval over trajectories] · (snapshots, trajectories); choose a row "
                "to see its structures"
                + (f"<br>interval reaches 0 (may not contribute): {grey}" if zero else "")
                + "</small>")
        finally:
            self._syncing = False


_GREY = " style='color:#999'"  # a group whose interval reaches zero


def _bounds(row: Any) -> tuple[float, float]:
    return float(getattr(row, "lower", np.nan)), float(getattr(row, "upper", np.nan))


def _plain(value: Any) -> Any:
    return int(value) if isinstance(value, (np.integer, int)) else value
