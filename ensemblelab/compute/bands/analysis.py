"""What makes a band of a photoelectron map: strongest snapshots, groups and shares.

A band is a region ``energy_range x delay_range`` of a map from
:func:`~ensemblelab.compute.spectroscopy.compute_trpes`. Its intensity decomposes
exactly into one term per snapshot
(:func:`~ensemblelab.compute.spectroscopy.region_intensity`); :class:`BandAnalysis`
holds that array and answers, without sorting everything: the `k` strongest
snapshots, the sums over groups (cluster, active state, trajectory) with the number
of contributing snapshots and trajectories, and the share of any snapshot.
:class:`SnapshotGroups` holds the group keys of one ensemble, so that every band of
the same ensemble reuses them.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ...errors import SchemaError
from ._kernels_bands import cell_sums, integer_codes, pair_counts, top_k_indices

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble
    from ...data.spectrum import TRPESMap

__all__ = ["BAND_GROUPS", "BandAnalysis", "SnapshotGroups", "analyse_band", "group_band",
           "label_groups"]

#: the groupings of a band: ``group_by`` value -> column of ``ens.snapshots`` (or clusters)
BAND_GROUPS: dict[str, str] = {"cluster": "cluster", "state": "active", "traj": "traj"}

# a (group, trajectory) table answers sums and counts in one pass below this many cells
_MAX_PAIR_CELLS = 20_000_000


def _check_group_by(group_by: str, where: str) -> str:
    if group_by not in BAND_GROUPS:
        raise ValueError(f"The 'group_by' parameter of {where} must be one of "
                         f"{list(BAND_GROUPS)}. Got {group_by!r} instead.")
    return group_by


def _check_range(value: Any, name: str) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ValueError(f"The {name!r} parameter of analyse_band must be two numbers "
                         f"(low, high). Got {value!r} instead.") from None
    if not (np.isfinite(lo) and np.isfinite(hi)):
        raise ValueError(f"The {name!r} parameter of analyse_band must hold two finite "
                         f"numbers. Got {value!r} instead.")
    return (min(lo, hi), max(lo, hi))


def _read_only(arr: np.ndarray) -> np.ndarray:
    view = arr.view()
    view.setflags(write=False)
    return view


@dataclass(frozen=True, eq=False)
class SnapshotGroups:
    """Group keys of every snapshot row of one ensemble, shared by all its bands.

    Build it with :meth:`from_ensemble`. Codes are computed on first use and kept.

    Attributes
    ----------
    snapshot, traj, active : ndarray of int, shape (n_snapshots,)
        Snapshot id, trajectory id and active state of each row.
    time : ndarray of float, shape (n_snapshots,)
        Time of each row in fs.
    cluster : ndarray of int, shape (n_snapshots,)
        Cluster label of each row (-1: none or noise).
    state_labels : tuple of str
        Names of the neutral states.
    """

    snapshot: np.ndarray
    traj: np.ndarray
    time: np.ndarray
    active: np.ndarray
    cluster: np.ndarray
    state_labels: tuple[str, ...]
    _cache: dict[str, Any] = field(default_factory=dict, init=False, repr=False)

    @classmethod
    def from_ensemble(cls, ens: Ensemble, *, clusters: npt.ArrayLike | None = None
                      ) -> SnapshotGroups:
        """The group keys of `ens`.

        Parameters
        ----------
        ens : Ensemble
            In-memory ensemble.
        clusters : array_like of int, shape (n_snapshots,), optional
            Cluster label of each snapshot row of `ens` (-1: none); default all -1.

        Returns
        -------
        SnapshotGroups
        """
        snap = ens.snapshots
        n = len(snap)
        if clusters is None:
            labels: np.ndarray = np.full(n, -1, dtype=np.int64)
        else:
            labels = np.asarray(clusters)
            if labels.shape != (n,):
                raise SchemaError(f"The 'clusters' parameter of SnapshotGroups.from_ensemble "
                                  f"must have shape (n_snapshots={n},). Got {labels.shape} "
                                  "instead. Hint: one label per row of ens.snapshots.")
            labels = labels.astype(np.int64)
        return cls(snapshot=_read_only(snap["snapshot"].to_numpy()),
                   traj=_read_only(snap["traj"].to_numpy()),
                   time=_read_only(snap["time"].to_numpy()),
                   active=_read_only(snap["active"].to_numpy()),
                   cluster=_read_only(labels),
                   state_labels=tuple(str(s) for s in ens.state_labels))

    @property
    def n_snapshots(self) -> int:
        """Number of snapshot rows."""
        return int(self.snapshot.size)

    def codes(self, group_by: str) -> tuple[np.ndarray, np.ndarray]:
        """Group code of every row and the key of each code.

        Parameters
        ----------
        group_by : {"cluster", "state", "traj"}

        Returns
        -------
        codes : ndarray of intp, shape (n_snapshots,)
        values : ndarray, shape (n_codes,)
            Group key of each code (cluster label, state index, trajectory id).
        """
        _check_group_by(group_by, "SnapshotGroups.codes")
        key = f"codes:{group_by}"
        if key not in self._cache:
            keys = {"cluster": self.cluster, "state": self.active, "traj": self.traj}[group_by]
            self._cache[key] = integer_codes(keys)
        return self._cache[key]

    def pair_codes(self, group_by: str) -> np.ndarray:
        """Code of the (group, trajectory) pair of every row, shape (n_snapshots,)."""
        key = f"pairs:{group_by}"
        if key not in self._cache:
            codes, _ = self.codes(group_by)
            t_codes, t_values = self.codes("traj")
            self._cache[key] = codes * t_values.size + t_codes
        return self._cache[key]

    def row_of(self, snapshot_ids: npt.ArrayLike) -> np.ndarray:
        """Rows holding the given snapshot ids, shape (n,) (-1: not in this ensemble)."""
        ids = np.atleast_1d(np.asarray(snapshot_ids, dtype=np.int64))
        if "index" not in self._cache:
            self._cache["index"] = pd.Index(self.snapshot)
        return np.asarray(self._cache["index"].get_indexer(ids), dtype=np.int64)


@dataclass(frozen=True, eq=False)
class BandAnalysis:
    """The snapshots behind one band of a map: strongest ones, groups, shares.

    Build it with :func:`analyse_band` (or :meth:`from_intensity`). Group sums are
    computed on first use and kept; nothing is sorted beyond what is asked for.

    Attributes
    ----------
    groups : SnapshotGroups
        Group keys of the analysed ensemble's rows.
    intensity : ndarray of float, shape (n_snapshots,)
        Band intensity of each snapshot row in fs (eV^-1 eV fs), >= 0.
    energy_range : (float, float)
        Kinetic-energy interval in eV.
    delay_range : (float, float)
        Delay interval in fs.
    total : float
        Band intensity (sum of :attr:`intensity`).
    n_snapshots : int
        Number of contributing snapshots (intensity > 0).
    """

    groups: SnapshotGroups
    intensity: np.ndarray
    energy_range: tuple[float, float]
    delay_range: tuple[float, float]
    total: float
    n_snapshots: int
    _cache: dict[str, Any] = field(default_factory=dict, init=False, repr=False)

    @classmethod
    def from_intensity(cls, groups: SnapshotGroups, intensity: npt.ArrayLike, *,
                       energy_range: Sequence[float], delay_range: Sequence[float]
                       ) -> BandAnalysis:
        """A band analysis from the band intensity of every snapshot row.

        Parameters
        ----------
        groups : SnapshotGroups
            Group keys of the ensemble the intensities belong to.
        intensity : array_like of float, shape (n_snapshots,)
            Band intensity of each row (fs), e.g. from ``region_intensity``.
        energy_range, delay_range : (float, float)
            The band, in eV and fs.

        Returns
        -------
        BandAnalysis
        """
        x = np.array(intensity, dtype=np.float64)
        if x.shape != (groups.n_snapshots,):
            raise SchemaError(f"The 'intensity' parameter of BandAnalysis.from_intensity must "
                              f"have shape (n_snapshots={groups.n_snapshots},). Got "
                              f"{x.shape} instead. Hint: one value per snapshot row.")
        x.setflags(write=False)
        return cls(groups=groups, intensity=x,
                   energy_range=_check_range(energy_range, "energy_range"),
                   delay_range=_check_range(delay_range, "delay_range"),
                   total=float(x.sum()), n_snapshots=int(np.count_nonzero(x > 0)))

    # ------------------------------------------------------------------ per snapshot
    @property
    def mask(self) -> np.ndarray:
        """Contributing rows (intensity > 0), shape (n_snapshots,)."""
        if "mask" not in self._cache:
            self._cache["mask"] = _read_only(self.intensity > 0)
        return self._cache["mask"]

    def strongest_rows(self, k: int | None = None, *, group_by: str | None = None,
                       key: Any = None) -> np.ndarray:
        """Rows of the `k` strongest contributing snapshots, strongest first.

        Parameters
        ----------
        k : int, optional
            How many (default: every contributing snapshot).
        group_by : {"cluster", "state", "traj"}, optional
            With `key`: only the rows of that group.
        key
            The group's key (cluster label, state index or trajectory id).

        Returns
        -------
        ndarray of int, shape (<= k,)
            Ties at equal intensity keep the row order.
        """
        x = self.intensity
        if group_by is not None:
            codes, values = self.groups.codes(_check_group_by(
                group_by, "BandAnalysis.strongest_rows"))
            hit = np.flatnonzero(values == key)
            rows = np.flatnonzero(codes == hit[0]) if hit.size else np.zeros(0, np.int64)
            rows = rows[x[rows] > 0]
            k = rows.size if k is None else k
            return rows[top_k_indices(x[rows], k)]
        k = self.n_snapshots if k is None else min(int(k), self.n_snapshots)
        if k < self.n_snapshots:  # the top k are all contributing anyway: no gather
            return top_k_indices(x, k)
        rows = np.flatnonzero(self.mask)
        return rows[top_k_indices(x[rows], k)]

    def strongest(self, k: int | None = None, *, group_by: str | None = None,
                  key: Any = None) -> np.ndarray:
        """Snapshot ids of the `k` strongest contributing snapshots (see :meth:`strongest_rows`)."""
        return self.groups.snapshot[self.strongest_rows(k, group_by=group_by, key=key)]

    def table(self, k: int | None = None) -> pd.DataFrame:
        """The `k` strongest contributing snapshots as a table, strongest first.

        Parameters
        ----------
        k : int, optional
            How many rows (default: every contributing snapshot).

        Returns
        -------
        DataFrame
            ``snapshot``, ``traj``, ``time`` (fs), ``active``, ``intensity`` (fs),
            ``share`` (fraction of the whole band), ``cluster``. ``attrs``: ``total``,
            ``energy_range``, ``delay_range``, ``n_snapshots`` (all contributing),
            ``complete`` (the table holds every contributing snapshot).
        """
        rows = self.strongest_rows(k)
        g = self.groups
        out = pd.DataFrame({"snapshot": g.snapshot[rows], "traj": g.traj[rows],
                            "time": g.time[rows], "active": g.active[rows],
                            "intensity": self.intensity[rows]})
        out["share"] = out["intensity"] / self.total if self.total > 0 else 0.0
        out["cluster"] = g.cluster[rows]
        out.attrs.update(total=self.total, energy_range=self.energy_range,
                         delay_range=self.delay_range, n_snapshots=self.n_snapshots,
                         complete=rows.size == self.n_snapshots)
        return out

    def share_of(self, snapshot_ids: npt.ArrayLike) -> np.ndarray:
        """Share of each given snapshot in the band, shape (n,) (0 where not in the ensemble)."""
        rows = self.groups.row_of(snapshot_ids)
        out = np.zeros(rows.size)
        if self.total > 0:
            found = rows >= 0
            out[found] = self.intensity[rows[found]] / self.total
        return out

    # ------------------------------------------------------------------ groups
    @property
    def traj_counts(self) -> np.ndarray:
        """Contributing snapshots of each trajectory code, shape (n_trajectory_codes,)."""
        if "traj_counts" not in self._cache:
            t_codes, t_values = self.groups.codes("traj")
            self._cache["traj_counts"] = np.bincount(t_codes[self.mask],
                                                     minlength=t_values.size)
        return self._cache["traj_counts"]

    @property
    def n_trajectories(self) -> int:
        """Number of trajectories with at least one contributing snapshot."""
        return int(np.count_nonzero(self.traj_counts))

    def group_sums(self, group_by: str) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                  np.ndarray]:
        """Band intensity, contributing snapshots and trajectories of every group code.

        Parameters
        ----------
        group_by : {"cluster", "state", "traj"}

        Returns
        -------
        intensity : ndarray of float, shape (n_codes,)
        n_snapshots, n_trajectories : ndarray of int, shape (n_codes,)
        values : ndarray, shape (n_codes,)
            The group key of each code (codes without rows have zero counts).
        """
        _check_group_by(group_by, "BandAnalysis.group_sums")
        key = f"sums:{group_by}"
        if key in self._cache:
            return self._cache[key]
        x, mask = self.intensity, self.mask
        t_codes, t_values = self.groups.codes("traj")
        n_t = t_values.size
        if group_by == "traj":
            inten, n_snap = cell_sums(t_codes, x, n_t)  # one pass: sums and counts
            n_snap = self._cache.setdefault("traj_counts", n_snap)
            out = (inten, n_snap, (n_snap > 0).astype(np.int64), t_values)
        else:
            codes, values = self.groups.codes(group_by)
            n_g = values.size
            if n_g * n_t <= _MAX_PAIR_CELLS:
                pair_int, per_pair = self.pair_sums(group_by)
                inten = pair_int.sum(axis=1)
                self._cache.setdefault("traj_counts", per_pair.sum(axis=0))
                out = (inten, per_pair.sum(axis=1), np.count_nonzero(per_pair, axis=1), values)
            else:
                inten = np.bincount(codes, x, minlength=n_g)
                n_snap = np.bincount(codes[mask], minlength=n_g)
                out = (inten, n_snap, pair_counts(codes[mask], t_codes[mask], n_g, n_t),
                       values)
        self._cache[key] = out
        return out

    def pair_sums(self, group_by: str) -> tuple[np.ndarray, np.ndarray]:
        """Band intensity and contributing snapshots of every (group, trajectory) pair.

        Parameters
        ----------
        group_by : {"cluster", "state"}

        Returns
        -------
        intensity : ndarray of float, shape (n_codes, n_trajectory_codes)
        n_snapshots : ndarray of int, shape (n_codes, n_trajectory_codes)
            Computed in one pass over the rows and kept.
        """
        if _check_group_by(group_by, "BandAnalysis.pair_sums") == "traj":
            raise ValueError("pair_sums groups by cluster or state (a trajectory's pairs "
                             "are group_sums('traj')).")
        key = f"pair_sums:{group_by}"
        if key not in self._cache:
            n_g = self.groups.codes(group_by)[1].size
            n_t = self.groups.codes("traj")[1].size
            sums, counts = cell_sums(self.groups.pair_codes(group_by), self.intensity,
                                     n_g * n_t)
            self._cache[key] = (sums.reshape(n_g, n_t), counts.reshape(n_g, n_t))
        return self._cache[key]

    def group_table(self, group_by: str, *, cluster_names: dict[str, str] | None = None
                    ) -> pd.DataFrame:
        """The band summed over groups, exact over every contributing snapshot.

        Parameters
        ----------
        group_by : {"cluster", "state", "traj"}
            Cluster label, active state or trajectory.
        cluster_names : dict, optional
            Display name of each cluster code (keys: the code as a string).

        Returns
        -------
        DataFrame
            ``key``, ``label`` (see :func:`label_groups`), ``share`` (sums to 1 over the
            groups), ``intensity`` (fs), ``n_snapshots``, ``n_trajectories``; groups
            with a contributing snapshot only, largest share first.
        """
        inten, n_snap, n_traj, values = self.group_sums(group_by)
        keep = np.flatnonzero(n_snap > 0)
        order = keep[np.argsort(-inten[keep], kind="stable")]
        out = pd.DataFrame({
            "key": values[order],
            "share": inten[order] / self.total if self.total > 0 else 0.0,
            "intensity": inten[order],
            "n_snapshots": n_snap[order],
            "n_trajectories": n_traj[order],
        })
        return label_groups(out, group_by, state_labels=self.groups.state_labels,
                            cluster_names=cluster_names)


def analyse_band(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
    clusters: npt.ArrayLike | None = None,
    groups: SnapshotGroups | None = None,
    model: Any = None,
    sticks: Any = None,
) -> BandAnalysis:
    """Find what makes one band of a map: per-snapshot intensities, groups, shares.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    trpes_map : TRPESMap
        A map from :func:`~ensemblelab.compute.spectroscopy.compute_trpes`.
    energy_range : (float, float)
        Kinetic-energy interval in eV.
    delay_range : (float, float)
        Delay interval in fs.
    clusters : array_like of int, shape (n_snapshots,), optional
        Cluster label of each snapshot row of `ens` (-1: none).
    groups : SnapshotGroups, optional
        Group keys of `ens` from an earlier call (``result.groups``): reused, so a
        second band of the same ensemble skips them (`clusters` is then ignored).
    model : TRPESModel, optional
        The stick model the map was made with (``compute_trpes(..., return_model=True)``);
        without it the model is rebuilt from the map's parameters.
    sticks : BandSticks, optional
        Sticks of `ens` indexed for band queries (:func:`.band_sticks.prepare_band_sticks`)
        that serve this map (``sticks.serves(trpes_map)`` is empty): used instead of
        `model`, so a map of another probe width or photon energy needs no new sticks.

    Returns
    -------
    BandAnalysis

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(6, seed=1, t_max=60.0, dt=2.0)
    >>> groups = SnapshotGroups.from_ensemble(ens)
    >>> x = np.where(ens.snapshots["active"].to_numpy() == 2, 1.0, 0.0)  # invented
    >>> band = BandAnalysis.from_intensity(groups, x, energy_range=(1.0, 2.0),
    ...                                    delay_range=(0.0, 60.0))
    >>> band.group_table("state")[["label", "share"]].to_numpy().tolist()
    [['S2', 1.0]]
    """
    from ..spectroscopy.contributions import region_intensity

    e_rng = _check_range(energy_range, "energy_range")
    d_rng = _check_range(delay_range, "delay_range")
    if groups is None:
        groups = SnapshotGroups.from_ensemble(ens, clusters=clusters)
    elif groups.n_snapshots != ens.n_snapshots:
        raise SchemaError(f"The 'groups' parameter of analyse_band holds "
                          f"{groups.n_snapshots} rows; ens has {ens.n_snapshots}. Hint: "
                          "pass the groups of the same ensemble (or none).")
    if sticks is not None:
        if sticks.n_snapshots != ens.n_snapshots:
            raise SchemaError(f"The 'sticks' parameter of analyse_band holds sticks of "
                              f"{sticks.n_snapshots} snapshots; ens has {ens.n_snapshots}. "
                              "Hint: pass the sticks of the same ensemble (or none).")
        x = sticks.region_intensity(trpes_map, energy_range=e_rng, delay_range=d_rng)
    else:
        x = region_intensity(ens, trpes_map, energy_range=e_rng, delay_range=d_rng,
                             model=model)
    return BandAnalysis.from_intensity(groups, x, energy_range=e_rng, delay_range=d_rng)


def label_groups(table: pd.DataFrame, group_by: str, *,
                 state_labels: Sequence[str] | None = None,
                 cluster_names: dict[str, str] | None = None) -> pd.DataFrame:
    """Insert the display ``label`` of each group key as column 1 of a grouped table.

    Parameters
    ----------
    table : DataFrame
        A grouped table with a ``key`` column.
    group_by : {"cluster", "state", "traj"}
    state_labels : sequence of str, optional
        Names of the neutral states (default ``"state <k>"``).
    cluster_names : dict, optional
        Display name of each cluster code (keys: the code as a string); a negative
        code is ``"unclustered"``.

    Returns
    -------
    DataFrame
        A new table (index reset).
    """
    _check_group_by(group_by, "label_groups")
    keys = [int(k) for k in table["key"]]
    if group_by == "state" and state_labels is not None:
        labels = [str(state_labels[k]) for k in keys]
    elif group_by == "cluster":
        names = cluster_names or {}
        labels = ["unclustered" if k < 0 else f"cluster {names.get(str(k), k)}" for k in keys]
    elif group_by == "state":
        labels = [f"state {k}" for k in keys]
    else:
        labels = [f"trajectory {k}" for k in keys]
    out = table.copy()
    out.insert(1, "label", labels)
    return out.reset_index(drop=True)


def group_band(band: pd.DataFrame, group_by: str, *,
               state_labels: Sequence[str] | None = None,
               cluster_names: dict[str, str] | None = None) -> pd.DataFrame:
    """Sum a table of contributing snapshots over groups (pandas ``groupby``).

    For a snapshot table at hand (e.g. :meth:`BandAnalysis.table` or a table made
    elsewhere); :meth:`BandAnalysis.group_table` is the exact and faster way for a band
    analysed with :func:`analyse_band`.

    Parameters
    ----------
    band : DataFrame
        One row per contributing snapshot with ``share``, ``traj``, optionally
        ``intensity``, and the grouping column (``cluster``, ``active`` or ``traj``).
    group_by : {"cluster", "state", "traj"}
        Grouping (``"state"`` groups by the active state).
    state_labels : sequence of str, optional
        Names of the neutral states, for the ``label`` column.
    cluster_names : dict, optional
        Display name of each cluster code (keys: the code as a string).

    Returns
    -------
    DataFrame
        ``key`` (group value), ``label``, ``share`` (sums to the table's covered
        share), ``intensity`` (fs), ``n_snapshots``, ``n_trajectories``; largest share
        first.
    """
    column = BAND_GROUPS[_check_group_by(group_by, "group_band")]
    grouped = band.groupby(column, sort=False)
    out = pd.DataFrame({
        "share": grouped["share"].sum(),
        "intensity": grouped["intensity"].sum() if "intensity" in band else np.nan,
        "n_snapshots": grouped.size(),
        "n_trajectories": grouped["traj"].nunique(),
    })
    out.index.name = "key"
    out = out.reset_index().sort_values("share", ascending=False, kind="stable")
    return label_groups(out.reset_index(drop=True), group_by, state_labels=state_labels,
                        cluster_names=cluster_names)
