"""The shared selection state that every view observes.

No view talks to another view: each one writes what the user did into one
:class:`SelectionModel` and redraws itself from the traits it observes.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
from traitlets import Any as AnyTrait
from traitlets import Dict, HasTraits, Instance, Int, Tuple, Unicode, observe, validate

from ..data.ensemble import Ensemble

__all__ = ["SelectionModel"]


def _range(value: Any, name: str) -> tuple[float, float] | None:
    if value is None:
        return None
    lo, hi = (float(v) for v in value)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        raise ValueError(f"{name} must hold two finite numbers; got {value!r}.")
    return (min(lo, hi), max(lo, hi))


class SelectionModel(HasTraits):
    """What is selected, shown and excluded; shared by all views of one ensemble.

    Parameters
    ----------
    ens : Ensemble
        The full ensemble (never modified; exclusions make new Ensembles).
    **traits
        Initial values of the traits below.

    Attributes
    ----------
    ens : Ensemble
        The full ensemble.
    excluded : tuple of int
        Trajectory ids the user excluded (sorted); :attr:`current` lacks them.
    trpes_map : TRPESMap or None
        The map currently shown (of :attr:`current`), set by the map view.
    energy_range : (float, float) or None
        Selected photoelectron kinetic-energy interval in eV.
    delay_range : (float, float) or None
        Selected pump-probe delay interval in fs.
    band : DataFrame or None
        The strongest contributing snapshots of the selected band (at most
        :attr:`band_rows` rows, strongest first; the columns of
        :func:`ensemblelab.compute.spectroscopy.contributions` with ``group_by="snapshot"``
        plus ``cluster`` and ``weight``). Shares are fractions of the whole band.
        ``attrs``: ``total`` (band intensity), ``n_snapshots`` (all contributing
        ones), ``complete`` (the table holds every contributing snapshot).
        :meth:`group_table` groups *all* contributing snapshots exactly;
        :meth:`full_band` gives the whole table.
    selected : tuple of int
        Snapshot ids behind the current selection, strongest first (at most
        :attr:`max_selected`).
    frame : int
        The current snapshot id (-1: none), shown by the structure view and
        followed by the trajectory view's player.
    trajectory : int or None
        The current trajectory id.
    cluster : int or None
        The current cluster label.
    time : float or None
        The time cursor in fs.
    clusters : ndarray of int or None, shape (n_snapshots,)
        Cluster label of every snapshot of :attr:`ens` (-1: noise / none).
    flags : DataFrame or None
        Flagged-trajectory table (``traj, flagged, reason, ...``).
    cluster_names : dict
        Display name of each cluster code (``{"0": "S1:0", ...}``).
    cluster_medoids : tuple of int
        Medoid snapshot id of each cluster (from the clustering result).
    labels : dict
        User labels saved with the session, e.g. ``{"clusters": {"0": "planar"},
        "bands": {"A": [e0, e1, d0, d1]}}``.
    group_by : {"cluster", "state", "traj"}
        How the selection table groups the band.
    max_selected : int
        At most this many snapshot ids go to :attr:`selected`.
    band_rows : int
        At most this many strongest snapshots are kept in :attr:`band`.
    """

    ens = Instance(Ensemble)
    excluded = Tuple()
    trpes_map = AnyTrait(None, allow_none=True)
    energy_range = AnyTrait(None, allow_none=True)
    delay_range = AnyTrait(None, allow_none=True)
    band = Instance(pd.DataFrame, allow_none=True)
    selected = Tuple()
    frame = Int(-1)
    trajectory = AnyTrait(None, allow_none=True)
    cluster = AnyTrait(None, allow_none=True)
    time = AnyTrait(None, allow_none=True)
    clusters = AnyTrait(None, allow_none=True)
    flags = Instance(pd.DataFrame, allow_none=True)
    cluster_names = Dict()
    cluster_medoids = Tuple()
    labels = Dict()
    group_by = Unicode("cluster")
    max_selected = Int(200)
    band_rows = Int(1000)

    def __init__(self, ens: Ensemble, **traits: Any) -> None:
        if not isinstance(ens, Ensemble):
            raise TypeError(f"ens must be an ensemblelab.Ensemble; got {type(ens).__name__}.")
        super().__init__(ens=ens, **traits)
        self._current_key: tuple[int, ...] | None = None
        self._current: Ensemble | None = None
        self._stick_models: tuple[Any, Any, Any] | None = None
        ids = ens.snapshots["snapshot"].to_numpy()
        self._identity_ids = bool(np.array_equal(ids, np.arange(ids.size)))
        self._row_of = pd.Index(ids)
        self._weights = ens.snapshot_weights()  # per snapshot row (the ensemble is frozen)
        self._top_share: dict[int, float] = {}
        self._band_data: _BandData | None = None
        self._keys: dict[str, tuple[np.ndarray, np.ndarray]] = {}  # per group_by: codes, values
        self._keys_for: tuple[int, int] | None = None

    # ------------------------------------------------------------------ validation
    @validate("excluded")
    def _valid_excluded(self, proposal: Any) -> tuple[int, ...]:
        ids = tuple(sorted({int(i) for i in proposal["value"]}))
        known = set(self.ens.trajectories["traj"].tolist())
        unknown = [i for i in ids if i not in known]
        if unknown:
            raise ValueError(f"excluded holds unknown trajectory id(s) {unknown[:10]}.")
        return ids

    @validate("group_by")
    def _valid_group_by(self, proposal: Any) -> str:
        value = proposal["value"]
        if value not in ("cluster", "state", "traj"):
            raise ValueError(
                f"group_by must be one of 'cluster', 'state', 'traj'; got {value!r}."
            )
        return value

    @validate("energy_range")
    def _valid_energy_range(self, proposal: Any) -> tuple[float, float] | None:
        return _range(proposal["value"], "energy_range")

    @validate("delay_range")
    def _valid_delay_range(self, proposal: Any) -> tuple[float, float] | None:
        return _range(proposal["value"], "delay_range")

    @validate("clusters")
    def _valid_clusters(self, proposal: Any) -> np.ndarray | None:
        value = proposal["value"]
        if value is None:
            return None
        arr = np.asarray(value).astype(np.int64)
        if arr.shape != (self.ens.n_snapshots,):
            raise ValueError(
                f"clusters must have shape (n_snapshots={self.ens.n_snapshots},); got {arr.shape}."
            )
        return arr

    def remember_stick_model(self, trpes_map: Any, model: Any) -> None:
        """Keep the stick model of `trpes_map` (made from :attr:`current`) for band queries."""
        self._stick_models = (trpes_map, self.current, model)

    def stick_model(self) -> Any:
        """The stick model of :attr:`trpes_map` for :attr:`current` (built once per map).

        An explicit cache on this (mutable) model, valid while both stay the same
        objects; the map itself carries no model.
        """
        from ..compute.spectroscopy import model_for_map

        cached = getattr(self, "_stick_models", None)
        if cached is None or cached[0] is not self.trpes_map or cached[1] is not self.current:
            cached = (self.trpes_map, self.current, model_for_map(self.current, self.trpes_map))
            self._stick_models = cached
        return cached[2]

    @observe("trpes_map")
    def _on_trpes_map_change(self, change: Any) -> None:
        # a new map (other pulses, exclusions): the band's contributions follow it
        self.refresh_band()

    # ------------------------------------------------------------------ derived
    @property
    def current(self) -> Ensemble:
        """The ensemble without the excluded trajectories (cached)."""
        key = tuple(self.excluded)
        if self._current is None or key != self._current_key:
            self._current = self.ens.without(key) if key else self.ens
            self._current_key = key
        return self._current

    def rows(self, snapshot_ids: Iterable[int]) -> np.ndarray:
        """Rows of :attr:`ens` holding the given snapshot ids, shape (n,)."""
        ids = np.asarray(list(snapshot_ids) if not isinstance(snapshot_ids, np.ndarray)
                         else snapshot_ids, dtype=np.int64)
        if self._identity_ids:
            if ids.size and (ids.min() < 0 or ids.max() >= self.ens.n_snapshots):
                bad = ids[(ids < 0) | (ids >= self.ens.n_snapshots)][:10].tolist()
                raise KeyError(f"unknown snapshot id(s) {bad}.")
            return ids
        rows = self._row_of.get_indexer(ids)
        if np.any(rows < 0):
            bad = ids[rows < 0][:10].tolist()
            raise KeyError(f"unknown snapshot id(s) {bad}.")
        return rows

    def cluster_of(self, rows: np.ndarray) -> np.ndarray:
        """Cluster label of the given rows of :attr:`ens` (-1 where unknown)."""
        if self.clusters is None:
            return np.full(len(rows), -1, dtype=np.int64)
        return np.asarray(self.clusters)[rows]

    def cluster_name(self, code: int) -> str:
        """Display name of a cluster code ("-" for none / noise)."""
        if int(code) < 0:
            return "-"
        return str(self.cluster_names.get(str(int(code)), int(code)))

    def snapshot_info(self, snapshot_id: int) -> dict[str, Any]:
        """Trajectory, time (fs), active state, cluster and weight of one snapshot."""
        row = int(self.rows([snapshot_id])[0])
        snap = self.ens.snapshots
        traj = int(snap["traj"].iat[row])
        weight = float(self._weights[row])
        info = {
            "snapshot": int(snapshot_id),
            "traj": traj,
            "time": float(snap["time"].iat[row]),
            "state": self.ens.state_labels[int(snap["active"].iat[row])],
            "cluster": int(self.cluster_of(np.array([row]))[0]),
            "cluster_name": self.cluster_name(int(self.cluster_of(np.array([row]))[0])),
            "weight": weight,
        }
        if self.band is not None:
            share = self._top_share.get(int(snapshot_id))
            data = self._live_band()
            if share is None and data is not None:
                share = data.share_of(self, int(snapshot_id))
            if share is None:
                hit = self.band.loc[self.band["snapshot"].to_numpy() == snapshot_id, "share"]
                share = float(hit.iloc[0]) if len(hit) else 0.0
            info["share"] = share
        return info

    # ------------------------------------------------------------------ actions
    def select_band(
        self,
        *,
        energy_range: tuple[float, float],
        delay_range: tuple[float, float],
    ) -> pd.DataFrame:
        """Select a band of the current map and find what contributes to it.

        Calls :func:`ensemblelab.compute.spectroscopy.region_intensity` on :attr:`current`
        and :attr:`trpes_map` (every snapshot's band intensity, unsorted), keeps the
        :attr:`band_rows` strongest snapshots as :attr:`band` and the array for exact
        grouping (:meth:`group_table`), then updates :attr:`energy_range`,
        :attr:`delay_range`, :attr:`band` and :attr:`selected` together (observers
        see a consistent state). No full sorted table is built (:meth:`full_band`).

        Parameters
        ----------
        energy_range : (float, float)
            Kinetic-energy interval in eV.
        delay_range : (float, float)
            Delay interval in fs.

        Returns
        -------
        DataFrame
            The strongest contributing snapshots, strongest first (:attr:`band`).
        """
        if self.trpes_map is None:
            raise ValueError("no map is shown yet: select_band needs trpes_map to be set.")
        e_rng = _range(energy_range, "energy_range")
        d_rng = _range(delay_range, "delay_range")
        band = self._band_table(e_rng, d_rng)
        with self.hold_trait_notifications():
            self.energy_range = e_rng
            self.delay_range = d_rng
            self.band = band
            self.cluster = None
            self.selected = tuple(band["snapshot"].to_numpy()[: self.max_selected].tolist())
        return band

    def refresh_band(self) -> None:
        """Recompute :attr:`band` for the current ranges (after the map changed)."""
        if self.energy_range is None or self.delay_range is None or self.trpes_map is None:
            return
        self.select_band(energy_range=self.energy_range, delay_range=self.delay_range)

    def clear_band(self) -> None:
        """Forget the band selection."""
        with self.hold_trait_notifications():
            self.energy_range = None
            self.delay_range = None
            self.band = None
            self.selected = ()

    def select_group(self, key: str, value: Any) -> tuple[int, ...]:
        """Show the strongest snapshots of one group of the band (a selection-table row).

        With a band from :meth:`select_band` the group's strongest contributing
        snapshots are found among *all* of them (not only the rows kept in
        :attr:`band`); a band table set by hand is filtered as it is.

        Parameters
        ----------
        key : {"cluster", "state", "traj"}
            Grouping column of :attr:`band`.
        value
            The group's value (cluster label, state index or trajectory id).

        Returns
        -------
        tuple of int
            The newly selected snapshot ids, strongest first.
        """
        if self.band is None:
            raise ValueError("no band is selected: choose a band in the map first.")
        if key not in ("cluster", "state", "traj"):
            raise ValueError(f"key must be one of 'cluster', 'state', 'traj'; got {key!r}.")
        data = self._live_band()
        if data is not None:  # the group's strongest snapshots among all contributing ones
            codes, values = self._group_keys(key)
            hit = np.flatnonzero(values == value)
            rows = (np.flatnonzero(codes == hit[0]) if hit.size else
                    np.zeros(0, dtype=np.int64))
            rows = rows[data.intensity[rows] > 0]
            rows = rows[_strongest(data.intensity[rows], self.max_selected)]
            ids = tuple(self.current.snapshots["snapshot"].to_numpy()[rows].tolist())
        else:  # a band table set by hand: its own rows
            column = "active" if key == "state" else key
            part = self.band.loc[self.band[column].to_numpy() == value]
            ids = tuple(part["snapshot"].to_numpy()[: self.max_selected].tolist())
        with self.hold_trait_notifications():
            if key == "cluster":
                self.cluster = int(value)
            if key == "traj":
                self.trajectory = int(value)
            self.selected = ids
            if ids:
                self.frame = int(ids[0])
        return ids

    def group_table(self, by: str | None = None) -> pd.DataFrame | None:
        """The band's contributions summed over groups, exact over all contributing snapshots.

        Parameters
        ----------
        by : {"cluster", "state", "traj"}, optional
            Grouping (default :attr:`group_by`).

        Returns
        -------
        DataFrame or None
            Columns as :func:`ensemblelab.widgets.group_band`: ``key``, ``label``,
            ``share`` (sums to 1 over the groups), ``intensity``, ``n_snapshots``,
            ``n_trajectories``; largest share first. None without a band. A band
            table set by hand is grouped from its own rows.
        """
        from .selection_table import _labelled, group_band

        by = self.group_by if by is None else by
        if by not in ("cluster", "state", "traj"):
            raise ValueError(f"by must be one of 'cluster', 'state', 'traj'; got {by!r}.")
        if self.band is None:
            return None
        data = self._live_band()
        if data is None:
            return group_band(self.band, by, state_labels=self.ens.state_labels,
                              cluster_names=self.cluster_names)
        inten, n_snap, n_traj, values = self._group_sums(data, by)
        keep = np.flatnonzero(n_snap > 0)
        order = keep[np.argsort(-inten[keep], kind="stable")]
        total = data.total
        out = pd.DataFrame({
            "key": values[order],
            "share": inten[order] / total if total > 0 else 0.0,
            "intensity": inten[order],
            "n_snapshots": n_snap[order],
            "n_trajectories": n_traj[order],
        })
        return _labelled(out, by, state_labels=self.ens.state_labels,
                         cluster_names=self.cluster_names)

    def band_summary(self) -> dict[str, Any] | None:
        """Totals of the band: ``n_snapshots``, ``n_trajectories`` (contributing), ``total``."""
        band = self.band
        if band is None:
            return None
        data = self._live_band()
        if data is not None:
            if data.traj_counts is None:
                t_codes, t_values = self._group_keys("traj")
                data.traj_counts = np.bincount(t_codes[data.mask], minlength=t_values.size)
            return {"n_snapshots": data.n_snapshots,
                    "n_trajectories": int(np.count_nonzero(data.traj_counts)),
                    "total": data.total}
        total = float(band["intensity"].sum()) if "intensity" in band else float("nan")
        n_traj = int(band["traj"].nunique()) if "traj" in band else 0
        return {"n_snapshots": len(band), "n_trajectories": n_traj, "total": total}

    def full_band(self) -> pd.DataFrame | None:
        """Every contributing snapshot of the band, strongest first (computed on demand).

        The whole per-snapshot table of
        :func:`ensemblelab.compute.spectroscopy.contributions` with ``cluster`` and
        ``weight`` columns: millions of rows on a large ensemble, so this is for
        export, not for every brush. Returns :attr:`band` itself when it is already
        complete (or was set by hand), None without a band.
        """
        band = self.band
        data = self._live_band()
        if band is None or data is None or bool(band.attrs.get("complete", False)):
            return band
        from ..compute.spectroscopy import contributions

        table = contributions(self.current, self.trpes_map, energy_range=data.energy_range,
                              delay_range=data.delay_range, group_by="snapshot",
                              model=self.stick_model())
        return self._decorate(table.reset_index(drop=True))

    def exclude(self, trajs: Iterable[int]) -> None:
        """Add trajectories to :attr:`excluded`."""
        self.excluded = tuple(set(self.excluded) | {int(t) for t in trajs})

    def restore(self, trajs: Iterable[int]) -> None:
        """Remove trajectories from :attr:`excluded`."""
        drop = {int(t) for t in trajs}
        self.excluded = tuple(t for t in self.excluded if t not in drop)

    # ------------------------------------------------------------------ internals
    def _live_band(self) -> _BandData | None:
        """The per-snapshot arrays behind :attr:`band`, when they still describe it."""
        data = self._band_data
        if data is None or data.band is not self.band or data.current is not self.current:
            return None
        return data

    def _current_rows(self) -> np.ndarray | None:
        """Rows of :attr:`ens` of the snapshots of :attr:`current` (None: the same rows)."""
        cur = self.current
        if cur is self.ens:
            return None
        if self._keys_for != (id(cur), id(self.clusters)):
            self._reset_keys()
        if "_rows" not in self._keys:
            self._keys["_rows"] = (self.rows(cur.snapshots["snapshot"].to_numpy()),
                                   np.zeros(0))
        return self._keys["_rows"][0]

    def _current_row_of(self, snapshot_ids: Iterable[int]) -> np.ndarray:
        """Rows of :attr:`current` holding the given snapshot ids (-1: not there)."""
        if self._keys_for != (id(self.current), id(self.clusters)):
            self._reset_keys()
        if "_index" not in self._keys:
            self._keys["_index"] = (pd.Index(self.current.snapshots["snapshot"].to_numpy()),
                                    np.zeros(0))
        return self._keys["_index"][0].get_indexer(np.asarray(list(snapshot_ids)))

    def _reset_keys(self) -> None:
        self._keys = {}
        self._keys_for = (id(self.current), id(self.clusters))

    def _group_keys(self, by: str) -> tuple[np.ndarray, np.ndarray]:
        """Group code of every row of :attr:`current` and the value of each code (cached)."""
        if self._keys_for != (id(self.current), id(self.clusters)):
            self._reset_keys()
        if by not in self._keys:
            snap = self.current.snapshots
            if by == "cluster":
                rows = self._current_rows()
                keys = (np.full(len(snap), -1, dtype=np.int64) if self.clusters is None else
                        np.asarray(self.clusters)[rows if rows is not None else slice(None)])
            else:
                keys = snap["active" if by == "state" else "traj"].to_numpy()
            self._keys[by] = _codes(keys)
        return self._keys[by]

    def _group_sums(self, data: _BandData, by: str
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Intensity, contributing snapshots and trajectories of every group (cached)."""
        cache_key = f"{by}:{id(self.clusters)}" if by == "cluster" else by
        if cache_key in data.groups:
            return data.groups[cache_key]
        x, mask = data.intensity, data.mask
        t_codes, t_values = self._group_keys("traj")
        n_t = t_values.size
        if by == "traj":
            inten = np.bincount(t_codes, x, minlength=n_t)
            if data.traj_counts is None:
                data.traj_counts = np.bincount(t_codes[mask], minlength=n_t)
            n_snap = data.traj_counts
            out = (inten, n_snap, (n_snap > 0).astype(np.int64), t_values)
        else:
            codes, values = self._group_keys(by)
            n_g = values.size
            if n_g * n_t <= 20_000_000:  # one (group, trajectory) table answers everything
                pairs = self._pair_codes(by, codes, t_codes, n_t)
                per_pair = np.bincount(pairs[mask], minlength=n_g * n_t).reshape(n_g, n_t)
                inten = np.bincount(pairs, x, minlength=n_g * n_t).reshape(n_g, n_t).sum(axis=1)
                if data.traj_counts is None:
                    data.traj_counts = per_pair.sum(axis=0)
                out = (inten, per_pair.sum(axis=1), np.count_nonzero(per_pair, axis=1), values)
            else:
                inten = np.bincount(codes, x, minlength=n_g)
                n_snap = np.bincount(codes[mask], minlength=n_g)
                out = (inten, n_snap, _pair_counts(codes[mask], t_codes[mask], n_g, n_t),
                       values)
        data.groups[cache_key] = out
        return out

    def _pair_codes(self, by: str, codes: np.ndarray, t_codes: np.ndarray, n_t: int
                    ) -> np.ndarray:
        """Code of the (group, trajectory) pair of every row of :attr:`current` (cached)."""
        key = f"_pairs_{by}"
        if key not in self._keys:
            self._keys[key] = (codes * n_t + t_codes, np.zeros(0))
        return self._keys[key][0]

    def _decorate(self, table: pd.DataFrame) -> pd.DataFrame:
        """Add ``cluster`` and ``weight`` (and any missing key columns) to a snapshot table."""
        rows = self.rows(table["snapshot"].to_numpy())
        table["cluster"] = self.cluster_of(rows)
        table["weight"] = self._weights[rows]
        for column in ("active", "traj", "time"):
            if column not in table.columns:
                table[column] = self.ens.snapshots[column].to_numpy()[rows]
        return table

    def _band_table(
        self, energy_range: tuple[float, float], delay_range: tuple[float, float]
    ) -> pd.DataFrame:
        from ..compute.spectroscopy import region_intensity

        cur = self.current
        x = region_intensity(cur, self.trpes_map, energy_range=energy_range,
                             delay_range=delay_range, model=self.stick_model())
        mask = x > 0
        n_snapshots = int(np.count_nonzero(mask))
        total = float(x.sum())
        k = min(n_snapshots, max(self.band_rows, self.max_selected))
        order = np.flatnonzero(mask) if k == n_snapshots else np.arange(x.size)
        order = order[_strongest(x[order], k)]
        snap = cur.snapshots
        table = pd.DataFrame({
            "snapshot": snap["snapshot"].to_numpy()[order],
            "traj": snap["traj"].to_numpy()[order],
            "time": snap["time"].to_numpy()[order],
            "active": snap["active"].to_numpy()[order],
            "intensity": x[order],
        })
        table["share"] = table["intensity"] / total if total > 0 else 0.0
        table = self._decorate(table)
        table.attrs.update(total=total, energy_range=energy_range, delay_range=delay_range,
                           n_snapshots=n_snapshots, complete=k == n_snapshots)
        top = table.head(4 * self.max_selected)
        self._top_share = dict(zip(top["snapshot"].to_numpy().tolist(),
                                   top["share"].to_numpy().tolist(), strict=True))
        self._band_data = _BandData(band=table, current=cur, intensity=x, mask=mask,
                                    total=total, n_snapshots=n_snapshots,
                                    energy_range=energy_range, delay_range=delay_range)
        return table


class _BandData:
    """Per-snapshot arrays of one band selection (over the rows of ``current``)."""

    def __init__(self, *, band: pd.DataFrame, current: Ensemble, intensity: np.ndarray,
                 mask: np.ndarray, total: float, n_snapshots: int,
                 energy_range: tuple[float, float], delay_range: tuple[float, float]) -> None:
        self.band = band
        self.current = current
        self.intensity = intensity
        self.mask = mask
        self.total = total
        self.n_snapshots = n_snapshots
        self.groups: dict[str, tuple[np.ndarray, ...]] = {}  # per group_by, see _group_sums
        self.traj_counts: np.ndarray | None = None  # contributing snapshots per trajectory
        self.energy_range = energy_range
        self.delay_range = delay_range

    def share_of(self, model: SelectionModel, snapshot_id: int) -> float | None:
        """Share of one snapshot in the band (0.0 for a snapshot of an excluded trajectory)."""
        if self.total <= 0:
            return 0.0
        if self.current is model.ens:
            row = int(model.rows([snapshot_id])[0])
        else:
            row = int(model._current_row_of([snapshot_id])[0])
            if row < 0:
                return 0.0
        return float(self.intensity[row] / self.total)


def _strongest(values: np.ndarray, k: int) -> np.ndarray:
    """Indices of the `k` largest `values`, largest first (ties: lower index first)."""
    n = values.size
    k = min(int(k), n)
    if k <= 0:
        return np.zeros(0, dtype=np.int64)
    idx = np.arange(n)
    if k < n and n > 64 * k and n > 200_000:
        # a threshold from a strided sample keeps ~2k candidates; every value above
        # the k-th largest is >= it whenever at least k values pass, else: no shortcut
        step = max(1, n // 50_000)
        sample = values[::step]
        r = min(sample.size, 2 * k * sample.size // n + 16)
        thr = np.partition(sample, sample.size - r)[sample.size - r]
        cand = np.flatnonzero(values >= thr)
        if k <= cand.size < n // 4:
            idx = cand
    if k < idx.size:
        sub = np.argpartition(-values[idx], k - 1)[:k]
        sub.sort()  # ties at equal value keep the row order, as a stable sort does
        idx = idx[sub]
    return idx[np.argsort(-values[idx], kind="stable")]


def _codes(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-negative integer codes of `keys` (n,) and the key of each code."""
    keys = np.asarray(keys)
    if keys.size and np.issubdtype(keys.dtype, np.integer):
        lo, hi = int(keys.min()), int(keys.max())
        if hi - lo <= 4 * keys.size + 1024:  # small integer range: offset, no hashing
            return (keys - lo).astype(np.intp, copy=False), np.arange(lo, hi + 1)
    codes, uniques = pd.factorize(keys, sort=True)
    return codes.astype(np.intp, copy=False), np.asarray(uniques)


def _pair_counts(groups: np.ndarray, trajs: np.ndarray, n_groups: int, n_trajs: int
                 ) -> np.ndarray:
    """Number of distinct trajectories within each group, shape (n_groups,)."""
    if groups.size == 0:
        return np.zeros(n_groups, dtype=np.int64)
    if n_groups * n_trajs <= 50_000_000:
        pairs = np.bincount(groups * n_trajs + trajs, minlength=n_groups * n_trajs)
        return np.count_nonzero(pairs.reshape(n_groups, n_trajs), axis=1)
    pairs = np.unique(groups.astype(np.int64) * n_trajs + trajs)
    return np.bincount(pairs // n_trajs, minlength=n_groups)
