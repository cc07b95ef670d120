"""Static figures for populations, kinetic fits and global lifetime analysis.

Headless: figures are :class:`matplotlib.figure.Figure` objects with the Agg
canvas (no pyplot, no display needed), sized for a journal column (common
practice: about 3.3 in single, 7 in double). Export with :func:`savefig` (PNG,
SVG or PDF by the file suffix; PNG at 300 dpi by default; written atomically).
Legends of new figures sit below the axes, so they never cover a curve.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from .._atomic import atomic_file
from ._style import (
    DELAY,
    KINETIC_ENERGY,
    MIN_DPI,
    TIME,
    label_colorbar,
    legend_fontsize,
    new_figure,
    round_ticks,
)

__all__ = [
    "plot_populations",
    "plot_das",
    "plot_sas",
    "plot_residual_map",
    "plot_global_fit",
    "scheme_name",
    "savefig",
]

_FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}


def _new_axes(ax: Any, width: str | float = "single", aspect: float = 0.75):
    if ax is not None:
        return ax.figure, ax, False
    fig = new_figure(width, aspect=aspect)
    return fig, fig.add_subplot(), True


def _legend(fig: Figure, ax: Any, own: bool) -> None:
    """Below the axes for a figure of our own (never over the data), else the best spot."""
    handles, labels = ax.get_legend_handles_labels()
    if not handles:
        return
    if own:
        # as many columns as fit into the figure's width
        # an Agg-based canvas here; the base-class stub lacks get_renderer
        renderer = fig.canvas.get_renderer()  # type: ignore[attr-defined]
        for ncols in range(len(handles), 0, -1):
            legend = fig.legend(handles, labels, loc="outside lower center", frameon=False,
                                fontsize=legend_fontsize(), ncols=ncols)
            if ncols == 1 or legend.get_window_extent(renderer).width <= 0.98 * fig.bbox.width:
                break
            legend.remove()
    else:
        ax.legend(fontsize=legend_fontsize(), frameon=False, loc="best")


def scheme_name(fit: Any, labels: Mapping[int, str] | None = None) -> str:
    """A kinetic fit named by its scheme and states, e.g. "sequential S2 -> S1 -> S0".

    Parameters
    ----------
    fit : KineticsResult
    labels : mapping of int to str, optional
        State labels by index (default ``"state i"``).

    Returns
    -------
    str
    """
    scheme = getattr(fit, "scheme", "")
    labels = dict(labels or {})
    names = [labels.get(int(s), f"state {int(s)}") for s in fit.states]
    if scheme == "single":
        return f"single-exponential decay of {names[0]}"
    if scheme == "sequential":
        return "sequential " + " \u2192 ".join(names)
    if scheme == "parallel":
        return f"parallel {names[0]} \u2192 " + " + ".join(names[1:])
    return f"{scheme} {', '.join(names)}".strip()


def plot_populations(
    frame: pd.DataFrame,
    *,
    fit: Any = None,
    states: list[int] | None = None,
    ax: Any = None,
    band_alpha: float = 0.25,
    title: str | None = None,
    width: str | float = "single",
) -> Figure:
    """Populations against time with interval bands and (optionally) fitted curves.

    Parameters
    ----------
    frame : DataFrame
        Output of :func:`ensemblelab.compute.kinetics.populations.populations`
        (``time, state, population`` and optionally ``lower, upper, label``).
    fit : KineticsResult, optional
        Fitted curves are drawn dashed over the fitted states; the legend names
        the fit by its kinetic scheme (:func:`scheme_name`) and time constants.
    states : list of int, optional
        States to draw (default all in the frame).
    ax : matplotlib Axes, optional
        Draw into this axes instead of a new figure (legend at the best spot);
        a new figure puts the legend below the axes, clear of the curves.
    band_alpha : float
        Opacity of the interval bands.
    title : str, optional
    width : {"single", "double"} or float
        Width of a new figure (journal column or inches).

    Returns
    -------
    Figure
    """
    fig, ax, own = _new_axes(ax, width)
    keep = sorted(frame["state"].unique()) if states is None else list(states)
    colours = {}
    names: dict[int, str] = {}
    for s in keep:
        part = frame[frame["state"] == s].sort_values("time")
        label = str(part["label"].iloc[0]) if "label" in part.columns and len(part) else str(s)
        names[int(s)] = label
        (line,) = ax.plot(part["time"], part["population"], label=label, lw=1.5)
        colours[s] = line.get_color()
        if {"lower", "upper"} <= set(part.columns):
            ax.fill_between(part["time"].to_numpy(), part["lower"].to_numpy(),
                            part["upper"].to_numpy(), color=line.get_color(),
                            alpha=band_alpha, lw=0)
    if fit is not None:
        t = np.linspace(float(frame["time"].min()), float(frame["time"].max()), 400)
        pred = fit.predict(t)
        taus = ", ".join(f"{k} = {v:.3g} fs" for k, v in fit.time_constants.items())
        first = True
        for s, part in pred.groupby("state", sort=False):
            # one legend entry for the whole fit; its other curves share the entry's style
            lab = f"fit: {scheme_name(fit, names)}\n({taus})" if first else "_fit"
            ax.plot(part["time"], part["fitted"], ls="--", lw=1.2, color=colours.get(s, "k"),
                    label=lab)
            first = False
    ax.set_xlabel(TIME)
    ax.set_ylabel("population")
    ax.set_ylim(-0.02, 1.02)
    round_ticks(ax)
    _legend(fig, ax, own)
    if title:
        ax.set_title(title)
    return fig


def plot_das(result: Any, *, ax: Any = None, title: str | None = None,
             width: str | float = "single") -> Figure:
    """Decay-associated spectra of a :class:`~ensemblelab.GlobalFitResult`.

    Returns
    -------
    Figure
    """
    fig, ax, own = _new_axes(ax, width)
    for i, comp in enumerate(result.components):
        lab = (f"{comp}: {result.lifetimes[i]:.3g} fs" if comp != "inf" else "infinite")
        ax.plot(result.energies, result.das[i], label=lab)
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_xlabel(KINETIC_ENERGY)
    ax.set_ylabel("DAS amplitude / arb. u.")
    round_ticks(ax)
    _legend(fig, ax, own)
    if title:
        ax.set_title(title)
    return fig


def plot_sas(result: Any, *, ax: Any = None, title: str | None = None,
             width: str | float = "single") -> Figure:
    """Species-associated spectra of a sequential global fit.

    Returns
    -------
    Figure
    """
    if result.sas is None:
        raise ValueError("plot_sas needs fit_global(scheme='sequential').")
    fig, ax, own = _new_axes(ax, width)
    for i, sp in enumerate(result.species):
        ax.plot(result.energies, result.sas[i], label=f"species {sp}")
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.set_xlabel(KINETIC_ENERGY)
    ax.set_ylabel("SAS amplitude / arb. u.")
    round_ticks(ax)
    _legend(fig, ax, own)
    if title:
        ax.set_title(title)
    return fig


def plot_residual_map(result: Any = None, *, energies: Any = None, delays: Any = None,
                      residuals: Any = None, ax: Any = None, title: str | None = None,
                      width: str | float = "single") -> Figure:
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
    fig, ax, _ = _new_axes(ax, width, aspect=0.8)
    lim = float(np.nanmax(np.abs(res))) if res.size else 1.0
    lim = lim if lim > 0 else 1.0
    mesh = ax.pcolormesh(np.asarray(energies), np.asarray(delays), res, cmap="RdBu_r",
                         vmin=-lim, vmax=lim, shading="nearest", rasterized=True)
    label_colorbar(fig.colorbar(mesh, ax=ax), "data - model / arb. u.")
    ax.set_xlabel(KINETIC_ENERGY)
    ax.set_ylabel(DELAY)
    round_ticks(ax)
    if title:
        ax.set_title(title)
    return fig


def plot_global_fit(result: Any, *, width: str | float = "double") -> Figure:
    """Three panels: data, DAS (or SAS for sequential fits), residual map.

    Returns
    -------
    Figure
    """
    fig = new_figure(width, aspect=0.36)
    a1, a2, a3 = fig.subplots(1, 3)
    mesh = a1.pcolormesh(result.energies, result.delays, result.data, shading="nearest",
                         rasterized=True)
    label_colorbar(fig.colorbar(mesh, ax=a1), "intensity / arb. u.")
    a1.set_xlabel(KINETIC_ENERGY)
    a1.set_ylabel(DELAY)
    a1.set_title("data")
    round_ticks(a1)
    (plot_sas if result.sas is not None else plot_das)(result, ax=a2)
    plot_residual_map(result, ax=a3, title="residuals")
    return fig


def savefig(fig: Figure, path: str | os.PathLike, *, dpi: int = MIN_DPI,
            **kwargs: Any) -> Path:
    """Write a figure to PNG, SVG or PDF (chosen by the suffix), atomically.

    Parameters
    ----------
    fig : Figure
    path : path-like
        Target file; suffix ``.png``, ``.svg`` or ``.pdf``.
    dpi : int
        Resolution of raster output (PNG, and the rasterised map cells inside SVG
        and PDF); default 300 (common practice for print).
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
