"""Shares of groups (state, cluster, trajectory, channel...) with trajectory-bootstrap intervals.

A share is a ratio of sums over trajectories, ``share_g = sum_j x_gj / sum_j x_j``, with
``x_gj`` the part of group g made by trajectory j (trajectory weights already inside).
Trajectories are the independent units (snapshots of one trajectory are correlated), so
the interval resamples whole trajectories with replacement and keeps their weights
(percentile bootstrap). All resamples are one product of a counts matrix with the
per-trajectory partial sums (:mod:`._kernels_resample`), fast enough for a brush.

Interval spelling, as everywhere in the package: ``interval="bootstrap"`` (or None),
``ci`` (level), ``n_boot`` (resamples), ``random_state`` (seed).
"""

from __future__ import annotations

import functools
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import sparse

from ...errors import SchemaError
from ..bands._kernels_bands import pair_counts
from ._kernels_resample import RESAMPLING, percentile_interval, ratio_replicates, resample_counts

if TYPE_CHECKING:
    from ..bands.analysis import BandAnalysis

__all__ = ["grouped_shares", "band_share_table", "format_share", "check_interval_args",
           "bootstrap_counts_for", "ZERO_TOL"]

INTERVALS = ("bootstrap", None)

#: a lower bound at or below this (a fraction) counts as reaching zero (rounding noise)
ZERO_TOL = 1e-12


def check_interval_args(where: str, *, interval: Any, ci: Any, n_boot: Any,
                        resampling: str = "multinomial") -> None:
    """Validate the package's interval arguments (``interval``, ``ci``, ``n_boot``)."""
    if interval not in INTERVALS:
        raise SchemaError(f"The 'interval' parameter of {where} must be 'bootstrap' or None; "
                          f"got {interval!r}.")
    if not (isinstance(ci, float | int) and not isinstance(ci, bool) and 0.0 < float(ci) < 1.0):
        raise SchemaError(f"The 'ci' parameter of {where} must be a float in (0, 1); got "
                          f"{ci!r}.")
    if interval == "bootstrap" and (isinstance(n_boot, bool) or not isinstance(
            n_boot, int | np.integer) or n_boot < 2):
        raise SchemaError(f"The 'n_boot' parameter of {where} must be an int >= 2; got "
                          f"{n_boot!r}. Hint: interval=None skips the bootstrap.")
    if resampling not in RESAMPLING:
        raise SchemaError(f"The 'resampling' parameter of {where} must be one of "
                          f"{RESAMPLING}; got {resampling!r}.")


@functools.lru_cache(maxsize=16)
def _cached_counts(n_units: int, n_boot: int, seed: int, method: str) -> np.ndarray:
    out = resample_counts(n_units, n_boot, np.random.default_rng(seed), method=method)
    out.setflags(write=False)
    return out


def bootstrap_counts_for(n_units: int, n_boot: int, random_state: Any, *,
                         resampling: str = "multinomial") -> np.ndarray:
    """Resample multiplicities (n_boot, n_units); cached (read-only) for an int seed."""
    if isinstance(random_state, int | np.integer) and not isinstance(random_state, bool):
        return _cached_counts(int(n_units), int(n_boot), int(random_state), resampling)
    return resample_counts(int(n_units), int(n_boot), np.random.default_rng(random_state),
                           method=resampling)


