"""Map view: the TRPES map with a box selection of a band, decompositions, cuts and controls."""

from __future__ import annotations

import warnings
from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np

from ..data.ensemble import Ensemble
from ._base import View
from ._map_cache import LiveMaps, default_delays, default_energies
from ._measured_fit import MeasuredFitPanel  # channel fit (own module)
from ._messages import MessageArea
from ._selection import SelectionModel
from ._small_maps import (
    DELAY,
    ENERGY,
    INTENSITY,
    INTENSITY_ARB,
    RESIDUAL,
    ColorBar,
    SmallMaps,
    comparison_text,
    cut_text,
    outside,
    range_mask,
    set_round_ticks,
)
from ._uncertainty_view import UncertaintyView  # uncertainty hook (issue 17)
from ._util import Debouncer, busy, legend_html

__all__ = ["MapView", "DECOMPOSITIONS"]

#: decomposition menu: label -> ``decompose`` argument of compute_trpes
DECOMPOSITIONS = {
    "total": None,
    "neutral state": "neutral",
    "cation state": "cation",
    "state pair": "pair",
    "diabatic pair": "diabatic",
}

_MAX_SMALL_MAPS = 12
#: energy-axis menu: what the map's kinetic-energy axis spans
ENERGY_WINDOWS = ("with signal", "full grid")


def _heatmap(x_scale: Any, y_scale: Any, c_scale: Any, energies: np.ndarray,
             delays: np.ndarray, values: np.ndarray) -> bqplot.HeatMap:
    return bqplot.HeatMap(x=energies, y=delays, color=values,
                          scales={"x": x_scale, "y": y_scale, "color": c_scale})


