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
        Per-snapshot contributions of the selected band (from
        :func:`ensemblelab.compute.spectra.contributions`), strongest first, with
        ``cluster`` and ``weight`` columns added.
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

    def __init__(self, ens: Ensemble, **traits: Any) -> None:
        if not isinstance(ens, Ensemble):
            raise TypeError(f"ens must be an ensemblelab.Ensemble; got {type(ens).__name__}.")
        super().__init__(ens=ens, **traits)
        self._current_key: tuple[int, ...] | None = None
        self._current: Ensemble | None = None
        ids = ens.snapshots["snapshot"].to_numpy()
        self._identity_ids = bool(np.array_equal(ids, np.arange(ids.size)))
        self._row_of = pd.Index(ids)
        self._weights = ens.snapshot_weights()  # per snapshot row (the ensemble is frozen)
        self._top_share: dict[int, float] = {}

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

        Calls :func:`ensemblelab.compute.spectra.contributions` on :attr:`current`
        and :attr:`trpes_map`, then updates :attr:`energy_range`,
        :attr:`delay_range`, :attr:`band` and :attr:`selected` together (observers
        see a consistent state).

        Parameters
        ----------
        energy_range : (float, float)
            Kinetic-energy interval in eV.
        delay_range : (float, float)
            Delay interval in fs.

        Returns
        -------
        DataFrame
            The per-snapshot contributions, strongest first.
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
        """Show the band's snapshots of one group (a selection-table row).

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

    def exclude(self, trajs: Iterable[int]) -> None:
        """Add trajectories to :attr:`excluded`."""
        self.excluded = tuple(set(self.excluded) | {int(t) for t in trajs})

    def restore(self, trajs: Iterable[int]) -> None:
        """Remove trajectories from :attr:`excluded`."""
        drop = {int(t) for t in trajs}
        self.excluded = tuple(t for t in self.excluded if t not in drop)

    # ------------------------------------------------------------------ internals
    def _band_table(
        self, energy_range: tuple[float, float] | None, delay_range: tuple[float, float] | None
    ) -> pd.DataFrame:
        from ..compute.spectra import contributions

        table = contributions(
            self.current, self.trpes_map, energy_range=energy_range, delay_range=delay_range,
            by="snapshot",
        )
        if not table["share"].is_monotonic_decreasing:
            table = table.sort_values("share", ascending=False, kind="stable")
        table = table.reset_index(drop=True)
        rows = self.rows(table["snapshot"].to_numpy())
        table["cluster"] = self.cluster_of(rows)
        table["weight"] = self._weights[rows]
        top = table.head(4 * self.max_selected)
        self._top_share = dict(zip(top["snapshot"].to_numpy().tolist(),
                                   top["share"].to_numpy().tolist(), strict=True))
        if "active" not in table.columns:
            table["active"] = self.ens.snapshots["active"].to_numpy()[rows]
        if "traj" not in table.columns:
            table["traj"] = self.ens.snapshots["traj"].to_numpy()[rows]
        if "time" not in table.columns:
            table["time"] = self.ens.snapshots["time"].to_numpy()[rows]
        return table
