"""Population view: state populations with interval bands, fitted curves and a time cursor."""

from __future__ import annotations

import html
from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np
import pandas as pd

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._selection import SelectionModel
from ._util import Debouncer, busy, legend_html
from .trajectory_view import STATE_COLORS

__all__ = ["PopulationView"]

_MAX_TIMES = 600


class PopulationView(View):
    """Populations against time (from :func:`ensemblelab.compute.kinetics.populations.populations`).

    Observes ``model.excluded`` (recompute, debounced), ``model.delay_range``
    (shaded) and ``model.time`` (cursor); a click on the plot writes
    ``model.time``.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    kind : {"active", "amplitudes", "diabatic"}
        Population kind.
    fit : {"none", "single", "sequential", "parallel"}
        Kinetic scheme fitted with :func:`ensemblelab.compute.kinetics.rates.fit_kinetics`
        (``"sequential"``/``"parallel"`` need `fit_states`).
    fit_states : sequence of int, optional
        States in the roles A, B[, C] of the kinetic model.
    irf_fwhm : float, optional
        Instrument response (fs) of the fit.
    time_grid : array_like, optional
        Times in fs (default: the ensemble's times, thinned to at most 600).
    debounce : float
        Seconds of quiet before recomputing after a change.
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    figure : bqplot.Figure
    lines : bqplot.Lines
        Populations, one row per state.
    bands : list of bqplot.Lines
        Interval band of each state (``fill="between"``).
    fit_lines : bqplot.Lines
        Fitted curves (dashed).
    delay_band : bqplot.Lines
        The selected delay range (shaded).
    cursor : bqplot.Lines
        The time cursor.
    table : DataFrame or None
        The populations shown.
    fit_result : KineticsResult or None
        The last fit.
    fit_roles : list of ipywidgets.Dropdown
        The states in the roles A, B, C (shown for the two- and three-state models).
    fit_label : ipywidgets.HTML
        Each fitted time constant with the states it belongs to.
    """

    title = "population view"

    def __init__(
        self,
        model: SelectionModel | Ensemble,
        *,
        kind: str = "active",
        fit: str = "single",
        fit_states: Any = None,
        irf_fwhm: float | None = None,
        time_grid: Any = None,
        debounce: float = 0.3,
        messages: MessageArea | None = None,
    ) -> None:
        super().__init__(model, messages=messages)
        ens = self.model.ens
        kinds = ["active"]
        if ens.amplitudes is not None:
            kinds.append("amplitudes")
        if ens.adt is not None:
            kinds.append("diabatic")
        if kind not in kinds:
            raise ValueError(f"kind must be one of {kinds} for this ensemble; got {kind!r}.")
        self._fit_problem = ""
        self.irf_fwhm = irf_fwhm
        self.time_grid = None if time_grid is None else np.asarray(time_grid, float)
        self.table: pd.DataFrame | None = None
        self.fit_result: Any = None
        self.n_computed = 0

        self.kind = widgets.Dropdown(options=kinds, value=kind, description="populations",
                                     layout=widgets.Layout(width="230px"))
        self.fit = widgets.Dropdown(options=["none", "single", "sequential", "parallel"],
                                    value=fit, description="fit",
                                    layout=widgets.Layout(width="180px"))
        labels = list(ens.state_labels)
        roles = self.default_fit_states() if fit_states is None else \
            [self._state_index(v) for v in fit_states]
        self.fit_roles = [
            widgets.Dropdown(options=([("-", -1)] if i > 0 else []) +
                             [(str(lab), k) for k, lab in enumerate(labels)],
                             value=roles[i] if i < len(roles) else -1,
                             description=name, layout=widgets.Layout(width="120px"),
                             style={"description_width": "18px"})
            for i, name in enumerate(("A", "B", "C")) if i < max(len(labels), 2)
        ]
        self.roles_box = widgets.HBox(self.fit_roles)
        self.roles_box.add_class("ensemblelab-fit-states")
        self.status = widgets.HTML()
        self.fit_label = widgets.HTML()
        self.fit_label.add_class("ensemblelab-fit-label")

        n_states = ens.n_states
        colors = [STATE_COLORS[i % len(STATE_COLORS)] for i in range(n_states)]
        self.x = bqplot.LinearScale()
        self.y = bqplot.LinearScale(min=0.0, max=1.0)
        sc = {"x": self.x, "y": self.y}
        zero = np.zeros(2)
        self.delay_band = bqplot.Lines(x=zero, y=zero, scales=sc, fill="inside",
                                       colors=["#bbbbbb"], fill_colors=["#bbbbbb"],
                                       fill_opacities=[0.35], stroke_width=0.5)
        self.bands = [
            bqplot.Lines(x=zero, y=np.zeros((2, 2)), scales=sc, fill="between",
                         colors=[c, c], fill_colors=[c], fill_opacities=[0.2],
                         stroke_width=0.0, opacities=[0.0, 0.0])
            for c in colors
        ]
        self.lines = bqplot.Lines(x=zero, y=np.zeros((n_states, 2)), scales=sc, colors=colors,
                                  labels=list(ens.state_labels),
                                  stroke_width=2.0)
        self.fit_lines = bqplot.Lines(x=zero, y=np.zeros((1, 2)), scales=sc, colors=["black"],
                                      line_style="dashed", stroke_width=1.5)
        self.cursor = bqplot.Lines(x=[0.0, 0.0], y=[0.0, 1.0], scales=sc, colors=["#555"],
                                   line_style="dashed", visible=False)
        self.selector = bqplot.interacts.IndexSelector(scale=self.x, marks=[self.lines],
                                                       color="#555")
        self.figure = bqplot.Figure(
            marks=[self.delay_band, *self.bands, self.lines, self.fit_lines, self.cursor],
            axes=[bqplot.Axis(scale=self.x, label="time / fs"),
                  bqplot.Axis(scale=self.y, side="left", label="population",
                              tick_format=".1f")],
            interaction=self.selector,
            layout=widgets.Layout(width="100%", height="320px"),
            fig_margin={"top": 20, "bottom": 45, "left": 60, "right": 36},
        )
        self.figure.add_class("ensemblelab-populations")

        self._recompute_later = Debouncer(self._guard(self.recompute), delay=debounce)
        self.kind.observe(lambda change: self._recompute_later(), names="value")
        self.fit.observe(lambda change: self._recompute_later(), names="value")
        for w in self.fit_roles:
            w.observe(lambda change: self._recompute_later(), names="value")
        self.selector.observe(self._guard(self._on_selector_change), names="selected")
        self._observe(lambda change: self._recompute_later(), "excluded")
        self._observe(self._on_delay_range_change, "delay_range")
        self._observe(self._on_time_change, "time")
        # the legend beside the plot, never over the curves
        self.legend = widgets.HTML(legend_html(
            [(str(lab), c, "solid") for lab, c in zip(ens.state_labels, colors, strict=True)]
            + [("fit", "black", "dashed")]))
        self._finish(widgets.HBox([self.kind, self.fit, self.roles_box, self.status]),
                     self.figure, self.legend, self.fit_label)
        self.recompute()
        self._on_delay_range_change()

    # ------------------------------------------------------------------ compute
    def _grid(self) -> np.ndarray:
        if self.time_grid is not None:
            return self.time_grid
        t = self.model.ens.times
        t = t[np.isfinite(t)]
        if t.size > _MAX_TIMES:
            t = t[np.linspace(0, t.size - 1, _MAX_TIMES).round().astype(int)]
            t = np.unique(t)
        return t

    def recompute(self) -> pd.DataFrame:
        """Recompute populations (and the fit) of ``model.ens`` without ``model.excluded``
        (passed as ``exclude=``: weight 0, no copy); returns the table."""
        from ..compute.kinetics.populations import populations

        with busy(self.status, "computing populations ..."):
            table = populations(self.model.ens, kind=self.kind.value, time_grid=self._grid(),
                                exclude=list(self.model.excluded))
            self.table = table
            self.fit_result = None
            self._fit_problem = ""
            self.roles_box.layout.display = "none" if self.fit.value in ("none", "single") \
                else "flex"
            if self.fit.value != "none":
                self.fit_result = self._fit(table)
        self.n_computed += 1
        self._draw()
        return table

    def default_fit_states(self) -> list[int]:
        """States in the roles A, B, C by default: the most populated state at the start,
        then the others from the highest to the lowest (a cascade down the ladder)."""
        ens = self.model.ens
        n_states = ens.n_states
        snap = ens.snapshots
        t = snap["time"].to_numpy()
        used = np.isin(snap["traj"].to_numpy(), np.asarray(self.model.excluded, int),
                       invert=True)
        t_used = t[used]
        first = snap["active"].to_numpy()[used & (t == np.nanmin(t_used))] if t_used.size \
            else np.zeros(0, int)
        start = int(np.bincount(first, minlength=n_states).argmax()) if first.size else \
            n_states - 1
        return [start] + [k for k in range(n_states - 1, -1, -1) if k != start][:2]

    def _state_index(self, value: Any) -> int:
        labels = list(self.model.ens.state_labels)
        if isinstance(value, str) and value in labels:
            return labels.index(value)
        k = int(value)
        if not 0 <= k < len(labels):
            raise ValueError(f"fit_states: state {value!r} is not one of {labels} "
                             f"(indices 0-{len(labels) - 1}).")
        return k

    @property
    def fit_states(self) -> list[int]:
        """The states chosen for the roles A, B[, C] of the kinetic model."""
        return [int(w.value) for w in self.fit_roles if w.value is not None and w.value >= 0]

    @fit_states.setter
    def fit_states(self, states: Any) -> None:
        if states is None or not hasattr(self, "fit_roles"):
            return
        roles = [self._state_index(v) for v in states]
        for i, w in enumerate(self.fit_roles):
            w.value = roles[i] if i < len(roles) else -1

    def _fit(self, table: pd.DataFrame) -> Any:
        from ..compute.kinetics.rates import fit_kinetics

        kwargs: dict[str, Any] = {"scheme": self.fit.value, "interval": "covariance"}
        if self.fit.value != "single":
            states = self.fit_states
            if len(set(states)) != len(states) or len(states) < 2:
                self._fit_problem = (f"choose different states for A, B{', C' * (len(states) > 2)}"
                                     f" of the {self.fit.value} model")
                return None
            kwargs["states"] = states
        if self.irf_fwhm:
            kwargs["irf_fwhm"] = float(self.irf_fwhm)
        return fit_kinetics(table, **kwargs)

    def fit_text(self) -> str:
        """The fit as text: each time constant with the states it belongs to."""
        res = self.fit_result
        if res is None:
            return self._fit_problem
        names = [str(self.model.ens.state_labels[k]) for k in res.states]
        a, rest = names[0], names[1:]
        where = {"tau": f"{a} decay" if res.scheme == "single" else f"{a} → {', '.join(rest)}",
                 "tau1": f"{a} → {rest[0]}" if rest else a,
                 "tau2": f"{rest[0]} → {rest[1]}" if len(rest) > 1 else
                 (f"{rest[0]} decay" if rest else "")}
        def interval(name: str, scale: float = 1.0) -> str:
            try:
                lo, hi = res.interval(name)
            except (KeyError, ValueError):
                return ""
            if not (np.isfinite(lo) and np.isfinite(hi)):
                return " (no interval)"
            return f" [{scale * lo:.1f}, {scale * hi:.1f}]"

        parts = [f"{k} ({where.get(k, k)}) = {v:.1f} fs{interval(k)}"
                 for k, v in res.time_constants.items()]
        if res.scheme == "parallel" and "branching" in res.params and rest:
            parts.append(f"branching to {rest[0]} = {100 * res.params['branching']:.1f} %"
                         f"{interval('branching', 100.0)}")
        level = f"{100 * res.ci:.0f} %" if np.isfinite(res.ci) else ""
        how = str(res.interval_method).split(" (", 1)[0]
        note = (f"; [{level} interval, {how}: covers the fit only, not the sampling of "
                "trajectories]" if how == "covariance" else
                f"; [{level} interval, {how}]" if how != "none" else "")
        if all(interval(k) in ("", " (no interval)") for k in res.time_constants):
            note = ""
        return f"{res.scheme} fit: " + ", ".join(parts) + note

    # ------------------------------------------------------------------ drawing
    def _draw(self) -> None:
        table = self.table
        assert table is not None  # drawn by recompute once the table is set
        n_states = self.model.ens.n_states
        pivot = table.pivot_table(index="time", columns="state", values="population",
                                  dropna=False)
        t = pivot.index.to_numpy(float)
        pop = np.vstack([pivot[s].to_numpy(float) if s in pivot else np.full(t.size, np.nan)
                         for s in range(n_states)])
        lower = table.pivot_table(index="time", columns="state", values="lower", dropna=False)
        upper = table.pivot_table(index="time", columns="state", values="upper", dropna=False)
        with self.figure.hold_sync():
            self.lines.x = t
            self.lines.y = np.nan_to_num(pop)
            for s, band in enumerate(self.bands):
                if s in lower and s in upper:
                    band.x = t
                    band.y = np.nan_to_num(np.vstack([lower[s].to_numpy(float),
                                                      upper[s].to_numpy(float)]))
            if t.size:
                self.x.min, self.x.max = float(t.min()), float(t.max())
            if self.fit_result is not None:
                curves = self.fit_result.curves
                fitted = curves.pivot_table(index="time", columns="state", values="fitted")
                self.fit_lines.x = fitted.index.to_numpy(float)
                self.fit_lines.y = fitted.to_numpy(float).T
                self.fit_lines.visible = True
                self.fit_label.value = html.escape(self.fit_text())
            else:
                self.fit_lines.visible = False
                self.fit_label.value = (f"<i>{html.escape(self._fit_problem)}</i>"
                                        if self._fit_problem else "")

    # ------------------------------------------------------------------ handlers
    def _on_delay_range_change(self, change: dict | None = None) -> None:
        rng = self.model.delay_range
        if rng is None:
            self.delay_band.x, self.delay_band.y = np.zeros(2), np.zeros(2)
            self.delay_band.visible = False
            return
        self.delay_band.x = np.array([rng[0], rng[0], rng[1], rng[1]])
        self.delay_band.y = np.array([0.0, 1.0, 1.0, 0.0])
        self.delay_band.visible = True

    def _on_time_change(self, change: dict) -> None:
        t = change["new"]
        if t is None:
            self.cursor.visible = False
            return
        self.cursor.x = [float(t), float(t)]
        self.cursor.visible = True

    def _on_selector_change(self, change: dict) -> None:
        sel = change["new"]
        if sel is None or len(sel) == 0:
            return
        self.model.time = float(sel[0])
