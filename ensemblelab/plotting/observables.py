"""Static figures of the scattering and transient-absorption maps.

* :func:`plot_scattering`: percent difference (or a component, the modified-scattering
  difference, the pair-distribution difference) as delay vs q;
* :func:`plot_absorption`: differential absorption (or a component) as delay vs photon
  energy;
* :func:`plot_observable_cuts`: line cuts at chosen delays, total and components.

Difference maps use a diverging colour scale centred on zero (blue: less, red: more).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure

from ..data.observables import AbsorptionMap, ScatteringMap
from ._style import DELAY, label_colorbar, legend_fontsize, new_figure, round_ticks

__all__ = ["plot_scattering", "plot_absorption", "plot_observable_cuts"]

Q_LABEL = r"$q$ / $\AA^{-1}$"
R_LABEL = r"$r$ / $\AA$"
PHOTON_ENERGY = "photon energy / eV"


def _norm(data: np.ndarray) -> TwoSlopeNorm | None:
    lim = float(np.nanmax(np.abs(data))) if data.size else 0.0
    return TwoSlopeNorm(0.0, -lim, lim) if lim > 0 else None


def _diverging(ax: Any, x: np.ndarray, delays: np.ndarray, data: np.ndarray, cmap: str) -> Any:
    return ax.pcolormesh(x, delays, data, shading="nearest", rasterized=True, cmap=cmap,
                         norm=_norm(data))


def _axes(ax: Any, width: str | float) -> tuple[Figure, Any]:
    if ax is None:
        fig = new_figure(width, aspect=0.8)
        return fig, fig.add_subplot()
    return ax.figure, ax


def plot_scattering(m: ScatteringMap, *, quantity: str = "percent_difference",
                    component: str | None = None, ax: Any = None, cmap: str = "RdBu_r",
                    colorbar: bool = True, title: str | None = None,
                    width: str | float = "single") -> Figure:
    """Scattering difference map, delay vs q (or vs r for the pair distribution).

    Parameters
    ----------
    m : ScatteringMap
    quantity : {"percent_difference", "delta_sm", "delta_pdf", "intensity"}
    component : str, optional
        A component of the percent difference (``quantity`` must be the default).
    ax : matplotlib Axes, optional
    cmap : str
        Diverging colour map, centred on 0.
    colorbar, title, width
        As for :func:`ensemblelab.plotting.spectra.plot_map`.

    Returns
    -------
    Figure
    """
    if component is not None:
        data, label = m.components[component], r"$\Delta I / I$ / %"
    elif quantity == "percent_difference":
        data, label = m.percent_difference, r"$\Delta I / I$ / %"
    elif quantity == "delta_sm":
        assert m.delta_sm is not None
        data, label = m.delta_sm, r"$\Delta sM$ / $\AA^{-1}$"
    elif quantity == "delta_pdf":
        assert m.delta_pdf is not None and m.r is not None
        data, label = m.delta_pdf, r"$\Delta$PDF / $\AA^{-2}$"
    elif quantity == "intensity":
        unit = "e.u.$^2$" if m.kind == "xray" else r"$\AA^2$"
        data, label = m.intensity, f"intensity / {unit}"
    else:
        raise ValueError(f"quantity must be 'percent_difference', 'delta_sm', 'delta_pdf' or "
                         f"'intensity'; got {quantity!r}.")
    fig, ax = _axes(ax, width)
    x = m.r if quantity == "delta_pdf" and component is None else m.q
    if quantity == "intensity":
        mesh = ax.pcolormesh(x, m.delays, data, shading="nearest", rasterized=True,
                             cmap="viridis")
    else:
        mesh = _diverging(ax, np.asarray(x), m.delays, data, cmap)
    ax.set_xlabel(R_LABEL if x is m.r else Q_LABEL)
    ax.set_ylabel(DELAY)
    text = title if title is not None else (component or ("X-ray" if m.kind == "xray"
                                                          else "electron"))
    if text:
        ax.set_title(text)
    round_ticks(ax)
    if colorbar:
        label_colorbar(fig.colorbar(mesh, ax=ax), label)
    return fig


def plot_absorption(m: AbsorptionMap, *, component: str | None = None, ax: Any = None,
                    cmap: str = "RdBu_r", colorbar: bool = True, title: str | None = None,
                    width: str | float = "single") -> Figure:
    """Transient-absorption map (or one component), delay vs photon energy.

    Red: more absorption (excited-state absorption), blue: less (bleach, stimulated
    emission); the colour bar is the cross section in Angstrom^2.

    Returns
    -------
    Figure
    """
    data = m.intensity if component is None else m.components[component]
    fig, ax = _axes(ax, width)
    mesh = _diverging(ax, m.photon_energies, m.delays, data, cmap)
    ax.set_xlabel(PHOTON_ENERGY)
    ax.set_ylabel(DELAY)
    text = title if title is not None else (component or "")
    if text:
        ax.set_title(text)
    round_ticks(ax)
    if colorbar:
        label_colorbar(fig.colorbar(mesh, ax=ax), r"$\Delta\sigma$ / $\AA^2$")
    return fig


def plot_observable_cuts(m: ScatteringMap | AbsorptionMap, *, delays: Sequence[float],
                         components: bool = True, ax: Any = None,
                         width: str | float = "single") -> Figure:
    """Cuts of the main signal at the delays nearest to `delays` (total solid,
    components dashed).

    Returns
    -------
    Figure
    """
    fig, ax = _axes(ax, width)
    if isinstance(m, ScatteringMap):
        x, main, xlabel, ylabel = m.q, m.percent_difference, Q_LABEL, r"$\Delta I / I$ / %"
    else:
        x, main, xlabel, ylabel = (m.photon_energies, m.intensity, PHOTON_ENERGY,
                                   r"$\Delta\sigma$ / $\AA^2$")
    for d in delays:
        i = int(np.argmin(np.abs(m.delays - float(d))))
        line = ax.plot(x, main[i], label=f"{m.delays[i]:g} fs")[0]
        if components:
            for label, arr in m.components.items():
                ax.plot(x, arr[i], ls="--", lw=0.8, color=line.get_color(),
                        label=f"{label}, {m.delays[i]:g} fs")
    ax.axhline(0.0, color="0.5", lw=0.5)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.legend(fontsize=legend_fontsize(), frameon=False)
    round_ticks(ax)
    return fig