class MapView(View):
    """The simulated TRPES map; a drawn box selects a band for the other views.

    Recomputes (debounced) when a pulse control or the exclusions change and
    writes the new map to ``model.trpes_map``; a finished box drag calls
    ``model.select_band``.

    Parameters
    ----------
    model : SelectionModel or Ensemble
        Shared selection state.
    photon_energy : float, optional
        Probe photon energy in eV (default: ``ens.metadata["suggested_probe"]``,
        else 5.0).
    probe_fwhm, pump_fwhm : float, optional
        Intensity FWHM of probe and pump in fs (``pump_fwhm=0``: no pump);
        defaults from ``suggested_probe``/``suggested_pump`` in the metadata, else 30.
    n_photons : int
        Probe photons per ionisation.
    resolution : float
        Instrument energy resolution (FWHM) in eV.
    convolve : bool
        Convolve with the pump-probe cross-correlation.
    kinetic_energies, delays : array_like, optional
        Kinetic-energy grid (eV) and delay grid (fs) of the map.
    decomposition : str
        One of :data:`DECOMPOSITIONS`.
    energy_window : {"with signal", "full grid"} or (float, float), optional
        Kinetic-energy range shown: where the map has signal (default for the
        default grid, from :func:`ensemblelab.compute.spectroscopy.extent.signal_extent`),
        the whole grid (default when `kinetic_energies` is given), or a range in eV.
    measured : TRPESMap, optional
        A measured map; shown on request with the residual.
    trpes_kwargs : dict, optional
        Further keyword arguments of :func:`ensemblelab.compute.spectroscopy.compute_trpes`
        (``weights``, ``cross_section``, ``normalise``).
    debounce : float
        Seconds of quiet after a control change before recomputing.
    compute : bool
        Compute the first map at once (else wait for :meth:`recompute`).
    messages : MessageArea, optional
        Where callback errors go.

    Attributes
    ----------
    figure : bqplot.Figure
        The main map; ``figure.interaction`` is the :class:`bqplot.interacts.BrushSelector`.
    heatmap : bqplot.HeatMap
    brush : bqplot.interacts.BrushSelector
    small_maps : SmallMaps
        Small maps of the decomposition on a shared, labelled colour scale.
    grid : ipywidgets.GridBox
        Their grid (``small_maps.grid``).
    color_axis : bqplot.ColorAxis
        The map's colour bar (labelled with the quantity and its unit, round ticks).
    energy_axis : ipywidgets.Dropdown
        What the kinetic-energy axis spans (:data:`ENERGY_WINDOWS`).
    delay_cut, energy_cut : bqplot.Figure
        Spectrum averaged over the selected delays; trace averaged over the selected
        energies; simulated and measured lines with a legend.
    cut_caption : ipywidgets.HTML
        The ranges the cuts average over.
    comparison_label : ipywidgets.HTML
        With a measured map: the residual's sign and the comparison's numbers.
    status : ipywidgets.HTML
        Progress of a recomputation.
    n_computed : int
        How many maps were computed (for tests and benchmarks).
    live : LiveMaps
        The stick cache of fast redraws (``live.cache.rebuilds``).
    """

    title = "map view"

    def __init__(
        self,
        model: SelectionModel | Ensemble,
        *,
        photon_energy: float | None = None,
        probe_fwhm: float | None = None,
        pump_fwhm: float | None = None,
        n_photons: int = 1,
        resolution: float = 0.0,
        convolve: bool = True,
        kinetic_energies: Any = None,
        delays: Any = None,
        decomposition: str = "total",
        energy_window: Any = None,
        measured: Any = None,
        trpes_kwargs: dict[str, Any] | None = None,
        debounce: float = 0.3,
        compute: bool = True,
        messages: MessageArea | None = None,
    ) -> None:
        super().__init__(model, messages=messages)
        meta = self.model.ens.metadata
        probe_meta = meta.get("suggested_probe") or {}
        pump_meta = meta.get("suggested_pump") or {}
        if photon_energy is None:
            photon_energy = float(probe_meta.get("photon_energy", 5.0))
        if probe_fwhm is None:
            probe_fwhm = float(probe_meta.get("fwhm", 30.0))
        if pump_fwhm is None:
            pump_fwhm = float(pump_meta.get("fwhm", 30.0))
        self.pump_photon_energy = pump_meta.get("photon_energy")
        if decomposition not in DECOMPOSITIONS:
            raise ValueError(
                f"decomposition must be one of {list(DECOMPOSITIONS)}; got {decomposition!r}."
            )
        self.trpes_kwargs = dict(trpes_kwargs or {})
        self.measured = measured
        self.n_computed = 0
        self.live = LiveMaps()
        self._fixed_energies = (None if kinetic_energies is None
                                else np.asarray(kinetic_energies, float))
        self._fixed_delays = None if delays is None else np.asarray(delays, float)

        style = {"description_width": "initial"}
        lay = widgets.Layout(width="190px")
        self.photon_energy = widgets.BoundedFloatText(
            value=photon_energy, min=0.1, max=100.0, step=0.1, description="probe hν / eV",
            style=style, layout=lay)
        self.probe_fwhm = widgets.BoundedFloatText(
            value=probe_fwhm, min=0.1, max=1e4, step=5.0, description="probe FWHM / fs",
            style=style, layout=lay)
        self.pump_fwhm = widgets.BoundedFloatText(
            value=pump_fwhm, min=0.0, max=1e4, step=5.0, description="pump FWHM / fs",
            style=style, layout=lay)
        self.n_photons = widgets.BoundedIntText(
            value=n_photons, min=1, max=4, description="probe photons", style=style, layout=lay)
        self.resolution = widgets.BoundedFloatText(
            value=resolution, min=0.0, max=10.0, step=0.01, description="resolution / eV",
            style=style, layout=lay)
        self.convolve = widgets.Checkbox(value=convolve, description="convolve", indent=False)
        self.decomposition = widgets.Dropdown(options=list(DECOMPOSITIONS), value=decomposition,
                                              description="show", layout=widgets.Layout(
                                                  width="220px"))
        self.layer = widgets.ToggleButtons(
            options=["simulated", "measured", "residual"], value="simulated",
            style={"button_width": "88px"}, disabled=measured is None,
            tooltips=["the simulated map", "the measured map (resampled)",
                      "measured − model (scaled)"])
        self._window: tuple[float, float] | None = None
        options = list(ENERGY_WINDOWS)
        if isinstance(energy_window, str):
            if energy_window not in ENERGY_WINDOWS:
                raise ValueError(f"energy_window must be one of {list(ENERGY_WINDOWS)} or "
                                 f"(low, high) in eV; got {energy_window!r}.")
            window_value = energy_window
        elif energy_window is not None:
            lo_w, hi_w = (float(v) for v in energy_window)
            if not hi_w > lo_w:
                raise ValueError(f"energy_window must be (low, high) with low < high; got "
                                 f"{energy_window!r}.")
            self._window = (lo_w, hi_w)
            options.append("as set")
            window_value = "as set"
        else:
            window_value = "full grid" if kinetic_energies is not None else "with signal"
        self.energy_axis = widgets.Dropdown(options=options, value=window_value,
                                            description="energies",
                                            layout=widgets.Layout(width="200px"))
        self.comparison_label = widgets.HTML(layout=widgets.Layout(max_width="900px"))
        self.comparison_label.add_class("ensemblelab-comparison")
        self.cut_caption = widgets.HTML(layout=widgets.Layout(max_width="300px"))
        self.cut_caption.add_class("ensemblelab-cut-caption")
        self.status = widgets.HTML()
        self.status.add_class("ensemblelab-map-status")
        self.fit_panel = MeasuredFitPanel(self, self._on_layer_change)  # channel fit, numbers
        self.band_label = widgets.HTML()
        self.band_label.add_class("ensemblelab-band-label")

        # main map
        self.x = bqplot.LinearScale()
        self.y = bqplot.LinearScale()
        self.c = bqplot.ColorScale(scheme="viridis")
        e0 = np.linspace(0, 1, 3)
        self.heatmap = _heatmap(self.x, self.y, self.c, e0, e0, np.zeros((3, 3)))
        self.box = bqplot.Lines(x=np.zeros(0), y=np.zeros(0), scales={"x": self.x, "y": self.y},
                                colors=["white"], stroke_width=2.0, line_style="dashed")
        self.brush = bqplot.interacts.BrushSelector(x_scale=self.x, y_scale=self.y,
                                                    color="white")
        self.x_axis = ax = bqplot.Axis(scale=self.x, label=ENERGY)
        self.y_axis = ay = bqplot.Axis(scale=self.y, side="left", label=DELAY)
        # the colour bar: its own figure beside the map (label along it, round ticks)
        self.colorbar = ColorBar(self.c, height=420, margin_top=20, margin_bottom=45)
        self.colorbar.figure.add_class("ensemblelab-map-colorbar")
        self.color_axis = self.colorbar.axis
        self.figure = bqplot.Figure(
            marks=[self.heatmap, self.box], axes=[ax, ay], interaction=self.brush,
            layout=widgets.Layout(width="500px", height="420px"),
            fig_margin={"top": 20, "bottom": 45, "left": 60, "right": 15},
            padding_x=0, padding_y=0, display_toolbar=False,  # no toolbar over the map
        )
        self.figure.add_class("ensemblelab-map")

        # decomposition grid (filled on demand, panels reused)
        self.small_maps = SmallMaps()
        self.grid = self.small_maps.grid

        # cuts
        self.cx = bqplot.LinearScale()
        self.cy = bqplot.LinearScale(min=0.0)
        self.tx = bqplot.LinearScale()
        self.ty = bqplot.LinearScale(min=0.0)
        def line(x_scale: Any, y_scale: Any, color: str, label: str) -> bqplot.Lines:
            return bqplot.Lines(x=e0, y=np.zeros(3), scales={"x": x_scale, "y": y_scale},
                                colors=[color], labels=[label])

        self.delay_cut_line = line(self.cx, self.cy, "#1f77b4", "simulated")
        self.delay_cut_measured = line(self.cx, self.cy, "black", "measured")
        self.energy_cut_line = line(self.tx, self.ty, "#1f77b4", "simulated")
        self.energy_cut_measured = line(self.tx, self.ty, "black", "measured")
        for mark in (self.delay_cut_measured, self.energy_cut_measured):
            mark.visible = measured is not None
        self.cut_legend = widgets.HTML(legend_html(
            [("simulated", "#1f77b4", "solid")]
            + ([("measured (scaled to the model)", "black", "solid")] if measured is not None
               else [])))
        self.cut_legend.add_class("ensemblelab-cut-legend")
        small = widgets.Layout(width="300px", height="210px")
        margin = {"top": 10, "bottom": 40, "left": 60, "right": 10}
        self._cut_axes = {
            "cx": bqplot.Axis(scale=self.cx, label=ENERGY),
            "cy": bqplot.Axis(scale=self.cy, side="left", label=INTENSITY),
            "tx": bqplot.Axis(scale=self.tx, label=DELAY),
            "ty": bqplot.Axis(scale=self.ty, side="left", label=INTENSITY)}
        self.delay_cut = bqplot.Figure(
            marks=[self.delay_cut_line, self.delay_cut_measured], layout=small,
            fig_margin=margin, axes=[self._cut_axes["cx"], self._cut_axes["cy"]],
            display_toolbar=False)
        self.energy_cut = bqplot.Figure(
            marks=[self.energy_cut_line, self.energy_cut_measured], layout=small,
            fig_margin=margin, axes=[self._cut_axes["tx"], self._cut_axes["ty"]],
            display_toolbar=False)

        self.delay_cut.add_class("ensemblelab-delay-cut")
        self.energy_cut.add_class("ensemblelab-energy-cut")
        self.uncertainty = UncertaintyView(self, self._draw, self._cut_axes)  # uncertainty
        self._recompute_later = Debouncer(self._guard(self.recompute), delay=debounce)
        for w in (self.photon_energy, self.probe_fwhm, self.pump_fwhm, self.n_photons,
                  self.resolution, self.convolve, self.decomposition):
            w.observe(lambda change: self._recompute_later(), names="value")
        self.layer.observe(self._guard(self._on_layer_change), names="value")
        self.energy_axis.observe(self._guard(self._on_layer_change), names="value")
        self.brush.observe(self._guard(self._on_brushing_change), names="brushing")
        self._observe(self._on_excluded_change, "excluded")
        self._observe(self._on_map_change, "trpes_map")
        self._observe(self._on_range_change, ["energy_range", "delay_range"])

        controls = widgets.VBox([
            widgets.HBox([self.photon_energy, self.n_photons, self.probe_fwhm]),
            widgets.HBox([self.pump_fwhm, self.resolution, self.convolve]),
            widgets.HBox([self.decomposition, self.energy_axis, self.status]),
            widgets.HBox([self.layer, self.uncertainty.widget]),
        ])
        cuts = widgets.VBox([self.cut_legend, self.delay_cut, self.energy_cut, self.cut_caption])
        self._finish(controls, widgets.HBox([self.figure, self.colorbar.figure, cuts]),
                     self.band_label,
                     self.comparison_label, self.fit_panel.widget, self.small_maps.widget)
        if compute:
            if self.model.trpes_map is None:
                self.recompute()
            else:
                self._draw(self.model.trpes_map)

    # ------------------------------------------------------------------ compute
    def pulses(self) -> tuple[Any, Any]:
        """The probe and pump pulses set by the controls (pump None when its FWHM is 0)."""
        from ..compute.spectroscopy.pulses import GaussianPulse

        probe = GaussianPulse(photon_energy=float(self.photon_energy.value),
                              fwhm=float(self.probe_fwhm.value),
                              n_photons=int(self.n_photons.value))
        pump = None
        if float(self.pump_fwhm.value) > 0:
            hv = self.pump_photon_energy if self.pump_photon_energy is not None else \
                float(self.photon_energy.value)
            pump = GaussianPulse(photon_energy=float(hv), fwhm=float(self.pump_fwhm.value))
        return probe, pump

    def flush(self) -> None:
        """Run a pending (debounced) recomputation now."""
        self._recompute_later.flush()

    def grids(self) -> tuple[np.ndarray, np.ndarray]:
        """Kinetic-energy grid (eV) and delay grid (fs) of the map."""
        probe, pump = self.pulses()
        energies = self._fixed_energies
        if energies is None:
            energies = default_energies(probe.photon_energy, probe.n_photons)
        delays = self._fixed_delays
        if delays is None:
            fwhm_cc = float(np.hypot(probe.fwhm, pump.fwhm if pump is not None else 0.0))
            delays = default_delays(self.model.ens, fwhm_cc)
        return energies, delays

    def recompute(self) -> Any:
        """Compute the map of ``model.ens`` without ``model.excluded`` (``exclude=``, a mask,
        no copy) with the current controls; returns it. A new probe width, resolution or
        photon energy redraws from cached sticks (:class:`._map_cache.LiveMaps`)."""
        probe, pump = self.pulses()
        energies, delays = self.grids()
        kwargs = dict(self.trpes_kwargs)
        if pump is None and "weights" not in kwargs:
            kwargs["weights"] = "uniform"
        with busy(self.status, "computing the map ..."), \
                warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            trpes, sticks = self.live.compute(
                self.model, probe=probe, pump=pump, kinetic_energies=energies, delays=delays,
                resolution=float(self.resolution.value), convolve=bool(self.convolve.value),
                decompose=DECOMPOSITIONS[self.decomposition.value], kwargs=kwargs)
        for w in caught:
            self.messages.warning(f"map: {w.message}")
        self.n_computed += 1
        if sticks is not None:
            self.model.remember_stick_model(trpes, sticks)
        self.model.trpes_map = trpes
        return trpes

    # ------------------------------------------------------------------ handlers
    def _on_excluded_change(self, change: dict) -> None:
        self._recompute_later()

    def _on_map_change(self, change: dict) -> None:
        if change["new"] is not None:
            self._draw(change["new"])

    def _on_layer_change(self, change: dict) -> None:
        if self.model.trpes_map is not None:
            self._draw(self.model.trpes_map)

    def _on_brushing_change(self, change: dict) -> None:
        if change["new"]:  # still dragging
            return
        sx, sy = self.brush.selected_x, self.brush.selected_y
        if sx is None or sy is None or len(sx) < 2 or len(sy) < 2:
            return
        e_rng = (float(sx[0]), float(sx[-1]))
        d_rng = (float(sy[0]), float(sy[-1]))
        if e_rng[0] == e_rng[1] or d_rng[0] == d_rng[1]:
            return
        self.model.select_band(energy_range=e_rng, delay_range=d_rng)

    def _on_range_change(self, change: dict) -> None:
        self._draw_box()
        self._draw_cuts()

    # ------------------------------------------------------------------ drawing
    def comparison(self) -> Any:
        """The fit of the shown map to the measured one (``compare_maps``), or None."""
        trpes = self.model.trpes_map
        if self.measured is None or trpes is None:
            return None
        cached = getattr(self, "_comparison", None)
        if cached is not None and cached[0] is trpes:
            return cached[1]
        from ..compute.spectroscopy.compare import compare_maps

        result = compare_maps(trpes, self.measured)
        self._comparison = (trpes, result)
        return result

    def _layer(self, trpes: Any) -> Any:
        """The map drawn: simulated, measured (resampled) or residual (measured - model)."""
        if self.layer.value == "simulated" or self.measured is None:
            return trpes
        if self.layer.value == "residual" and self.fit_panel.residual() is not None:
            return self.fit_panel.residual()  # measured - model of the channel fit
        result = self.comparison()
        return result.measured if self.layer.value == "measured" else result.residual

    def _draw(self, trpes: Any) -> None:
        shown = self._layer(trpes)
        values = np.asarray(shown.intensity, dtype=float)
        energies = np.asarray(shown.kinetic_energies, float)
        delays = np.asarray(shown.delays, float)
        finite = values[np.isfinite(values)]
        lo = float(finite.min()) if finite.size else 0.0
        hi = float(finite.max()) if finite.size else 1.0
        if self.layer.value == "residual":
            m = max(abs(lo), abs(hi), 1e-300)
            lo, hi = -m, m
        elif lo < 0 and abs(lo) < 1e-4 * abs(hi):
            lo = 0.0  # numerical tails of the broadening kernel: not worth a colour
        hi = hi if hi > lo else lo + 1.0
        window = self.energy_window(trpes)
        # one set of axes for every layer: the simulated map's grid
        d_sim = np.asarray(trpes.delays, float)
        with self.figure.hold_sync():
            self.c.scheme = "RdBu" if self.layer.value == "residual" else "viridis"
            self.c.min, self.c.max = lo, hi
            self.heatmap.x = energies
            self.heatmap.y = delays
            self.heatmap.color = np.nan_to_num(values)
            self.x.min, self.x.max = window
            self.y.min, self.y.max = float(d_sim[0]), float(d_sim[-1])
            set_round_ticks(self.x_axis, *window, 6)
            set_round_ticks(self.y_axis, float(d_sim[0]), float(d_sim[-1]), 6)
        self.colorbar.draw(lo, hi, {"residual": RESIDUAL, "measured": INTENSITY_ARB}.get(
            self.layer.value if self.measured is not None else "", INTENSITY))
        self._draw_grid(trpes)
        self._draw_comparison()
        self._draw_box()
        self._draw_cuts()

    def energy_window(self, trpes: Any = None) -> tuple[float, float]:
        """The kinetic-energy range shown (eV): see the `energy_window` parameter."""
        trpes = self.model.trpes_map if trpes is None else trpes
        e = np.asarray(trpes.kinetic_energies, float)
        full = (float(e[0]), float(e[-1]))
        choice = self.energy_axis.value
        if choice == "as set" and self._window is not None:
            return self._window
        if choice == "with signal":
            from ..compute.spectroscopy.extent import signal_extent

            lo, hi = signal_extent(trpes, axis="energy")
            if hi > lo:
                return (max(full[0], float(lo)), min(full[1], float(hi)))
        return full

    def _draw_comparison(self) -> None:
        """The residual's sign and the comparison's numbers (with a measured map)."""
        self.fit_panel.refresh_label()
        if self.measured is None or self.layer.value == "simulated":
            self.comparison_label.value = ""
            return
        self.comparison_label.value = comparison_text(self.comparison(),
                                                      residual=self.layer.value == "residual")

    def _draw_grid(self, trpes: Any) -> None:
        comps = dict(getattr(trpes, "components", {}) or {})
        if DECOMPOSITIONS[self.decomposition.value] is None or not comps:
            self.small_maps.clear()
            return
        names = list(comps)[:_MAX_SMALL_MAPS]
        stack = np.stack([np.asarray(comps[k], float) for k in names])
        self.small_maps.draw(names, stack, np.asarray(trpes.kinetic_energies, float),
                             np.asarray(trpes.delays, float), self.energy_window(trpes))

    def _draw_box(self) -> None:
        e, d = self.model.energy_range, self.model.delay_range
        if e is None or d is None:
            self.box.x, self.box.y = np.zeros(0), np.zeros(0)
            if not self.brush.brushing:
                self.brush.selected_x, self.brush.selected_y = None, None
            self.band_label.value = "<i>Drag a box over a band to see what makes it.</i>"
            return
        lo, hi = (self.x.min, self.x.max)
        hidden = lo is not None and hi is not None and (e[1] < lo or e[0] > hi)
        if hidden:  # the band lies outside the energies shown: no box clipped at the edge
            self.box.x, self.box.y = np.zeros(0), np.zeros(0)
        else:
            self.box.x = np.array([e[0], e[1], e[1], e[0], e[0]])
            self.box.y = np.array([d[0], d[0], d[1], d[1], d[0]])
        if not self.brush.brushing:  # the brush moves with the data (no ghost box)
            with self.figure.hold_sync():
                self.brush.selected_x = None if hidden else np.array(e, dtype=float)
                self.brush.selected_y = None if hidden else np.array(d, dtype=float)
        band = self.model.band
        empty = band is not None and bool(band.attrs.get("no_signal", False))
        self.band_label.value = (
            f"band: {e[0]:.2f}–{e[1]:.2f} eV, {d[0]:.0f}–{d[1]:.0f} fs"
            + (" · <i>no signal here</i>" if empty else "")
            + (" · <i>outside the energies shown</i>" if hidden else ""))

    def cuts(self) -> tuple[np.ndarray, np.ndarray]:
        """Spectrum averaged over the selected delays and trace averaged over the energies.

        Returns
        -------
        spectrum : ndarray, shape (n_energies,)
        trace : ndarray, shape (n_delays,)
            Means over the selected ranges (over the whole map when none).
        """
        trpes = self.model.trpes_map
        values = np.asarray(trpes.intensity, float)
        d_mask = range_mask(np.asarray(trpes.delays, float), self.model.delay_range)
        e_mask = range_mask(np.asarray(trpes.kinetic_energies, float), self.model.energy_range)
        return values[d_mask].mean(axis=0), values[:, e_mask].mean(axis=1)

    def _draw_cuts(self) -> None:
        trpes = self.model.trpes_map
        if trpes is None:
            return
        spectrum, trace = self.cuts()
        e = np.asarray(trpes.kinetic_energies, float)
        d = np.asarray(trpes.delays, float)
        window = self.energy_window(trpes)
        measured_e: tuple[np.ndarray, np.ndarray] | None = None
        measured_d: tuple[np.ndarray, np.ndarray] | None = None
        if self.measured is not None:
            try:
                result = self.comparison()
            except Exception as exc:  # noqa: BLE001 - shown, the cuts still draw
                self.messages.exception(exc, where="measured map")
            else:
                # the measured cuts on the simulated scale, over the measured grid only; a
                # selection outside the measured grid shows no measured cut (not its edge)
                m = result.measured
                me, md = np.asarray(m.kinetic_energies, float), np.asarray(m.delays, float)
                values = np.nan_to_num(np.asarray(m.intensity, float)) / max(result.scale,
                                                                               1e-300)
                e_rng, d_rng = self.model.energy_range, self.model.delay_range
                if not outside(md, d_rng):
                    measured_e = (me, values[range_mask(md, d_rng)].mean(axis=0))
                if not outside(me, e_rng):
                    measured_d = (md, values[:, range_mask(me, e_rng)].mean(axis=1))
        with self.delay_cut.hold_sync(), self.energy_cut.hold_sync():
            self.delay_cut_line.x, self.delay_cut_line.y = e, spectrum
            self.energy_cut_line.x, self.energy_cut_line.y = d, trace
            for mark, data in ((self.delay_cut_measured, measured_e),
                               (self.energy_cut_measured, measured_d)):
                mark.visible = data is not None
                if data is not None:
                    mark.x, mark.y = data
            # the cuts span the map's axes (the energy window, every delay)
            self.cx.min, self.cx.max = window
            self.tx.min, self.tx.max = float(d[0]), float(d[-1])
            set_round_ticks(self._cut_axes["cx"], *window, 4)
            set_round_ticks(self._cut_axes["tx"], float(d[0]), float(d[-1]), 4)
            for axis, ys in ((self._cut_axes["cy"], [spectrum, measured_e]),
                             (self._cut_axes["ty"], [trace, measured_d])):
                top = max(float(np.nanmax(y if isinstance(y, np.ndarray) else y[1]))
                          for y in ys if y is not None and np.size(y))
                axis.scale.min, axis.scale.max = 0.0, (top if top > 0 else 1.0)
                set_round_ticks(axis, 0.0, top if top > 0 else 1.0, 4)
        self.cut_caption.value = self.cut_text()
        self.uncertainty.draw(trpes)  # uncertainty hook: its layer, bands on the cuts

    def cut_text(self) -> str:
        """What the cuts average over, as stated under them."""
        return cut_text(self.model.energy_range, self.model.delay_range)
