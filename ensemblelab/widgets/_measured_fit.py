"""The map view's channel fit: per-channel ionisation shifts, time zero and their intervals.

A button runs :func:`ensemblelab.fit_measured_map` on the view's ensemble (without its
excluded trajectories) with the view's pulses, resolution and trajectory weights, with
covariance (Wald) intervals. Inside a kernel the fit runs in a worker thread
(:class:`~._background.BackgroundJobs`); the status line says it runs. The fitted numbers
are shown beside the residual, and the residual layer can show measured - fitted model.
"""

from __future__ import annotations

import html
import math
import warnings
from collections.abc import Callable
from typing import Any

import ipywidgets as widgets

from ._background import BackgroundJobs

__all__ = ["MeasuredFitPanel", "RESIDUAL_CHOICES", "fit_text"]

#: what the residual layer subtracts from the measured map
RESIDUAL_CHOICES = ("quick comparison", "channel fit")


def _num(x: float) -> str:
    return f"{x:.3g}" if math.isfinite(x) else "n/a"


def fit_text(result: Any) -> str:
    """The fit's numbers as compact HTML: value [interval] per parameter, then R^2.

    Parameters
    ----------
    result : MeasuredFitResult

    Returns
    -------
    str
        One line per parameter group; fixed parameters say so, a missing interval says why.
    """
    pct = int(round(float(result.ci) * 100))
    labels = {"time_zero": "time zero", "xcorr_fwhm": "cross-correlation FWHM",
              "scale": "scale", "background": "background"}
    shifts: list[str] = []
    others: list[str] = []
    for r in result.parameters.itertuples():
        name = str(r.parameter)
        label = (f"shift {name[len('shift_'):]}" if name.startswith("shift_")
                 else labels.get(name, name))
        unit = f" {r.unit}" if str(r.unit) not in ("", "1") else ""  # no unit: none shown
        if bool(r.fixed):
            iv = " (fixed)"
        elif math.isfinite(r.lower) and math.isfinite(r.upper):
            iv = f" [{_num(r.lower)}, {_num(r.upper)}]"
        else:
            iv = " (no interval: not computed)"
        (shifts if name.startswith("shift_") else others).append(
            f"{html.escape(label)} {_num(r.value)}{html.escape(unit)}{iv}")
    method = str(result.interval_method).split(" (")[0]
    notes = "".join(f"<br><i>note: {html.escape(str(n))}</i>" for n in result.notes)
    return (f"<b>channel fit</b> ({pct}% intervals, {html.escape(method)}; "
            f"{result.n_points} pixels)<br>" + " · ".join(shifts) + "<br>"
            + " · ".join(others) + f" · R² = {result.r2:.3f} (a score, no interval)" + notes)


