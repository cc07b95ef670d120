"""One look for every static figure: journal column widths, axis labels, round ticks.

Sizes follow common practice for journal figures: a single column is about
8.5 cm (3.3 in) wide and a double column about 17.8 cm (7.0 in); raster output is
written at 300 dpi or more. Axis labels read "quantity / unit".
"""

from __future__ import annotations

from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

__all__ = [
    "COLUMN_WIDTHS",
    "MIN_DPI",
    "DELAY",
    "TIME",
    "KINETIC_ENERGY",
    "INTENSITY",
    "INTENSITY_ARB",
    "new_figure",
    "round_ticks",
    "label_colorbar",
    "intensity_label",
    "kinetic_energies",
    "short_label",
    "column_width",
    "legend_fontsize",
]

#: Figure widths in inches (common practice: 8.5 cm single, 17.8 cm double column).
COLUMN_WIDTHS: dict[str, float] = {"single": 3.3, "double": 7.0}
#: Lowest resolution of raster output (common practice for line art and maps).
MIN_DPI = 300

DELAY = "delay / fs"
TIME = "time / fs"
KINETIC_ENERGY = "kinetic energy / eV"
INTENSITY = "intensity / eV$^{-1}$"
INTENSITY_ARB = "intensity / arb. u."

#: Font sizes (points) that stay legible at column width.
_FONT = {"label": 8.0, "tick": 7.0, "title": 8.0, "legend": 7.0}
#: "Nice" steps for tick spacing (1, 2, 2.5, 5 times a power of ten).
_STEPS = [1, 2, 2.5, 5, 10]


def column_width(width: str | float) -> float:
    """Width in inches: ``"single"``, ``"double"`` or a number of inches."""
    if isinstance(width, str):
        if width not in COLUMN_WIDTHS:
            raise ValueError(f"width must be one of {sorted(COLUMN_WIDTHS)} or a number of "
                             f"inches; got {width!r}.")
        return COLUMN_WIDTHS[width]
    value = float(width)
    if not value > 0:
        raise ValueError(f"width must be > 0 inches; got {width!r}.")
    return value


def new_figure(width: str | float = "single", aspect: float = 0.75) -> Figure:
    """A headless figure (Agg canvas, constrained layout) at a journal column width.

    Parameters
    ----------
    width : {"single", "double"} or float
        Column width or inches.
    aspect : float
        Height / width.

    Returns
    -------
    Figure
    """
    w = column_width(width)
    fig = Figure(figsize=(w, w * float(aspect)), layout="constrained", dpi=100)
    FigureCanvasAgg(fig)
    return fig


def round_ticks(ax: Any, *, nbins: int = 5) -> None:
    """Round tick values on both axes (MaxNLocator with steps 1, 2, 2.5, 5) and small fonts."""
    for axis in (ax.xaxis, ax.yaxis):
        if axis.get_scale() == "linear":
            axis.set_major_locator(MaxNLocator(nbins=nbins, steps=_STEPS))
    ax.tick_params(labelsize=_FONT["tick"])
    ax.xaxis.label.set_fontsize(_FONT["label"])
    ax.yaxis.label.set_fontsize(_FONT["label"])
    ax.title.set_fontsize(_FONT["title"])


def label_colorbar(cbar: Any, label: str, *, nbins: int = 5) -> Any:
    """Give a colour bar its label (with unit) and round ticks."""
    cbar.set_label(label, fontsize=_FONT["label"])
    cbar.locator = MaxNLocator(nbins=nbins, steps=_STEPS)
    cbar.update_ticks()
    cbar.ax.tick_params(labelsize=_FONT["tick"])
    return cbar


def legend_fontsize() -> float:
    """Font size of legends (points)."""
    return _FONT["legend"]


def intensity_label(trpes_map: Any) -> str:
    """"intensity / eV^-1" for a simulated map, "intensity / arb. u." for a measured one.

    A measured map (``params["measured"]``) and the maps of a comparison (which carry
    ``params["role"]`` and are on the measured map's scale) are in arbitrary units.
    """
    params = getattr(trpes_map, "params", None) or {}
    return INTENSITY_ARB if params.get("measured") or "role" in params else INTENSITY


def kinetic_energies(trpes_map: Any) -> Any:
    """The kinetic-energy axis of a map (eV)."""
    return trpes_map.kinetic_energies


def short_label(label: str) -> str:
    """A panel title: the label up to its first parenthesis ("G (closed shell)" -> "G")."""
    head = str(label).split(" (", 1)[0].strip()
    return head or str(label)
