"""Static figures for TRPES maps: map with colour bar, decomposition grid, cuts, residual.

Headless: figures are :class:`matplotlib.figure.Figure` objects with the Agg canvas
(no pyplot, no display). Export with :func:`savefig` (PNG, SVG or PDF by suffix,
written atomically; PNG at 300 dpi by default).

Figures are sized for a journal column (``width="single"``, about 3.3 in, or
``"double"``, about 7 in; common practice). The map's cells are rasterised inside
vector files, so an SVG or PDF of a map stays small. The kinetic-energy axis
defaults to the range with signal (:func:`~ensemblelab.compute.spectroscopy.extent.
signal_extent`); pass ``energy_range="full"`` or ``(lo, hi)`` to choose another.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

from ..compute.spectroscopy.extent import signal_extent
from ..data.spectrum import TRPESMap
from ._style import (
    DELAY,
    KINETIC_ENERGY,
    intensity_label,
    kinetic_energies,
    label_colorbar,
    legend_fontsize,
    new_figure,
    round_ticks,
    short_label,
)
from .populations import savefig

__all__ = ["plot_map", "plot_components", "plot_cuts", "plot_residual", "savefig",
           "resolve_energy_range"]

#: Default threshold of the signal range: 1 % of the map's maximum.
SIGNAL_FRACTION = 0.01


def _mesh(ax: Any, m: TRPESMap, data: np.ndarray, **kw: Any):
    # rasterized: one image inside SVG/PDF instead of one path per cell
    return ax.pcolormesh(kinetic_energies(m), m.delays, data, shading="nearest",
                         rasterized=True, **kw)


def resolve_energy_range(m: TRPESMap, energy_range: Any = "signal", *,
                         signal_fraction: float = SIGNAL_FRACTION) -> tuple[float, float]:
    """The kinetic-energy range (eV) a figure of `m` shows.

    Parameters
    ----------
    m : TRPESMap
    energy_range : "signal", "full" or (float, float)
        ``"signal"``: where the total map exceeds `signal_fraction` of its maximum
        (padded, see :func:`~ensemblelab.compute.spectroscopy.extent.signal_extent`);
        ``"full"``: the whole grid; or explicit limits in eV.
    signal_fraction : float
        Threshold for ``"signal"``.

    Returns
    -------
    (float, float)
    """
    e = np.asarray(kinetic_energies(m), dtype=float)
    half = 0.5 * float(np.min(np.diff(e))) if e.size > 1 else 0.5
    if isinstance(energy_range, str):
        if energy_range == "full":
            return float(e[0]) - half, float(e[-1]) + half
        if energy_range == "signal":
            lo, hi = signal_extent(m, fraction=signal_fraction)
            return lo - half, hi + half
        raise ValueError(f"energy_range must be 'signal', 'full' or (lo, hi) in eV; got "
                         f"{energy_range!r}.")
    lo, hi = (float(v) for v in energy_range)
    if not hi > lo:
        raise ValueError(f"energy_range must be (lo, hi) with lo < hi; got {energy_range!r}.")
    return lo, hi


def plot_map(m: TRPESMap, *, component: str | None = None, ax: Any = None, cmap: str = "viridis",
             vmin: float | None = None, vmax: float | None = None, colorbar: bool = True,
             title: str | None = None, energy_range: Any = "signal",
             signal_fraction: float = SIGNAL_FRACTION, width: str | float = "single") -> Figure:
    """Plot a map (or one component) as delay vs kinetic energy with a labelled colour bar.

    Parameters
    ----------
    m : TRPESMap
    component : str, optional
        Label of a component; default the total intensity.
    ax : matplotlib Axes, optional
        Draw into it (its figure is returned).
    cmap, vmin, vmax : colour map and limits.
    colorbar : bool
        Draw a colour bar labelled with the quantity and its unit.
    title : str, optional
        Default: the component's label (no title for the total).
    energy_range : "signal", "full" or (float, float)
        Kinetic-energy range shown (see :func:`resolve_energy_range`).
    signal_fraction : float
        Threshold of the ``"signal"`` range, as a fraction of the map's maximum.
    width : {"single", "double"} or float
        Width of a new figure (journal column or inches).

    Returns
    -------
    Figure
    """
    data = m.intensity if component is None else m.components[component]
    if ax is None:
        fig = new_figure(width, aspect=0.8)
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    mesh = _mesh(ax, m, data, cmap=cmap, vmin=vmin, vmax=vmax)
    ax.set_xlim(*resolve_energy_range(m, energy_range, signal_fraction=signal_fraction))
    ax.set_xlabel(KINETIC_ENERGY)
    ax.set_ylabel(DELAY)
    text = title if title is not None else (component or "")
    if text:
        ax.set_title(text)
    round_ticks(ax)
    if colorbar:
        label_colorbar(fig.colorbar(mesh, ax=ax), intensity_label(m))
    return fig


def plot_components(m: TRPESMap, *, labels: Sequence[str] | None = None, ncols: int = 3,
                    cmap: str = "viridis", include_total: bool = True,
                    energy_range: Any = "signal", signal_fraction: float = SIGNAL_FRACTION,
                    width: str | float = "double") -> Figure:
    """Grid of component maps on one shared colour scale (and the total).

    One colour bar (labelled, with unit) serves every panel; axis labels sit on the
    outer panels only; panel titles are short (the label up to its first
    parenthesis), with the full labels in the figure's heading when shortened.

    Parameters
    ----------
    m : TRPESMap
        With components (``compute_trpes(..., decompose=...)``).
    labels : sequence of str, optional
        Components to show (default all).
    ncols : int
        Panels per row.
    cmap : str
    include_total : bool
        Add the total map as the first panel.
    energy_range : "signal", "full" or (float, float)
        Kinetic-energy range (see :func:`resolve_energy_range`; "signal" from the total).
    signal_fraction : float
    width : {"single", "double"} or float

    Returns
    -------
    Figure
    """
    labels = list(labels if labels is not None else m.components)
    panels = (["total"] if include_total else []) + labels
    if not panels:
        raise ValueError("the map has no components; compute it with decompose=...")
    arrays = [m.intensity if p == "total" else m.components[p] for p in panels]
    vmax = max(float(np.nanmax(a)) for a in arrays)
    vmin = min(0.0, min(float(np.nanmin(a)) for a in arrays))
    ncols = max(1, min(ncols, len(panels)))
    nrows = math.ceil(len(panels) / ncols)
    fig = new_figure(width, aspect=0.3 * nrows * 3.0 / ncols + 0.08)
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True)
    xlim = resolve_energy_range(m, energy_range, signal_fraction=signal_fraction)
    mesh: Any = None
    shortened = []
    for i, ax in enumerate(axes.ravel()):
        if i >= len(panels):
            ax.set_visible(False)
            continue
        mesh = _mesh(ax, m, arrays[i], cmap=cmap, vmin=vmin, vmax=vmax)
        short = short_label(panels[i])
        if short != panels[i]:
            shortened.append(f"{short}: {panels[i]}")
        ax.set_title(short)
        if i % ncols == 0:
            ax.set_ylabel(DELAY)
        # the bottom panel of each column carries the x label
        if i + ncols >= len(panels):
            ax.set_xlabel(KINETIC_ENERGY)
            ax.xaxis.set_tick_params(labelbottom=True)
        ax.set_xlim(*xlim)
        round_ticks(ax, nbins=4)
    label_colorbar(fig.colorbar(mesh, ax=axes, shrink=0.9),
                   intensity_label(m) + " (shared scale)")
    if shortened:
        fig.suptitle("; ".join(shortened), fontsize=legend_fontsize())
    return fig


def plot_cuts(m: TRPESMap, *, delays: Sequence[float] = (), energies: Sequence[float] = (),
              components: bool = False, width: str | float | None = None) -> Figure:
    """Spectra at chosen delays and transients at chosen energies (nearest grid points).

    Parameters
    ----------
    m : TRPESMap
    delays : sequence of float
        Delays (fs) of the spectra.
    energies : sequence of float
        Kinetic energies (eV) of the transients.
    components : bool
        Also draw the components (dashed).
    width : {"single", "double"} or float, optional
        Default single column for one panel, double for two.

    Returns
    -------
    Figure
    """
    n = int(bool(len(delays))) + int(bool(len(energies)))
    if n == 0:
        raise ValueError("give at least one delay or one energy to cut at.")
    e_axis = np.asarray(kinetic_energies(m))
    fig = new_figure(width if width is not None else ("single" if n == 1 else "double"),
                     aspect=0.75 if n == 1 else 0.4)
    axes = fig.subplots(1, n, squeeze=False)[0]
    ylabel = intensity_label(m)
    k = 0
    if len(delays):
        ax = axes[k]
        k += 1
        for d in delays:
            i = int(np.argmin(np.abs(m.delays - d)))
            ax.plot(e_axis, m.intensity[i], label=f"{m.delays[i]:g} fs")
            if components:
                for lab, arr in m.components.items():
                    ax.plot(e_axis, arr[i], lw=0.8, ls="--", label=f"{lab} @ {m.delays[i]:g}")
        ax.set_xlim(*resolve_energy_range(m))
        ax.set_xlabel(KINETIC_ENERGY)
        ax.set_ylabel(ylabel)
        round_ticks(ax)
        ax.legend(fontsize=legend_fontsize(), frameon=False, loc="best")
    if len(energies):
        ax = axes[k]
        for e in energies:
            j = int(np.argmin(np.abs(e_axis - e)))
            ax.plot(m.delays, m.intensity[:, j], label=f"{e_axis[j]:.3g} eV")
            if components:
                for lab, arr in m.components.items():
                    ax.plot(m.delays, arr[:, j], lw=0.8, ls="--",
                            label=f"{lab} @ {e_axis[j]:.3g}")
        ax.set_xlim(float(m.delays[0]), float(m.delays[-1]))
        ax.set_xlabel(DELAY)
        ax.set_ylabel(ylabel)
        round_ticks(ax)
        ax.legend(fontsize=legend_fontsize(), frameon=False, loc="best")
    return fig


def plot_residual(measured: TRPESMap, model: TRPESMap, residual: TRPESMap, *,
                  cmap: str = "viridis", cmap_residual: str = "RdBu_r",
                  comparison: Any = None, energy_range: Any = "signal",
                  width: str | float = "double") -> Figure:
    """Measured, model and residual (measured - model) maps side by side.

    Parameters
    ----------
    measured, model, residual : TRPESMap
        E.g. the maps of a :class:`~ensemblelab.compute.spectroscopy.compare.MapComparison`.
    cmap, cmap_residual : str
    comparison : MapComparison, optional
        Its numbers (scale, energy shift, time zero, R^2) go into the heading.
    energy_range : "signal", "full" or (float, float)
        Kinetic-energy range ("signal" from the measured map).
    width : {"single", "double"} or float

    Returns
    -------
    Figure
    """
    fig = new_figure(width, aspect=0.36)
    axes = fig.subplots(1, 3, sharex=True, sharey=True)
    vmax = max(float(np.nanmax(measured.intensity)), float(np.nanmax(model.intensity)))
    xlim = resolve_energy_range(measured, energy_range)
    for ax, mm, title in ((axes[0], measured, "measured"), (axes[1], model, "model")):
        plot_map(mm, ax=ax, cmap=cmap, vmin=0.0, vmax=vmax, title=title, energy_range=xlim,
                 colorbar=ax is axes[1])
    axes[1].set_ylabel("")
    r = residual.intensity
    lim = float(np.nanmax(np.abs(r))) or 1.0
    mesh = _mesh(axes[2], residual, r, cmap=cmap_residual,
                 norm=TwoSlopeNorm(vcenter=0.0, vmin=-lim, vmax=lim))
    axes[2].set_title("residual (measured - model)")
    axes[2].set_xlabel(KINETIC_ENERGY)
    round_ticks(axes[2])
    label_colorbar(fig.colorbar(mesh, ax=axes[2]), "measured - model / arb. u.")
    if comparison is not None:
        fig.suptitle(
            f"scale {comparison.scale:.3g}, energy shift {comparison.energy_shift:+.2f} eV, "
            f"time zero {comparison.time_zero:+.1f} fs, R$^2$ = {comparison.r2:.3f}",
            fontsize=legend_fontsize())
    return fig
