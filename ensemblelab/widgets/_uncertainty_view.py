"""The map view's uncertainty: a toggle, a "relative uncertainty" layer and bands on the cuts.

Off by default (the bootstrap recomputes the map ``n_boot`` times). When on, the shown
map's percentile bootstrap interval over whole trajectories is computed with the same
arguments as the map (its grids, pulses, decomposition and exclusions) in the
background (inside a kernel) or at once (plain Python, tests). A new map (controls,
exclusions) drops the interval and, with the toggle on, computes it again.

The cut bands are the percentile intervals *of the cuts*: every replicate map is
averaged over the cut's range and the percentiles are taken of those averages
(:func:`ensemblelab.compute.spectroscopy.replicates.cut_interval`), not the average of
the pixels' bounds (the quantile of a mean is not the mean of the quantiles).
"""

from __future__ import annotations

import html
import math
from collections.abc import Callable
from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np

from ._background import BackgroundJobs
from ._small_maps import nice_ticks, range_mask, set_round_ticks

__all__ = ["UncertaintyView", "REL_SE_LABEL", "LAYERS"]

#: colour-bar label of the relative-uncertainty layer
REL_SE_LABEL = "relative standard error / %"
#: what the main map shows: the view's own layer, or the relative standard error
LAYERS = ("map", "relative uncertainty")
#: pixels below this fraction of the peak are left out of the median and the colour range
SIGNAL_FRACTION = 0.05
#: colour scheme of the relative-uncertainty layer
LAYER_SCHEME = "YlOrRd"
_BAND = "#1f77b4"


def _band(line: bqplot.Lines) -> bqplot.Lines:
    """A shaded band (no outline) on the scales of `line`, hidden until drawn."""
    return bqplot.Lines(x=np.zeros(2), y=np.zeros((2, 2)), scales=dict(line.scales),
                        fill="between", colors=[_BAND, _BAND], fill_colors=[_BAND],
                        fill_opacities=[0.25], opacities=[0.0, 0.0], stroke_width=0.0,
                        visible=False)


