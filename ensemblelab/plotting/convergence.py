"""Figure of a convergence study: error against the number of trajectories (log-log)."""

from __future__ import annotations

from typing import Any

import numpy as np
from matplotlib.figure import Figure

from ._style import legend_fontsize, new_figure

__all__ = ["plot_convergence"]


def plot_convergence(result: Any, *, ax: Any = None, width: str | float = "single") -> Figure:
    """Error against N on log-log axes, with the fitted law and the 1/sqrt(N) law.

    Parameters
    ----------
    result : ConvergenceResult
        From :func:`ensemblelab.compute.uncertainty.convergence`.
    ax : matplotlib Axes, optional
        Draw into it (default: a new single-column figure).
    width : "single", "double" or float
        Width of a new figure.

    Returns
    -------
    Figure
        Points: every nesting's error (finite-population corrected); squares: their root
        mean square per size; solid: the fitted power law; dashed: ``b / sqrt(N)``
        extended to the full ensemble (and to the N needed for the target, dotted line).

    Examples
    --------
    >>> from ensemblelab.compute.uncertainty import convergence
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> fig = plot_convergence(convergence(make_toy_ensemble(80, dt=20.0), target=0.02))
    >>> len(fig.axes)
    1
    """
    if ax is None:
        fig = new_figure(width, aspect=0.75)
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    err = result.errors
    pos = err["error_corrected"] > 0
    ax.scatter(err.loc[pos, "n"], err.loc[pos, "error_corrected"], s=6, color="0.6",
               label="subsets (nestings)")
    ax.plot(result.table["n"], result.table["error"], "s", color="C0", ms=4,
            label="root mean square")
    n_hi = max(result.n_full, result.n_needed or 0.0) if result.n_needed is not None and \
        np.isfinite(result.n_needed) else result.n_full
    grid = np.geomspace(float(result.table["n"].min()), float(n_hi), 50)
    if np.isfinite(result.amplitude):
        ax.plot(grid, result.amplitude * grid**result.exponent, "-", color="C0", lw=1,
                label=f"fit: N^{result.exponent:.2f}")
    if np.isfinite(result.amplitude_sqrt):
        ax.plot(grid, result.amplitude_sqrt / np.sqrt(grid), "--", color="C1", lw=1,
                label="1/sqrt(N) law")
    ax.axvline(result.n_full, color="0.3", lw=0.8, label=f"this ensemble ({result.n_full})")
    if result.target is not None:
        ax.axhline(result.target, color="C3", lw=0.8, ls=":", label="target")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("trajectories N")
    ax.set_ylabel("error")
    ax.set_title(f"convergence of the {result.quantity}", fontsize=8)
    ax.legend(fontsize=legend_fontsize(), frameon=False)
    return fig
