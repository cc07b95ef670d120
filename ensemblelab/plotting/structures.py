"""Static matplotlib figures for clusters, hop clusters and flagged trajectories.

Headless (Agg canvas, no pyplot), sized for a journal column (common practice);
export with :func:`ensemblelab.plotting.populations.savefig`.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, cast

import numpy as np
import pandas as pd

from ._style import TIME, legend_fontsize, new_figure, round_ticks

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.ticker import MaxNLocator

__all__ = ["plot_cluster_summary", "plot_cluster_time_profile", "plot_flags", "plot_hop_counts"]


def _axes(ax: Axes | None) -> Axes:
    if ax is not None:
        return ax
    return new_figure("single", aspect=0.75).add_subplot()


def _bars(ax: Axes, names: list[str], frac: np.ndarray, lo: np.ndarray, hi: np.ndarray,
          ylabel: str) -> Axes:
    x = np.arange(len(names))
    err = np.vstack([frac - lo, hi - frac])
    ax.bar(x, frac, yerr=err, capsize=3, color="0.55", edgecolor="0.2")
    ax.set_xticks(x, names, rotation=45, ha="right")
    ax.set_ylabel(ylabel)
    round_ticks(ax)
    ax.set_xticks(x, names, rotation=45, ha="right")
    return ax


def plot_cluster_summary(result: Any, *, ax: Axes | None = None) -> Axes:
    """Bar chart of cluster fractions with their 95 % Wilson intervals.

    Parameters
    ----------
    result : ClusterResult
        From :func:`ensemblelab.compute.structures.clustering.cluster_snapshots`.
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    s = result.summary
    return _bars(_axes(ax), s["cluster"].astype(str).tolist(), s["fraction"].to_numpy(),
                 s["lower"].to_numpy(), s["upper"].to_numpy(), "fraction of snapshots")


def plot_hop_counts(result: Any, *, ax: Axes | None = None) -> Axes:
    """Bar chart of hop-cluster fractions with 95 % Wilson intervals (HopClusterResult)."""
    c = result.counts
    return _bars(_axes(ax), c["cluster"].astype(str).tolist(), c["fraction"].to_numpy(),
                 c["lower"].to_numpy(), c["upper"].to_numpy(), "fraction of hops")


def plot_cluster_time_profile(result: Any, *, bins: int = 20, ax: Axes | None = None) -> Axes:
    """Stacked area plot of cluster fractions against time (fs).

    Parameters
    ----------
    result : ClusterResult
    bins : int
        Number of time bins.
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _axes(ax)
    prof: pd.DataFrame = result.time_profile(bins=bins)
    ax.stackplot(prof.index.to_numpy(), prof.to_numpy().T, labels=[str(c) for c in prof.columns])
    ax.set_xlabel(TIME)
    ax.set_ylabel("fraction")
    ax.set_ylim(0, 1)
    round_ticks(ax)
    ax.legend(fontsize=legend_fontsize(), loc="upper left", bbox_to_anchor=(1.0, 1.0),
              frameon=False)
    return ax


def plot_flags(table: pd.DataFrame, *, ax: Axes | None = None) -> Axes:
    """Horizontal bars: number of trajectories carrying each flag kind.

    Parameters
    ----------
    table : DataFrame
        From :func:`ensemblelab.compute.structures.outliers.flag_trajectories`.
    ax : matplotlib Axes, optional

    Returns
    -------
    Axes
    """
    ax = _axes(ax)
    kinds = table["flags"].str.split(";").explode()
    counts = kinds[kinds.astype(bool)].value_counts().sort_values()
    if counts.empty:
        ax.text(0.5, 0.5, "no flags", ha="center", va="center", transform=ax.transAxes)
    else:
        ax.barh(counts.index.tolist(), counts.to_numpy(), color="0.55", edgecolor="0.2")
    ax.set_xlabel(f"trajectories (of {len(table)})")
    cast("MaxNLocator", ax.xaxis.get_major_locator()).set_params(integer=True)
    return ax
