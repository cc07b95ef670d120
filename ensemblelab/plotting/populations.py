"""Static figures for populations, kinetic fits and global lifetime analysis.

Headless: figures are :class:`matplotlib.figure.Figure` objects with the Agg
canvas (no pyplot, no display needed). Export with :func:`savefig` (PNG, SVG or
PDF by the file suffix; written atomically).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .._atomic import atomic_file

__all__ = [
    "plot_populations",
    "plot_das",
    "plot_sas",
    "plot_residual_map",
    "plot_global_fit",
    "savefig",
]

_FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


def _new_axes(ax: Any, figsize: tuple[float, float] = (5.0, 3.5)):
    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=figsize, layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def plot_populations(
    frame: pd.DataFrame,
    *,
    fit: Any = None,
    states: list[int] | None = None,
    ax: Any = None,
    band_alpha: float = 0.25,
    title: str | None = None,
) -> Figure:
    """Populations against time with interval bands and (optionally) fitted curves.

    Parameters
    ----------
    frame : DataFrame
        Output of :func:`ensemblelab.compute.kinetics.populations.populations`
        (``time, state, population`` and optionally ``lower, upper, label``).
    fit : KineticsResult, optional
        Fitted curves are drawn dashed over the fitted states.
    states : list of int, optional
        States to draw (default all in the frame).
    ax : matplotlib Axes, optional
        Draw into this axes instead of a new figure.
    band_alpha : float
        Opacity of the interval bands.
    title : str, optional

    Returns
    -------
    Figure
    """
    fig, ax = _new_axes(ax)
    keep = sorted(frame["state"].unique()) if states is None else list(states)
    colours = {}
    for s in keep:
        part = frame[frame["state"] == s].sort_values("time")
        label = str(part["label"].iloc[0]) if "label" in part.columns and len(part) else str(s)
        (line,) = ax.plot(part["time"], part["population"], label=label, lw=1.5)
        colours[s] = line.get_color()
        if {"lower", "upper"} <= set(part.columns):
            ax.fill_between(part["time"].to_numpy(), part["lower"].to_numpy(),
                            part["upper"].to_numpy(), color=line.get_color(),
                            alpha=band_alpha, lw=0)
    if fit is not None:
        t = np.linspace(float(frame["time"].min()), float(frame["time"].max()), 400)
        pred = fit.predict(t)
        for s, part in pred.groupby("state", sort=False):
            taus = ", ".join(f"{k} = {v:.3g} fs" for k, v in fit.time_constants.items())
            ax.plot(part["time"], part["fitted"], ls="--", lw=1.2, color=colours.get(s, "k"),
                    label=f"fit {part['role'].iloc[0]}" + (f" ({taus})" if s == fit.states[0]
                                                            else ""))
    ax.set_xlabel("time / fs")
    ax.set_ylabel("population")
    ax.set_ylim(-0.02, 1.02)
    ax.legend(fontsize="small", frameon=False)
    if title:
        ax.set_title(title)
    return fig


def plot_das(result: Any, *, ax: Any = None, title: str | None = None) -> Figure:
    """Decay-associated spectra of a :class:`~ensemblelab.GlobalFitResult`.

    Returns
    -------
    Figure
    """
    fig, ax = _new_axes(ax)
    for i, comp in enumerate(result.components):
        lab = (f"{comp}: {result.lifetimes[i]:.3g} fs" if comp != "inf" else "infinite")
        ax.plot(result.energies, result.das[i], label=lab)
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_xlabel("kinetic energy / eV")
    ax.set_ylabel("DAS amplitude")
    ax.legend(fontsize="small", frameon=False)
    if title:
        ax.set_title(title)
    return fig


def plot_sas(result: Any, *, ax: Any = None, title: str | None = None) -> Figure:
    """Species-associated spectra of a sequential global fit.

    Returns
    -------
    Figure
    """
    if result.sas is None:
        raise ValueError("plot_sas needs fit_global(scheme='sequential').")
    fig, ax = _new_axes(ax)
    for i, sp in enumerate(result.species):
        ax.plot(result.energies, result.sas[i], label=f"species {sp}")
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_xlabel("kinetic energy / eV")
    ax.set_ylabel("SAS amplitude")
    ax.legend(fontsize="small", frameon=False)
    if title:
        ax.set_title(title)
    return fig


def plot_residual_map(result: Any = None, *, energies: Any = None, delays: Any = None,
                      residuals: Any = None, ax: Any = None, title: str | None = None) -> Figure:
    """Residual map (data - model) on a symmetric diverging colour scale.

    Parameters
    ----------
    result : GlobalFitResult, optional
        Or pass `energies` (n_energies,), `delays` (n_delays,) and `residuals`
        (n_delays, n_energies).

    Returns
    -------
    Figure
    """
    if result is not None:
        energies, delays, residuals = result.energies, result.delays, result.residuals
    res = np.asarray(residuals, dtype=float)
    fig, ax = _new_axes(ax)
    lim = float(np.nanmax(np.abs(res))) if res.size else 1.0
    lim = lim if lim > 0 else 1.0
    mesh = ax.pcolormesh(np.asarray(energies), np.asarray(delays), res, cmap="RdBu_r",
                         vmin=-lim, vmax=lim, shading="nearest")
    fig.colorbar(mesh, ax=ax, label="residual")
    ax.set_xlabel("kinetic energy / eV")
    ax.set_ylabel("delay / fs")
    if title:
        ax.set_title(title)
    return fig


def plot_global_fit(result: Any) -> Figure:
    """Three panels: data, DAS (or SAS for sequential fits), residual map.

    Returns
    -------
    Figure
    """
    fig = Figure(figsize=(12.0, 3.6), layout="constrained")
    FigureCanvasAgg(fig)
    a1, a2, a3 = fig.subplots(1, 3)
    mesh = a1.pcolormesh(result.energies, result.delays, result.data, shading="nearest")
    fig.colorbar(mesh, ax=a1, label="intensity")
    a1.set_xlabel("kinetic energy / eV")
    a1.set_ylabel("delay / fs")
    a1.set_title("data")
    (plot_sas if result.sas is not None else plot_das)(result, ax=a2)
    plot_residual_map(result, ax=a3, title="residuals")
    return fig


def savefig(fig: Figure, path: str | os.PathLike, *, dpi: int = 200, **kwargs: Any) -> Path:
    """Write a figure to PNG, SVG or PDF (chosen by the suffix), atomically.

    Parameters
    ----------
    fig : Figure
    path : path-like
        Target file; suffix ``.png``, ``.svg`` or ``.pdf``.
    dpi : int
        Resolution of raster output.
    **kwargs
        Passed to :meth:`Figure.savefig`.

    Returns
    -------
    Path
        The written file.
    """
    target = Path(path)
    fmt = _FORMATS.get(target.suffix.lower())
    if fmt is None:
        raise ValueError(f"savefig: the file suffix must be one of {sorted(_FORMATS)}; got "
                         f"{target.suffix!r} in {str(target)!r}.")
    with atomic_file(target, "wb") as fh:
        fig.savefig(fh, format=fmt, dpi=dpi, **kwargs)
    return target
