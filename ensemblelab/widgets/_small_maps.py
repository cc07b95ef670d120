"""Parts of the map view: round ticks, axis labels and the decomposition's small multiples."""

from __future__ import annotations

import html
import math
from typing import Any

import bqplot
import ipywidgets as widgets
import numpy as np

__all__ = ["nice_ticks", "tick_format", "set_round_ticks", "short_title", "SmallMaps",
           "ColorBar",
           "range_mask", "outside", "cut_text", "comparison_text", "INTENSITY",
           "INTENSITY_ARB", "RESIDUAL", "ENERGY", "DELAY"]

#: axis labels, "quantity / unit" as in the exported figures
INTENSITY = "intensity / eV⁻¹"
INTENSITY_ARB = "intensity / arb. u."
RESIDUAL = "residual / arb. u."
ENERGY = "kinetic energy / eV"
DELAY = "delay / fs"

_STEPS = (1.0, 2.0, 2.5, 5.0, 10.0)


def nice_ticks(lo: float, hi: float, n: int = 5) -> np.ndarray:
    """Round tick values inside ``[lo, hi]``: multiples of 1, 2, 2.5 or 5 times a power of ten.

    The step is the smallest such number not below ``(hi - lo) / n``, so there are at
    most ``n + 1`` ticks.

    Parameters
    ----------
    lo, hi : float
        The axis range (any order); a degenerate or non-finite range gives no ticks.
    n : int
        Largest number of intervals.

    Returns
    -------
    ndarray, shape (n_ticks,)
    """
    lo, hi = float(min(lo, hi)), float(max(lo, hi))
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return np.zeros(0)
    raw = (hi - lo) / max(int(n), 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(s * mag for s in _STEPS if s * mag >= raw * (1 - 1e-9))
    first = math.ceil(lo / step - 1e-9)
    last = math.floor(hi / step + 1e-9)
    ticks = np.arange(first, last + 1) * step
    ticks[np.abs(ticks) < 1e-12 * step] = 0.0  # no "-0"
    return np.round(ticks, 12)


def tick_format(ticks: np.ndarray) -> str:
    """A d3 format showing round ticks with the digits they need (no "0.6000")."""
    if ticks.size < 2:
        return ".3g"
    big = float(np.abs(ticks).max())
    if big >= 1e5 or big < 1e-3:
        return ".1e"
    step = float(np.min(np.diff(ticks)))
    decimals = max(0, -math.floor(math.log10(step) + 1e-9))
    if abs(step / 10.0 ** -decimals - round(step / 10.0 ** -decimals)) > 1e-6:
        decimals += 1  # steps of 2.5 x 10^k
    return f".{decimals}f"


def set_round_ticks(axis: bqplot.Axis, lo: float, hi: float, n: int = 5) -> None:
    """Give `axis` round tick values over ``[lo, hi]`` and a format that suits them."""
    ticks = nice_ticks(lo, hi, n)
    if ticks.size:
        axis.tick_values = ticks
        axis.tick_format = tick_format(ticks)


def range_mask(grid: np.ndarray, rng: tuple[float, float] | None) -> np.ndarray:
    """Grid points inside `rng` (all without one; the nearest one when none is inside)."""
    if rng is None:
        return np.ones(grid.size, bool)
    m = (grid >= rng[0]) & (grid <= rng[1])
    if not m.any():
        m[np.argmin(np.abs(grid - 0.5 * (rng[0] + rng[1])))] = True
    return m


def outside(grid: np.ndarray, rng: tuple[float, float] | None) -> bool:
    """True when the range `rng` does not overlap the span of `grid`."""
    return rng is not None and (rng[1] < grid.min() or rng[0] > grid.max())


def cut_text(energy_range: tuple[float, float] | None,
             delay_range: tuple[float, float] | None) -> str:
    """What the cuts average over (HTML)."""
    e, d = energy_range, delay_range
    over_d = f"{d[0]:.0f}–{d[1]:.0f} fs" if d is not None else "every delay"
    over_e = f"{e[0]:.2f}–{e[1]:.2f} eV" if e is not None else "every energy"
    return (f"<small>upper: spectrum, mean over {over_d}; lower: trace, mean over "
            f"{over_e}</small>")


def comparison_text(r: Any, *, residual: bool) -> str:
    """The residual's sign and the numbers of a map comparison (HTML)."""
    sign = ("<b>residual = measured − model</b> (blue: measured above the model, red: "
            "below); " if residual else "")
    return (f"<small>{sign}model fitted to the measured map: scale {r.scale:.3g}, energy "
            f"shift {r.energy_shift:+.2f} eV, time zero {r.time_zero:+.1f} fs, "
            f"R² = {r.r2:.3f}, cosine {r.cosine:.3f}</small>")


def short_title(label: str) -> str:
    """A panel title: each side of a pair up to its first parenthesis.

    ``"G (closed shell)->D0 (doublet)"`` gives ``"G->D0"``.
    """
    parts = [p.split(" (", 1)[0].strip() or p for p in str(label).split("->")]
    return "->".join(parts)


class ColorBar:
    """A colour bar: a strip of a colour scale beside a value axis with label and unit.

    A figure of its own (a heat map strip and an ordinary axis), so its ticks are round
    values set from Python and its label runs along it.

    Attributes
    ----------
    figure : bqplot.Figure
    axis : bqplot.Axis
        The value axis (``label``, ``tick_values``).
    """

    def __init__(self, scale: bqplot.ColorScale, *, height: int, margin_top: int = 20,
                 margin_bottom: int = 45, width: int = 120) -> None:
        self._y = bqplot.LinearScale()
        values = np.linspace(0.0, 1.0, 64)
        self._strip = bqplot.HeatMap(x=np.array([0.0, 1.0]), y=values,
                                     color=np.tile(values[:, None], (1, 2)),
                                     scales={"x": bqplot.LinearScale(), "y": self._y,
                                             "color": scale})
        self.axis = bqplot.Axis(scale=self._y, side="right", label=INTENSITY, num_ticks=5)
        self.figure = bqplot.Figure(
            marks=[self._strip], axes=[self.axis], display_toolbar=False,
            padding_x=0, padding_y=0,
            layout=widgets.Layout(width=f"{width}px", height=f"{height}px"),
            fig_margin={"top": margin_top, "bottom": margin_bottom, "left": 8,
                        "right": width - 28})

    def draw(self, lo: float, hi: float, label: str, *, n_ticks: int = 5) -> None:
        """Span ``[lo, hi]`` with round ticks and the given label."""
        values = np.linspace(lo, hi, 64)
        ticks = nice_ticks(lo, hi, n_ticks)
        with self.figure.hold_sync():
            self._y.min, self._y.max = float(lo), float(hi)
            self._strip.y = values
            self._strip.color = np.tile(values[:, None], (1, 2))
            self.axis.label = label
            if ticks.size:
                self.axis.tick_values = ticks
                self.axis.tick_format = tick_format(ticks)


class SmallMaps:
    """Small multiples of a decomposition on one colour scale, made once and then reused.

    Attributes
    ----------
    widget : ipywidgets.VBox
        The grid, the shared colour bar and the key of the panel titles.
    grid : ipywidgets.GridBox
    figures : list of bqplot.Figure
        Every panel made so far (shown: the first ``len(grid.children)``).
    colorbar : bqplot.Figure
        The shared colour bar (labelled, with its unit).
    key : ipywidgets.HTML
        Short title -> full label, where they differ (a bqplot figure has no tooltip).
    """

    def __init__(self, *, n_columns: int = 3, width: int = 238, height: int = 200) -> None:
        self.n_columns = int(n_columns)
        self._size = (width, height)
        self.scale = bqplot.ColorScale(scheme="viridis")
        self.grid = widgets.GridBox(layout=widgets.Layout(
            grid_template_columns=f"repeat({self.n_columns}, {width + 2}px)", grid_gap="2px"))
        self.figures: list[bqplot.Figure] = []
        self._marks: list[bqplot.HeatMap] = []
        # the shared colour bar
        self.bar = ColorBar(self.scale, height=height, margin_top=25, margin_bottom=40)
        self.color_axis = self.bar.axis
        self.colorbar = self.bar.figure
        self.colorbar.add_class("ensemblelab-small-colorbar")
        self.key = widgets.HTML(layout=widgets.Layout(max_width="900px"))  # wraps
        self.key.add_class("ensemblelab-small-key")
        self._row = widgets.HBox([self.grid, self.colorbar])
        # empty until drawn: figures inside a hidden box get no size (negative rects)
        self.widget = widgets.VBox([])

    def panel(self, i: int) -> tuple[bqplot.Figure, bqplot.HeatMap]:
        """The `i`-th panel (made once, then reused)."""
        while len(self.figures) <= i:
            xs, ys = bqplot.LinearScale(), bqplot.LinearScale()
            e0 = np.linspace(0, 1, 3)
            hm = bqplot.HeatMap(x=e0, y=e0, color=np.zeros((3, 3)),
                                scales={"x": xs, "y": ys, "color": self.scale})
            w, h = self._size
            fig = bqplot.Figure(
                marks=[hm], padding_x=0, padding_y=0, display_toolbar=False,
                axes=[bqplot.Axis(scale=xs, num_ticks=3),
                      bqplot.Axis(scale=ys, side="left", num_ticks=3)],
                layout=widgets.Layout(width=f"{w}px", height=f"{h}px"),
                fig_margin={"top": 32, "bottom": 40, "left": 55, "right": 8})
            self.figures.append(fig)
            self._marks.append(hm)
        return self.figures[i], self._marks[i]

    def clear(self) -> None:
        """Show no panel."""
        self.grid.children = ()
        self.widget.children = ()

    def draw(self, labels: list[str], values: np.ndarray, energies: np.ndarray,
             delays: np.ndarray, window: tuple[float, float], *,
             label: str = INTENSITY) -> None:
        """Draw one panel per component.

        Parameters
        ----------
        labels : list of str
            Full component labels.
        values : ndarray, shape (n_panels, n_delays, n_energies)
        energies, delays : ndarray
            Grids in eV and fs.
        window : (float, float)
            Kinetic-energy range shown (eV), as in the main map.
        label : str
            Colour bar label with its unit.
        """
        finite = values[np.isfinite(values)]
        lo = float(finite.min()) if finite.size else 0.0
        hi = float(finite.max()) if finite.size else 1.0
        if lo < 0 and abs(lo) < 1e-4 * abs(hi):
            lo = 0.0  # numerical tails of the broadening kernel
        hi = hi if hi > lo else lo + 1.0
        self.scale.min, self.scale.max = lo, hi
        self.bar.draw(lo, hi, label, n_ticks=4)
        n = len(labels)
        n_rows = math.ceil(n / self.n_columns)
        key = []
        for i, (name, v) in enumerate(zip(labels, values, strict=True)):
            fig, hm = self.panel(i)
            row, col = divmod(i, self.n_columns)
            xs, ys = hm.scales["x"], hm.scales["y"]
            ax, ay = fig.axes
            short = short_title(name)
            with fig.hold_sync():
                hm.x, hm.y, hm.color = energies, delays, np.nan_to_num(v)
                xs.min, xs.max = float(window[0]), float(window[1])
                ys.min, ys.max = float(delays[0]), float(delays[-1])
                set_round_ticks(ax, window[0], window[1], 3)
                set_round_ticks(ay, delays[0], delays[-1], 3)
                # axis labels on the outer panels only: bottom row and left column
                ax.label = ENERGY if row == n_rows - 1 or i + self.n_columns >= n else ""
                ay.label = DELAY if col == 0 else ""
                fig.title = short
            if short != str(name):
                key.append(f"<b>{html.escape(short)}</b>: {html.escape(str(name))}")
        self.grid.children = tuple(self.figures[:n])
        self.key.value = ("<small>" + "; ".join(key) + "</small>") if key else ""
        self.widget.children = (self._row, self.key) if n else ()