def _codes(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(keys, sort=True)
    return codes.astype(np.intp, copy=False), np.asarray(uniques)


def share_replicates(values: np.ndarray, group_codes: np.ndarray, n_groups: int,
                     unit_codes: np.ndarray, n_units: int, counts: np.ndarray
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Shares and their bootstrap replicates from per-row values.

    Parameters
    ----------
    values : ndarray, shape (n_rows,)
        Contribution of every row (>= 0 for shares).
    group_codes, unit_codes : ndarray of int, shape (n_rows,)
        Group and unit (trajectory) code of every row; negative group codes count in the
        total but in no group.
    n_groups, n_units : int
    counts : ndarray, shape (n_boot, n_units)

    Returns
    -------
    share : ndarray, shape (n_groups,)
    replicates : ndarray, shape (n_boot, n_groups)
        NaN for a resample whose total is 0.
    """
    per_unit = np.bincount(unit_codes, values, minlength=n_units)
    keep = group_codes >= 0
    total = float(per_unit.sum())
    num: np.ndarray
    if n_groups * n_units <= 5_000_000:  # dense (group, unit) sums, one bincount
        dense = np.bincount(group_codes[keep] * n_units + unit_codes[keep], values[keep],
                            minlength=n_groups * n_units).reshape(n_groups, n_units)
        group_sum = dense.sum(axis=1)
        num = counts @ dense.T  # (n_boot, n_groups)
    else:  # many groups (e.g. one per trajectory): sparse
        part = sparse.csr_matrix((values[keep], (unit_codes[keep], group_codes[keep])),
                                 shape=(n_units, n_groups))
        group_sum = np.asarray(part.sum(axis=0)).ravel()
        num = np.asarray((part.T @ counts.T).T)
    share = group_sum / total if total != 0 else np.full(n_groups, np.nan)
    den = counts @ per_unit
    with np.errstate(divide="ignore", invalid="ignore"):
        reps = np.where(den[:, None] != 0, num / np.where(den != 0, den, 1.0)[:, None], np.nan)
    return share, reps


def grouped_shares(
    values: npt.ArrayLike,
    groups: npt.ArrayLike,
    units: npt.ArrayLike,
    *,
    interval: str | None = "bootstrap",
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    resampling: str = "multinomial",
    top: int | None = None,
) -> pd.DataFrame:
    """Share of every group in a sum of contributions, with a trajectory-bootstrap interval.

    Parameters
    ----------
    values : array_like, shape (n_rows,)
        Contribution of each row (a snapshot, a stick...), trajectory weight included.
    groups : array_like, shape (n_rows,)
        Group key of each row (state, cluster, channel, trajectory...).
    units : array_like, shape (n_rows,)
        Independent unit of each row (the trajectory id): resampled whole.
    interval : {"bootstrap", None}
        Percentile bootstrap over units, or no interval (NaN bounds).
    ci : float in (0, 1)
        Level of the interval.
    n_boot : int
        Number of resamples.
    random_state : int, Generator or None
        Seed of the resamples.
    resampling : {"multinomial", "poisson"}
        Resample multiplicities: classical (n draws with replacement) or Poisson(1).
    top : int, optional
        Intervals for the `top` largest groups only (the others get NaN bounds): bounds
        the cost when there are many groups (e.g. one per trajectory).

    Returns
    -------
    DataFrame
        One row per group with a nonzero contribution, largest share first: ``key``,
        ``share`` (sums to 1), ``lower``, ``upper``, ``includes_zero`` (the interval
        reaches 0: the group may not contribute at all; False without an interval),
        ``value`` (summed contribution), ``n_units`` (units contributing). ``attrs``:
        ``interval``, ``ci``, ``n_boot``, ``n_units`` (all units), ``n_eff`` (Kish effective
        number of units from the per-unit totals).

    Examples
    --------
    >>> t = grouped_shares([1.0, 1.0, 2.0, 0.0], ["a", "b", "a", "b"], [0, 1, 2, 3],
    ...                    n_boot=200)
    >>> t[["key", "share"]].to_numpy().tolist()
    [['a', 0.75], ['b', 0.25]]
    >>> bool((t["lower"] <= t["share"]).all() and (t["share"] <= t["upper"]).all())
    True
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    g = np.asarray(groups).ravel()
    u = np.asarray(units).ravel()
    if not (x.shape == g.shape == u.shape):
        raise SchemaError(f"grouped_shares needs values, groups and units of one length; got "
                          f"{x.shape}, {g.shape}, {u.shape}.")
    if not np.all(np.isfinite(x)):
        raise SchemaError("The 'values' parameter of grouped_shares must be finite.")
    check_interval_args("grouped_shares", interval=interval, ci=ci, n_boot=n_boot,
                        resampling=resampling)
    g_codes, g_keys = _codes(g)
    u_codes, u_keys = _codes(u)
    return _share_table(x, g_codes, g_keys, u_codes, u_keys.size, interval=interval, ci=ci,
                        n_boot=n_boot, random_state=random_state, resampling=resampling,
                        top=top)


def _share_table(x: np.ndarray, g_codes: np.ndarray, g_keys: np.ndarray, u_codes: np.ndarray,
                 n_units: int, *, interval: str | None, ci: float, n_boot: int,
                 random_state: Any, resampling: str, top: int | None = None,
                 count_units: bool = True) -> pd.DataFrame:
    n_g = g_keys.size
    inside = g_codes >= 0
    value = np.bincount(g_codes[inside], x[inside], minlength=n_g)
    n_u: np.ndarray = np.zeros(n_g, dtype=np.int64)
    if count_units:
        hit = (x != 0) & inside
        if n_g * n_units <= 2_000_000:
            n_u = pair_counts(g_codes[hit], u_codes[hit], n_g, n_units)
        else:  # sort the distinct (group, unit) pairs instead of a dense table
            pairs = np.unique(g_codes[hit].astype(np.int64) * n_units + u_codes[hit])
            n_u = np.bincount(pairs // n_units, minlength=n_g)
    per_unit = np.bincount(u_codes, x, minlength=n_units)
    total = float(per_unit.sum())
    share = value / total if total != 0 else np.full(n_g, np.nan)
    lo = np.full(n_g, np.nan)
    hi = np.full(n_g, np.nan)
    keep = np.flatnonzero(value != 0)
    order = keep[np.argsort(-value[keep], kind="stable")]
    if interval == "bootstrap":
        counts = bootstrap_counts_for(n_units, n_boot, random_state, resampling=resampling)
        chosen = order if top is None else order[:max(int(top), 0)]
        remap = np.full(n_g, -1, dtype=np.int64)
        remap[chosen] = np.arange(chosen.size)
        sub = remap[g_codes] if chosen.size < n_g else g_codes
        _, reps = share_replicates(x, np.where(inside, sub, -1), chosen.size if chosen.size
                                   < n_g else n_g, u_codes, n_units, counts)
        lo_c, hi_c = percentile_interval(reps, float(ci))
        if chosen.size < n_g:
            lo[chosen], hi[chosen] = lo_c, hi_c
        else:
            lo, hi = lo_c, hi_c
    out = pd.DataFrame({"key": g_keys[order], "share": share[order], "lower": lo[order],
                        "upper": hi[order], "includes_zero": np.where(np.isnan(lo[order]), False,
                                                     ~(lo[order] > ZERO_TOL)),
                        "value": value[order], "n_units": n_u[order]})
    sq = float(np.sum(per_unit**2))
    out.attrs.update(interval=interval, ci=float(ci),
                     n_boot=int(n_boot) if interval == "bootstrap" else 0,
                     n_units=int(np.count_nonzero(per_unit)),
                     n_eff=total * total / sq if sq > 0 else 0.0, resampling=resampling)
    return out


def band_share_table(
    band: BandAnalysis,
    group_by: str,
    *,
    interval: str | None = "bootstrap",
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    resampling: str = "multinomial",
    cluster_names: dict[str, str] | None = None,
    top: int | None = None,
) -> pd.DataFrame:
    """A band's grouped shares (``BandAnalysis.group_table``) with bootstrap intervals.

    Parameters
    ----------
    band : BandAnalysis
        From :func:`~ensemblelab.compute.bands.analyse_band`.
    group_by : {"cluster", "state", "traj"}
        The grouping. For the ionisation channel (cation state) or the (state, channel)
        pair use :func:`~.decomposition.decomposition_fractions` over the same region.
    interval, ci, n_boot, random_state, resampling
        As in :func:`grouped_shares`: trajectories are resampled whole, weights kept.
    cluster_names : dict, optional
        Display name of each cluster code.
    top : int, optional
        Intervals for the `top` largest groups only (NaN bounds for the rest; the
        explorer asks for the rows it shows).

    Returns
    -------
    DataFrame
        The columns of ``band.group_table(group_by)`` (``key``, ``label``, ``share``,
        ``intensity``, ``n_snapshots``, ``n_trajectories``) plus ``lower``, ``upper``
        and ``includes_zero``, same row order. The per-snapshot band intensities hold
        the map's normaliser (alive weight per delay) of the full ensemble, which is
        exact for shares when no trajectory ends inside the band.

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.compute.bands import BandAnalysis, SnapshotGroups
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(30, seed=1, t_max=60.0, dt=2.0)
    >>> x = np.ones(ens.n_snapshots)  # invented band intensities
    >>> band = BandAnalysis.from_intensity(SnapshotGroups.from_ensemble(ens), x,
    ...                                    energy_range=(1, 2), delay_range=(0, 60))
    >>> t = band_share_table(band, "state", n_boot=200)
    >>> list(t.columns[-3:]), bool(t["includes_zero"].any())
    (['lower', 'upper', 'includes_zero'], False)
    """
    check_interval_args("band_share_table", interval=interval, ci=ci, n_boot=n_boot,
                        resampling=resampling)
    table = band.group_table(group_by, cluster_names=cluster_names)
    g_codes, g_keys = band.groups.codes(group_by)
    t_codes, t_keys = band.groups.codes("traj")
    n_t = int(t_keys.size)
    x = band.intensity
    pairs = group_by != "traj" and g_keys.size * n_t <= 20_000_000
    # per-trajectory sums: from the (group, trajectory) sums the table was made from
    per_unit = (band.pair_sums(group_by)[0].sum(axis=0) if pairs
                else band.group_sums("traj")[0])
    keys = table["key"].to_numpy()
    k = keys.size if top is None else min(keys.size, max(int(top), 0))
    lower = np.full(keys.size, np.nan)
    upper = np.full(keys.size, np.nan)
    if interval == "bootstrap" and k:
        sel = np.searchsorted(np.asarray(g_keys), keys[:k])  # codes of the shown groups
        part: np.ndarray
        if group_by == "traj":  # a trajectory's group holds only itself
            part = np.zeros((k, n_t))
            part[np.arange(k), sel] = per_unit[sel]
        elif pairs:  # (group, trajectory) sums, kept by the band analysis
            part = band.pair_sums(group_by)[0][sel]
        else:
            hit = np.isin(g_codes, sel)
            remap = np.full(g_keys.size, -1, dtype=np.int64)
            remap[sel] = np.arange(k)
            part = np.zeros((k, n_t))
            np.add.at(part, (remap[g_codes[hit]], t_codes[hit]), x[hit])
        counts = bootstrap_counts_for(n_t, n_boot, random_state, resampling=resampling)
        reps = ratio_replicates(part.T, per_unit, np.asarray(counts))
        lower[:k], upper[:k] = percentile_interval(reps, float(ci))
    out = table.copy()
    out["lower"] = lower
    out["upper"] = upper
    out["includes_zero"] = np.where(np.isnan(lower), False, ~(lower > ZERO_TOL))
    total = float(per_unit.sum())
    sq = float(np.sum(per_unit**2))
    out.attrs.update(interval=interval, ci=float(ci),
                     n_boot=int(n_boot) if interval == "bootstrap" else 0,
                     n_units=int(np.count_nonzero(per_unit)),
                     n_eff=total * total / sq if sq > 0 else 0.0, resampling=resampling)
    return out


def format_share(label: str, share: float, lower: float = float("nan"),
                 upper: float = float("nan")) -> str:
    """A share as text with its interval in percent, e.g. ``"S1 86.7% [81, 92]"``.

    The share has one decimal; the bounds have none when the interval is at least 2
    percentage points wide, one otherwise. Without an interval (NaN bounds) the text
    says so: ``"S1 86.7% [no interval]"``.

    Examples
    --------
    >>> format_share("S1", 0.8672, 0.8104, 0.9213)
    'S1 86.7% [81, 92]'
    >>> format_share("S2", 0.0123, 0.0051, 0.0198)
    'S2 1.2% [0.5, 2.0]'
    >>> format_share("S0", 0.5)
    'S0 50.0% [no interval]'
    """
    head = f"{label} {100.0 * share:.1f}%"
    if not (np.isfinite(lower) and np.isfinite(upper)):
        return f"{head} [no interval]"
    digits = 0 if 100.0 * (upper - lower) >= 2.0 else 1
    return f"{head} [{100.0 * lower:.{digits}f}, {100.0 * upper:.{digits}f}]"
