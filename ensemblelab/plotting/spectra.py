"""Static figures for TRPES maps: map with colour bar, decomposition grid, cuts, residual.

Headless: figures are :class:`matplotlib.figure.Figure` objects with the Agg canvas
(no pyplot, no display). Export with :func:`savefig` (PNG, SVG or PDF by suffix,
written atomically).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

from ..data.spectrum import TRPESMap
from .populations import savefig

__all__ = ["plot_map", "plot_components", "plot_cuts", "plot_residual", "savefig"]


def _figure(figsize: tuple[float, float]) -> Figure:
    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _mesh(ax: Any, m: TRPESMap, data: np.ndarray, **kw: Any):
    return ax.pcolormesh(m.energies, m.delays, data, shading="nearest", rasterized=True, **kw)


def plot_map(m: TRPESMap, *, component: str | None = None, ax: Any = None, cmap: str = "viridis",
             vmin: float | None = None, vmax: float | None = None, colorbar: bool = True,
             title: str | None = None) -> Figure:
    """Plot a map (or one component) as delay vs kinetic energy with a colour bar.

    Parameters
    ----------
    m : TRPESMap
    component : str, optional
        Label of a component; default the total intensity.
    ax : matplotlib Axes, optional
        Draw into it (its figure is returned).
    cmap, vmin, vmax : colour map and limits.
    colorbar : bool
    title : str, optional

    Returns
    -------
    Figure
    """
    data = m.intensity if component is None else m.components[component]
    if ax is None:
        fig = _figure((5.5, 4.0))
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    mesh = _mesh(ax, m, data, cmap=cmap, vmin=vmin, vmax=vmax)
    ax.set_xlabel("kinetic energy (eV)")
    ax.set_ylabel("delay (fs)")
    ax.set_title(title if title is not None else (component or "total"))
    if colorbar:
        fig.colorbar(mesh, ax=ax, label="intensity (eV$^{-1}$)")
    return fig


def plot_components(m: TRPESMap, *, labels: Sequence[str] | None = None, ncols: int = 3,
                    cmap: str = "viridis", include_total: bool = True) -> Figure:
    """Grid of component maps on one shared colour scale (and the total)."""
    labels = list(labels if labels is not None else m.components)
    panels = (["total"] if include_total else []) + labels
    if not panels:
        raise ValueError("the map has no components; compute it with by=...")
    arrays = [m.intensity if p == "total" else m.components[p] for p in panels]
    vmax = max(float(np.max(a)) for a in arrays)
    vmin = min(0.0, min(float(np.min(a)) for a in arrays))
    ncols = max(1, min(ncols, len(panels)))
    nrows = math.ceil(len(panels) / ncols)
    fig = _figure((3.2 * ncols + 1.0, 2.8 * nrows))
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True)
    mesh = None
    for i, ax in enumerate(axes.ravel()):
        if i >= len(panels):
            ax.set_visible(False)
            continue
        mesh = _mesh(ax, m, arrays[i], cmap=cmap, vmin=vmin, vmax=vmax)
        ax.set_title(panels[i])
        if i % ncols == 0:
            ax.set_ylabel("delay (fs)")
        if i // ncols == nrows - 1:
            ax.set_xlabel("kinetic energy (eV)")
    assert mesh is not None
    fig.colorbar(mesh, ax=axes, label="intensity (eV$^{-1}$), shared scale")
    return fig


def plot_cuts(m: TRPESMap, *, delays: Sequence[float] = (), energies: Sequence[float] = (),
              components: bool = False) -> Figure:
    """Spectra at chosen delays and transients at chosen energies (nearest grid points)."""
    n = int(bool(len(delays))) + int(bool(len(energies)))
    if n == 0:
        raise ValueError("give at least one delay or one energy to cut at.")
    fig = _figure((5.5 * n, 3.6))
    axes = fig.subplots(1, n, squeeze=False)[0]
    k = 0
    if len(delays):
        ax = axes[k]
        k += 1
        for d in delays:
            i = int(np.argmin(np.abs(m.delays - d)))
            ax.plot(m.energies, m.intensity[i], label=f"{m.delays[i]:g} fs")
            if components:
                for lab, arr in m.components.items():
                    ax.plot(m.energies, arr[i], lw=0.8, ls="--", label=f"{lab} @ {m.delays[i]:g}")
        ax.set_xlabel("kinetic energy (eV)")
        ax.set_ylabel("intensity (eV$^{-1}$)")
        ax.legend(fontsize="small")
    if len(energies):
        ax = axes[k]
        for e in energies:
            j = int(np.argmin(np.abs(m.energies - e)))
            ax.plot(m.delays, m.intensity[:, j], label=f"{m.energies[j]:.3g} eV")
            if components:
                for lab, arr in m.components.items():
                    ax.plot(m.delays, arr[:, j], lw=0.8, ls="--",
                            label=f"{lab} @ {m.energies[j]:.3g}")
        ax.set_xlabel("delay (fs)")
        ax.set_ylabel("intensity (eV$^{-1}$)")
        ax.legend(fontsize="small")
    return fig


def plot_residual(measured: TRPESMap, model: TRPESMap, residual: TRPESMap, *,
                  cmap: str = "viridis", cmap_residual: str = "RdBu_r") -> Figure:
    """Measured, model and residual maps side by side (e.g. from ``compare_maps``)."""
    fig = _figure((15.0, 4.0))
    axes = fig.subplots(1, 3, sharex=True, sharey=True)
    vmax = max(float(measured.intensity.max()), float(model.intensity.max()))
    for ax, mm, title in ((axes[0], measured, "measured"), (axes[1], model, "model")):
        plot_map(mm, ax=ax, cmap=cmap, vmin=0.0, vmax=vmax, title=title)
    r = residual.intensity
    lim = float(np.max(np.abs(r))) or 1.0
    mesh = _mesh(axes[2], residual, r, cmap=cmap_residual,
                 norm=TwoSlopeNorm(vcenter=0.0, vmin=-lim, vmax=lim))
    axes[2].set_title("residual (measured - model)")
    axes[2].set_xlabel("kinetic energy (eV)")
    fig.colorbar(mesh, ax=axes[2], label="residual")
    return fig