class UncertaintyView:
    """The uncertainty controls of a map view and what they draw.

    Parameters
    ----------
    view : MapView
        The view whose map, cuts and colour bar are drawn on.
    redraw : callable
        Draws a map in the view (``redraw(trpes)``), this view's hooks included.
    cut_axes : dict of str to bqplot.Axis
        The cuts' intensity axes, ``"cy"`` (delay cut) and ``"ty"`` (energy cut).
    n_boot : int
        Bootstrap resamples of whole trajectories.
    ci : float
        Confidence level of the bands.
    random_state : int
        Seed of the resampling (the same interval every time for the same map).
    background : bool, optional
        Compute in a worker thread (default: when a kernel's event loop runs).

    Attributes
    ----------
    toggle : ipywidgets.ToggleButton
        "uncertainty", off by default.
    layer : ipywidgets.ToggleButtons
        :data:`LAYERS`; enabled once the interval is there.
    status : ipywidgets.HTML
        The median relative standard error of the map (pixels above 5 % of the peak).
    widget : ipywidgets.HBox
        The controls, for the view's control area.
    interval : TRPESMap or None
        The shown map with ``lower`` / ``upper`` / ``rel_se`` (None until computed).
    replicates : ndarray, shape (n_boot, n_delays, n_energies), or None
    delay_band, energy_band : bqplot.Lines
        The bands on the delay cut (a spectrum) and the energy cut (a trace).
    n_computed : int
        How many intervals were computed.
    """

    def __init__(self, view: Any, redraw: Callable[[Any], None],
                 cut_axes: dict[str, bqplot.Axis], *, n_boot: int = 200, ci: float = 0.95,
                 random_state: int = 0, background: bool | None = None) -> None:
        self.view = view
        self._redraw, self._cut_axes = redraw, cut_axes
        self.n_boot, self.ci, self.random_state = int(n_boot), float(ci), int(random_state)
        self.toggle = widgets.ToggleButton(
            value=False, description="uncertainty", icon="",
            tooltip=f"bootstrap interval of the map ({self.n_boot} resamples of whole "
                    "trajectories): a layer of the relative standard error, bands on the cuts",
            layout=widgets.Layout(width="110px"))
        self.layer = widgets.ToggleButtons(options=list(LAYERS), value="map", disabled=True,
                                           style={"button_width": "150px"})
        self.status = widgets.HTML()
        self.status.add_class("ensemblelab-uncertainty-status")
        self._jobs = BackgroundJobs(view.messages, background=background)
        self.widget = widgets.HBox([self.toggle, self.layer, self.status, self._jobs.status])
        self.widget.add_class("ensemblelab-uncertainty")
        self.interval: Any = None
        self.replicates: np.ndarray | None = None
        self._source: Any = None  # the map the interval belongs to
        self._running = False
        self.n_computed = 0
        self.delay_band = _band(view.delay_cut_line)
        self.energy_band = _band(view.energy_cut_line)
        view.delay_cut.marks = [self.delay_band, *view.delay_cut.marks]
        view.energy_cut.marks = [self.energy_band, *view.energy_cut.marks]
        self.toggle.observe(view.messages.guard(self._on_toggle), names="value")
        self.layer.observe(view.messages.guard(self._on_layer), names="value")

    # ------------------------------------------------------------------ state
    @property
    def available(self) -> bool:
        """Whether the interval of the shown map is there."""
        trpes = self.view.model.trpes_map
        return self.interval is not None and trpes is not None and self._source is trpes

    def arguments(self, trpes: Any) -> dict[str, Any]:
        """Arguments of ``compute_trpes`` that made `trpes` (grids, pulses, exclusions from
        its ``params``; further ones from the view's ``trpes_kwargs``), without its
        decomposition (the total map is the same)."""
        from ..compute.spectroscopy.pulses import GaussianPulse

        p = trpes.params
        pump = None if p.get("pump") is None else GaussianPulse(**p["pump"])
        kwargs = dict(self.view.trpes_kwargs)
        if pump is None and "weights" not in kwargs:
            kwargs["weights"] = "uniform"  # as the view's recompute
        res = p.get("resolution", 0.0)
        return kwargs | {
            "probe": GaussianPulse(**p["probe"]), "pump": pump,
            "kinetic_energies": np.asarray(trpes.kinetic_energies, float),
            "delays": np.asarray(trpes.delays, float),
            "resolution": float(res) if isinstance(res, int | float) else
            float(self.view.resolution.value),
            # the total only: the layer and the cuts use it (components would multiply the
            # replicate memory by their number)
            "convolve": bool(p.get("convolve", True)), "decompose": None,
            "exclude": list(p.get("excluded") or []), "progress": False}

    def _invalidate(self) -> None:
        self.interval = self.replicates = self._source = None
        self.layer.disabled = True
        self.status.value = ""
        self.delay_band.visible = self.energy_band.visible = False

    def start(self) -> None:
        """Compute the interval of the shown map (in the background inside a kernel)."""
        trpes = self.view.model.trpes_map
        if trpes is None or self._running or self.available:
            return
        from ..compute.spectroscopy.replicates import trpes_with_replicates

        args = self.arguments(trpes)  # read on the widget thread
        n_boot, ci, seed = self.n_boot, self.ci, self.random_state

        def compute() -> Any:
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # the map's own warnings were shown with it
                try:
                    return trpes_with_replicates(self.view.model.ens, n_boot=n_boot, ci=ci,
                                                 random_state=seed, **args)
                except Exception as exc:  # noqa: BLE001 - reported on the widget thread
                    return exc

        self._running = True
        self._jobs.done.clear()
        self._jobs.run([(f"bootstrap interval of the map ({self.n_boot} resamples)", compute,
                         lambda result: self._apply(trpes, result))])

    def _apply(self, source: Any, result: Any) -> None:
        self._running = False
        if isinstance(result, Exception):
            self.toggle.value = False
            self.view.messages.exception(result, where="uncertainty of the map")
            return
        if source is not self.view.model.trpes_map:  # the map changed meanwhile
            if self.toggle.value:
                self.start()
            return
        self.interval, self.replicates = result
        self._source = source
        self.n_computed += 1
        self.layer.disabled = False
        med = self.interval.median_rel_se(threshold=SIGNAL_FRACTION)
        self.status.value = (
            "median relative standard error "
            + ("-" if med is None else f"<b>{100 * med:.1f} %</b>")
            + f" <i>(pixels above {100 * SIGNAL_FRACTION:.0f} % of the peak; "
            f"{self.n_boot} resamples of whole trajectories)</i>")
        if self.layer.value != "map":
            self._redraw(source)
        else:
            self.draw_bands()

    # ------------------------------------------------------------------ handlers
    def _on_toggle(self, change: dict) -> None:
        if change["new"]:
            if self.available:
                self.draw_bands()
            else:
                self.start()
            return
        self.layer.disabled = True
        self.delay_band.visible = self.energy_band.visible = False
        if self.layer.value != "map":
            self.layer.value = "map"  # redraws the map
        self.view.cut_caption.value = self.view.cut_text()

    def _on_layer(self, change: dict) -> None:
        if self.view.model.trpes_map is not None:
            self._redraw(self.view.model.trpes_map)

    # ------------------------------------------------------------------ drawing hooks
    def draw(self, trpes: Any) -> None:
        """Called by the view after it drew its cuts of `trpes` (after every map drawing):
        drop a stale interval (recompute when on), draw the relative-uncertainty layer
        when chosen and the view drew over it, and the bands."""
        if self._source is not None and self._source is not trpes:
            self._invalidate()
        if self.toggle.value and not self.available:
            self.start()  # at once without a kernel loop: the interval is there below
        if self.toggle.value and self.available and self.layer.value == "relative uncertainty" \
                and self.view.c.scheme != LAYER_SCHEME:  # the view drew its own layer
            self._draw_layer(trpes)
        self.draw_bands()

    def layer_values(self) -> tuple[np.ndarray, float]:
        """The relative standard error drawn (%, shape (n_delays, n_energies)) and the top of
        its colour scale: the round number above every pixel with signal (above 5 % of
        the peak); weaker pixels, and those without signal (NaN), are drawn at the top."""
        assert self.interval is not None and self.interval.rel_se is not None
        rel = 100.0 * np.asarray(self.interval.rel_se, float)
        intensity = np.abs(np.asarray(self.interval.intensity, float))
        peak = float(np.nanmax(intensity)) if intensity.size else 0.0
        signal = (intensity > SIGNAL_FRACTION * peak) & np.isfinite(rel)
        raw = float(rel[signal].max()) if signal.any() else 100.0
        raw = raw if raw > 0 else 1.0
        ticks = nice_ticks(0.0, raw, 5)
        step = float(ticks[1] - ticks[0]) if ticks.size > 1 else raw
        top = step * math.ceil(raw / step - 1e-9)
        return np.where(np.isfinite(rel), np.minimum(rel, top), top), top

    def _draw_layer(self, trpes: Any) -> None:
        view = self.view
        values, top = self.layer_values()
        with view.figure.hold_sync():
            view.c.scheme = LAYER_SCHEME
            view.c.min, view.c.max = 0.0, top
            view.heatmap.x = np.asarray(trpes.kinetic_energies, float)
            view.heatmap.y = np.asarray(trpes.delays, float)
            view.heatmap.color = values
        view.colorbar.draw(0.0, top, REL_SE_LABEL)

    def band_bounds(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Lower and upper bounds of the delay cut (``"delay"``: a spectrum, shape
        (n_energies,)) and the energy cut (``"energy"``: a trace, shape (n_delays,)) over
        the selected ranges, from the replicate maps."""
        from ..compute.spectroscopy.replicates import cut_interval

        assert self.replicates is not None and self.interval is not None
        model = self.view.model
        d_mask = range_mask(np.asarray(self.interval.delays, float), model.delay_range)
        e_mask = range_mask(np.asarray(self.interval.kinetic_energies, float),
                            model.energy_range)
        return {"delay": cut_interval(self.replicates, d_mask, axis="delay", ci=self.ci),
                "energy": cut_interval(self.replicates, e_mask, axis="energy", ci=self.ci)}

    def draw_bands(self) -> None:
        """Called by the view after it drew the cuts: the bands when on and available."""
        view = self.view
        if not (self.toggle.value and self.available):
            self.delay_band.visible = self.energy_band.visible = False
            return
        bounds = self.band_bounds()
        trpes = self.interval
        grids = {"delay": np.asarray(trpes.kinetic_energies, float),
                 "energy": np.asarray(trpes.delays, float)}
        axes = {"delay": self._cut_axes["cy"], "energy": self._cut_axes["ty"]}
        with view.delay_cut.hold_sync(), view.energy_cut.hold_sync():
            for key, mark in (("delay", self.delay_band), ("energy", self.energy_band)):
                lo, hi = bounds[key]
                mark.x, mark.y = grids[key], np.vstack([lo, hi])
                mark.visible = True
                scale = axes[key].scale
                top = float(np.nanmax(hi)) if hi.size else 0.0
                if scale.max is None or top > float(scale.max):  # the band fits on the axis
                    scale.max = top
                    set_round_ticks(axes[key], 0.0, top, 4)
        pct = f"{100 * self.ci:g} %"
        view.cut_caption.value = view.cut_text() + (
            f"<br><i>shaded: {html.escape(pct)} bootstrap interval of each cut (every one of "
            f"{self.n_boot} resamples of whole trajectories averaged over the range, then "
            "percentiles; not the average of the pixels' intervals)</i>")
