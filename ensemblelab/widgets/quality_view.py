"""Quality view: flagged trajectories with their reasons; exclude or restore them."""

from __future__ import annotations

import html
from typing import Any, cast

import ipywidgets as widgets
import pandas as pd

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel

__all__ = ["QualityView"]


class QualityView(View):
    """Flagged trajectories (``model.flags``) and the exclusion controls.

    Excluding or restoring writes ``model.excluded``; the map and population
    views observe it and recompute.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    flags : DataFrame, optional
        A table from :func:`ensemblelab.compute.structures.outliers.flag_trajectories`
        (``traj, flagged, reason, first_bad_time, score``); computed from
        ``model.ens`` when neither this nor ``model.flags`` is given.
    flag_kwargs : dict, optional
        Keyword arguments of ``flag_trajectories``.
    compute_flags : bool
        Compute the flags when none are given (False: wait for ``model.flags``, as the
        explorer does while it checks the trajectories in the background).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    rows : ipywidgets.SelectMultiple
        The flagged trajectories (value: trajectory ids).
    flagged : DataFrame
        The flagged rows of ``model.flags``.
    """

    title = "quality view"

    def __init__(self, model: SelectionModel | Ensemble, *, flags: pd.DataFrame | None = None,
                 flag_kwargs: dict[str, Any] | None = None,
                 compute_flags: bool = True,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        if flags is not None:
            self.model.flags = flags
        elif self.model.flags is None and compute_flags:
            from ..compute.structures.outliers import flag_trajectories

            self.model.flags = flag_trajectories(self.model.ens, **dict(flag_kwargs or {}))
        self._show_callbacks: list[Any] = []
        self.rows = widgets.SelectMultiple(options=[], rows=8,
                                           layout=widgets.Layout(width="100%"))
        self.rows.add_class("ensemblelab-quality-rows")
        self.exclude_button = widgets.Button(description="exclude", button_style="warning",
                                             tooltip="leave the chosen trajectories out")
        self.restore_button = widgets.Button(description="restore",
                                             tooltip="bring the chosen trajectories back")
        self.exclude_all = widgets.Button(description="exclude all flagged")
        self.restore_all = widgets.Button(description="restore all")
        self.show_button = widgets.Button(description="show trajectory",
                                          tooltip="show the first chosen trajectory")
        for b in (self.exclude_button, self.restore_button, self.exclude_all,
                  self.restore_all, self.show_button):
            b.add_class("ensemblelab-quality-" + b.description.replace(" ", "-"))
        self.summary = widgets.HTML()
        self.summary.add_class("ensemblelab-quality-summary")
        self.exclude_button.on_click(self._guard(lambda b: self.exclude(self.rows.value)))
        self.restore_button.on_click(self._guard(lambda b: self.restore(self.rows.value)))
        self.exclude_all.on_click(self._guard(
            lambda b: self.exclude(self.flagged["traj"].tolist())))
        self.restore_all.on_click(self._guard(lambda b: self.model.restore(self.model.excluded)))
        self.show_button.on_click(self._guard(self._on_show_click))
        self._observe(self._on_excluded_change, ["excluded", "flags"])
        buttons = widgets.HBox([self.exclude_button, self.restore_button, self.exclude_all,
                                self.restore_all, self.show_button])
        self._finish(self.summary, self.rows, buttons)
        self._render()

    @property
    def flagged(self) -> pd.DataFrame:
        """The flagged rows of ``model.flags`` (every row when there is no ``flagged`` column)."""
        flags = self.model.flags
        if flags is None:
            return pd.DataFrame({"traj": []})
        if "flagged" in flags.columns:
            return flags.loc[flags["flagged"].astype(bool)].reset_index(drop=True)
        return flags.reset_index(drop=True)

    def exclude(self, trajs: Any) -> None:
        """Exclude trajectories (ids)."""
        self.model.exclude([int(t) for t in trajs])

    def restore(self, trajs: Any) -> None:
        """Restore excluded trajectories (ids)."""
        self.model.restore([int(t) for t in trajs])

    def on_show(self, callback: Any) -> None:
        """Register ``callback(traj)``, called after "show trajectory" set ``model.trajectory``."""
        self._show_callbacks.append(callback)

    def _on_show_click(self, button: Any) -> None:
        if self.rows.value:
            traj = int(self.rows.value[0])
            self.model.trajectory = traj
            for callback in self._show_callbacks:
                callback(traj)

    def _on_excluded_change(self, change: dict) -> None:
        self._render()

    def _render(self) -> None:
        flagged = self.flagged
        excluded = set(self.model.excluded)
        options = []
        for r in flagged.itertuples():
            reason = str(getattr(r, "reason", "") or "")
            first = getattr(r, "first_bad_time", None)
            when = f" (from {first:.1f} fs)" if isinstance(first, float) and first == first else ""
            traj = int(cast(int, r.traj))
            mark = "✗ excluded · " if traj in excluded else ""
            options.append((f"{mark}trajectory {traj}: {reason}{when}", traj))
        keep = tuple(v for v in self.rows.value if v in {o[1] for o in options})
        self.rows.options = options
        self.rows.value = keep
        n_total = self.model.ens.n_trajectories
        checked = ("<i>checking the trajectories ...</i> " if self.model.flags is None else
                   f"<b>{len(flagged)}</b> of {n_total} trajectories flagged; ")
        self.summary.value = (
            checked
            + f"<b class='ensemblelab-n-excluded'>{len(excluded)}</b> excluded"
            + (": " + html.escape(", ".join(str(t) for t in sorted(excluded)[:30]))
               if excluded else ""))