class MeasuredFitPanel:
    """Button, residual choice and numbers of the channel fit of a :class:`~.map_view.MapView`.

    Parameters
    ----------
    view : MapView
        Gives the ensemble, exclusions, pulses, resolution, weights and measured map.
    redraw : callable
        Redraws the view's map; called with a change dict (as a trait observer).
    background : bool, optional
        Fit in a worker thread (default: when a kernel's event loop is running).

    Attributes
    ----------
    button : ipywidgets.Button
        "fit per-channel shifts".
    residual_choice : ipywidgets.ToggleButtons
        What the residual layer shows (:data:`RESIDUAL_CHOICES`).
    label : ipywidgets.HTML
        The fit's numbers (:func:`fit_text`).
    jobs : BackgroundJobs
        Runs the fit; ``jobs.status`` says it runs, ``jobs.wait()`` waits for it.
    result : MeasuredFitResult or None
        The last fit.
    widget : ipywidgets.VBox
        Everything above; hidden without a measured map.
    """

    def __init__(self, view: Any, redraw: Callable[[dict], Any], *,
                 background: bool | None = None) -> None:
        self.view = view
        self._redraw_view = redraw
        self.result: Any = None
        self._fitted_map: Any = None  # the simulated map shown when the fit ran
        self.button = widgets.Button(description="fit per-channel shifts", icon="sliders",
                                     tooltip="fit each cation channel's ionisation shift, "
                                             "time zero, cross-correlation, scale and "
                                             "background to the measured map",
                                     layout=widgets.Layout(width="200px"))
        self.residual_choice = widgets.ToggleButtons(
            options=list(RESIDUAL_CHOICES), value=RESIDUAL_CHOICES[0],
            description="residual vs", style={"button_width": "130px"},
            tooltips=["measured − scaled model (one rigid shift)",
                      "measured − model of the channel fit"])
        self.residual_choice.disabled = True
        self.label = widgets.HTML(layout=widgets.Layout(max_width="900px"))
        self.label.add_class("ensemblelab-fit-numbers")
        self.jobs = BackgroundJobs(view.messages, background=background)
        self.button.on_click(view.messages.guard(lambda _b: self.run(), where="channel fit"))
        self.residual_choice.observe(view.messages.guard(self._redraw), names="value")
        self.widget = widgets.VBox([widgets.HBox([self.button, self.jobs.status]),
                                    self.residual_choice, self.label])
        self.widget.layout.display = None if view.measured is not None else "none"

    def fit_kwargs(self) -> dict[str, Any]:
        """Keyword arguments of ``fit_measured_map`` from the view's controls."""
        probe, pump = self.view.pulses()
        tk = self.view.trpes_kwargs
        kwargs: dict[str, Any] = {"probe": probe, "pump": pump,
                                  "resolution": float(self.view.resolution.value),
                                  "interval": "covariance", "progress": False}
        weights = tk.get("weights", "uniform" if pump is None else None)
        if weights is not None:
            kwargs["weights"] = weights
        if "cross_section" in tk:
            kwargs["cross_section"] = tk["cross_section"]
        return kwargs

    def run(self) -> None:
        """Run the fit (in the background inside a kernel) and show its numbers."""
        from ..compute.spectroscopy.fit_measured import fit_measured_map

        view = self.view
        if view.measured is None:
            return
        ens = view.model.ens
        excluded = sorted(int(t) for t in view.model.excluded)
        if excluded:
            ens = ens.without(excluded)
        kwargs = self.fit_kwargs()
        measured, shown = view.measured, view.model.trpes_map

        def compute() -> Any:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")  # the quick comparison already warns
                    return fit_measured_map(ens, measured, **kwargs)
            except Exception as exc:  # noqa: BLE001 - handed to apply, shown there
                return exc

        def apply(result: Any) -> None:
            self.button.disabled = False
            if isinstance(result, Exception):
                self.label.value = "<i>the channel fit failed (see the messages)</i>"
                view.messages.exception(result, where="channel fit")
                return
            self.result, self._fitted_map = result, shown
            self.residual_choice.disabled = False
            self._redraw()

        self.button.disabled = True
        self.label.value = "<i>fitting ...</i>"
        self.jobs.done.clear()
        self.jobs.run([("fitting per-channel shifts", compute, apply)])

    def current(self) -> bool:
        """Whether the last fit was made for the map shown now (same controls, exclusions)."""
        return self.result is not None and self._fitted_map is self.view.model.trpes_map

    def residual(self) -> Any:
        """Measured - fitted model when chosen and current, else None (quick comparison)."""
        if self.residual_choice.value == RESIDUAL_CHOICES[1] and self.current():
            return self.result.residual
        return None

    def refresh_label(self) -> None:
        """Show the last fit's numbers, saying so when they belong to earlier settings."""
        if self.result is not None:
            stale = "" if self.current() else (
                "<br><i>made for earlier settings or exclusions: fit again</i>")
            self.label.value = fit_text(self.result) + stale

    def _redraw(self, change: Any = None) -> None:
        self.refresh_label()
        self._redraw_view({})
