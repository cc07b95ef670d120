"""The observable switch of the map view: photoelectron / absorption / scattering.

The photoelectron map is the :class:`~ensemblelab.widgets.MapView`; the two other maps are
drawn here, each with its own box selection. A box on an absorption or scattering band
goes to the shared model as a band (``SelectionModel.show_band``) with its contributing
snapshots from :func:`ensemblelab.compute.observables.observable_contributions`, so the
selection table lists its states, clusters and trajectories and the structure view shows
its geometries, as for a photoelectron band.
"""

from __future__ import annotations

import html
import warnings
from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np

from ..data.ensemble import Ensemble
from ._base import View
from ._messages import MessageArea
from ._observable_bands import OBSERVABLES, compute_map, default_axis, map_values, observable_band
from ._selection import SelectionModel
from ._util import busy

__all__ = ["ObservableSwitch", "SWITCH_OPTIONS"]

#: colours of the difference maps at min, 0 and max: blue, white, red (less, none, more)
DIVERGING = ("#2166ac", "#f7f7f7", "#b2182b")

#: the switch's options, in order
SWITCH_OPTIONS = ("photoelectron", "absorption", "scattering")


class ObservableSwitch(View):
    """Switch the map between photoelectron, transient absorption and scattering.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    map_view : MapView, optional
        The photoelectron map view: its pulses and delay grid are used for the other
        maps, and its widget is shown for "photoelectron".
    scattering_kind : {"xray", "electron"}
        Probe of the scattering map (a menu beside the map).
    q, photon_energies : array_like, optional
        Axis grids of the scattering (1/Angstrom) and absorption (eV) maps (default
        :func:`~ensemblelab.widgets._observable_bands.default_axis`).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    switch : ipywidgets.ToggleButtons
        "photoelectron", "absorption" or "scattering".
    figure : bqplot.Figure
        The absorption or scattering map; ``figure.interaction`` is :attr:`brush`.
    heatmap : bqplot.HeatMap
    brush : bqplot.interacts.BrushSelector
    status, band_label : ipywidgets.HTML
    current_map : ScatteringMap, AbsorptionMap or None
        The map drawn (None while the photoelectron map is shown).
    band : ObservableBand or None
        The last band selected on this map.
    n_computed : int
        How many absorption/scattering maps were computed.
    """

    title = "observable switch"

    def __init__(self, model: SelectionModel | Ensemble, map_view: Any = None, *,
                 scattering_kind: str = "xray", q: Any = None, photon_energies: Any = None,
                 messages: MessageArea | None = None) -> None:
        super().__init__(model, messages=messages)
        self.map_view = map_view
        self.n_computed = 0
        self.current_map: Any = None
        self.band: Any = None
        self._axes = {"scattering": None if q is None else np.asarray(q, float),
                      "absorption": (None if photon_energies is None
                                     else np.asarray(photon_energies, float))}
        self._cache: dict[tuple[Any, ...], Any] = {}

        self.switch = widgets.ToggleButtons(options=list(SWITCH_OPTIONS), value="photoelectron",
                                            style={"button_width": "110px"})
        self.switch.add_class("ensemblelab-observable-toggle")
        self.kind = widgets.Dropdown(options=[("X-ray", "xray"), ("electron", "electron")],
                                     value=scattering_kind, description="probe",
                                     layout=widgets.Layout(width="170px"))
        self.status = widgets.HTML()
        self.status.add_class("ensemblelab-observable-status")
        self.band_label = widgets.HTML()
        self.band_label.add_class("ensemblelab-observable-band")

        self.x, self.y = bqplot.LinearScale(), bqplot.LinearScale()
        # red = more signal, blue = less (as the static figures of plotting.observables)
        self.c = bqplot.ColorScale(colors=list(DIVERGING), mid=0.0)
        z = np.linspace(0, 1, 3)
        self.heatmap = bqplot.HeatMap(x=z, y=z, color=np.zeros((3, 3)),
                                      scales={"x": self.x, "y": self.y, "color": self.c})
        self.box = bqplot.Lines(x=np.zeros(0), y=np.zeros(0), scales={"x": self.x, "y": self.y},
                                colors=["black"], stroke_width=2.0, line_style="dashed")
        self.brush = bqplot.interacts.BrushSelector(x_scale=self.x, y_scale=self.y,
                                                    color="black")
        self.x_axis = bqplot.Axis(scale=self.x, label="")
        self.color_axis = bqplot.ColorAxis(scale=self.c, side="right", num_ticks=6,
                                           tick_format=".2g", label="")
        self.figure = bqplot.Figure(
            marks=[self.heatmap, self.box],
            axes=[self.x_axis, bqplot.Axis(scale=self.y, side="left", label="delay / fs"),
                  self.color_axis],
            interaction=self.brush, layout=widgets.Layout(width="520px", height="420px"),
            fig_margin={"top": 20, "bottom": 45, "left": 60, "right": 80},
            padding_x=0, padding_y=0, display_toolbar=False)
        self.figure.add_class("ensemblelab-observable-map")
        self.panel = widgets.VBox([widgets.HBox([self.kind, self.status]), self.figure,
                                   self.band_label])
        self.stack = widgets.Box()
        self._photoelectron: widgets.Widget = (
            map_view.widget if map_view is not None else
            widgets.HTML("<i>The photoelectron map is in the map view.</i>"))

        self.switch.observe(self._guard(self._on_switch), names="value")
        self.kind.observe(self._guard(self._on_kind), names="value")
        self.brush.observe(self._guard(self._on_brushing), names="brushing")
        self._observe(self._on_excluded, "excluded")
        self.stack.children = (self._photoelectron,)
        self._finish(self.switch, self.stack)

    # ------------------------------------------------------------------ public
    @property
    def observable(self) -> str:
        """The observable shown."""
        return str(self.switch.value)

    def show(self, observable: str) -> Any:
        """Switch to `observable` (as a click on the switch does); returns its map or None."""
        if observable not in SWITCH_OPTIONS:
            raise ValueError(f"observable must be one of {list(SWITCH_OPTIONS)}; "
                             f"got {observable!r}.")
        self.switch.value = observable
        return self.current_map

    def brush_band(self, axis_range: tuple[float, float],
                   delay_range: tuple[float, float]) -> Any:
        """Select a band as the browser does (brush traits, then ``brushing=False``)."""
        self.brush.brushing = True
        self.brush.selected_x = np.asarray(axis_range, dtype=float)
        self.brush.selected_y = np.asarray(delay_range, dtype=float)
        self.brush.brushing = False
        return self.band

    def select(self, axis_range: tuple[float, float],
               delay_range: tuple[float, float]) -> Any:
        """Select a band of the shown map: the model's band and selection follow it."""
        if self.current_map is None:
            raise ValueError("switch to 'absorption' or 'scattering' first: the photoelectron "
                             "map selects its bands in the map view.")
        band = observable_band(self.model.current, self.model.snapshot_groups(),
                               self.current_map, self.observable, axis_range=axis_range,
                               delay_range=delay_range)
        self.band = band
        shown = self.model.show_band(band.analysis, delay_range=delay_range, where=band.where)
        shown.attrs["observable"] = self.observable
        self._draw_box(band.analysis.energy_range, band.analysis.delay_range)
        self.band_label.value = html.escape(band.where)
        return band

    def compute(self, observable: str | None = None) -> Any:
        """The map of `observable` for the current ensemble and pulses (cached)."""
        observable = self.observable if observable is None else observable
        cur = self.model.current
        probe, pump = self._pulses()
        delays = self._delays()
        axis = self._axes.get(observable)
        if axis is None:
            axis = default_axis(observable, cur)
        key = (observable, self.kind.value, id(cur), repr(probe), repr(pump),
               delays.tobytes(), axis.tobytes())
        if key not in self._cache:
            weights = None
            if self.map_view is not None:  # the same trajectory weights as the map view
                weights = self.map_view.trpes_kwargs.get("weights")
            with busy(self.status, f"computing the {observable} map ..."), \
                    warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                self._cache = {key: compute_map(observable, cur, probe=probe, pump=pump,
                                                delays=delays, axis=axis, weights=weights,
                                                scattering_kind=str(self.kind.value))}
            for w in caught:
                self.messages.warning(f"{observable} map: {w.message}")
            self.n_computed += 1
        return self._cache[key]

    # ------------------------------------------------------------------ internals
    def _pulses(self) -> tuple[Any, Any]:
        if self.map_view is not None:
            return self.map_view.pulses()
        from ..compute.spectroscopy.pulses import GaussianPulse

        meta = self.model.ens.metadata
        probe = meta.get("suggested_probe") or {}
        pump = meta.get("suggested_pump") or {}
        return (GaussianPulse(photon_energy=float(probe.get("photon_energy", 5.0)),
                              fwhm=float(probe.get("fwhm", 30.0))),
                GaussianPulse(photon_energy=float(pump.get("photon_energy", 5.0)),
                              fwhm=float(pump.get("fwhm", 30.0))))

    def _delays(self) -> np.ndarray:
        if self.map_view is not None:
            return np.asarray(self.map_view.grids()[1], float)
        t = self.model.ens.snapshots["time"].to_numpy()
        t = t[np.isfinite(t)]
        return np.linspace(float(t.min()) - 50.0, float(t.max()), 121)

    def _on_switch(self, change: dict) -> None:
        band = self.model.band
        if band is not None and band.attrs.get("observable") != change["new"]:
            self.model.clear_band()  # a band of the other map no longer applies
        self.band = None
        self._draw_box(None, None)
        if change["new"] == "photoelectron":
            self.current_map = None
            self.stack.children = (self._photoelectron,)
            return
        self.stack.children = (self.panel,)
        self._redraw()

    def _on_kind(self, change: dict) -> None:
        if self.observable == "scattering":
            self._redraw(keep_band=True)

    def _on_excluded(self, change: dict) -> None:
        if self.observable != "photoelectron":
            self._redraw(keep_band=True)

    def _redraw(self, keep_band: bool = False) -> None:
        observable = self.observable
        self.kind.disabled = observable != "scattering"
        self.x_axis.label = OBSERVABLES[observable].axis_label
        self.color_axis.label = OBSERVABLES[observable].color_label
        try:
            m = self.compute(observable)
        except ValueError as exc:  # e.g. no transition strengths: say so, keep the switch
            self.current_map = None
            self.status.value = f"<span class='ensemblelab-observable-error'>" \
                                f"{html.escape(str(exc))}</span>"
            self.heatmap.color = np.zeros((3, 3))
            return
        self.current_map = m
        axis, delays, values = map_values(m)
        finite = values[np.isfinite(values)]
        top = float(np.abs(finite).max()) if finite.size else 1.0
        top = top if top > 0 else 1.0
        with self.figure.hold_sync():
            self.c.min, self.c.max = -top, top
            self.color_axis.tick_values = np.linspace(-top, top, 5)  # zero in the middle
            self.heatmap.x, self.heatmap.y = axis, delays
            self.heatmap.color = np.nan_to_num(values)
            self.x.min, self.x.max = float(axis[0]), float(axis[-1])
            self.y.min, self.y.max = float(delays[0]), float(delays[-1])
        if keep_band and self.band is not None:
            a = self.band.analysis
            self.select(a.energy_range, a.delay_range)
        elif not keep_band:
            self.band_label.value = ("<i>Drag a box over a band to see what makes it.</i>")

    def _on_brushing(self, change: dict) -> None:
        if change["new"]:  # still dragging
            return
        sx, sy = self.brush.selected_x, self.brush.selected_y
        if sx is None or sy is None or len(sx) < 2 or len(sy) < 2:
            return
        a_rng = (float(sx[0]), float(sx[-1]))
        d_rng = (float(sy[0]), float(sy[-1]))
        if a_rng[0] == a_rng[1] or d_rng[0] == d_rng[1] or self.current_map is None:
            return
        self.select(a_rng, d_rng)

    def _draw_box(self, a: Any, d: Any) -> None:
        if a is None or d is None:
            self.box.x, self.box.y = np.zeros(0), np.zeros(0)
            return
        self.box.x = np.array([a[0], a[1], a[1], a[0], a[0]])
        self.box.y = np.array([d[0], d[0], d[1], d[1], d[0]])
