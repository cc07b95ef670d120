"""The shared selection state that every view observes.

No view talks to another view: each one writes what the user did into one
:class:`SelectionModel` and redraws itself from the traits it observes.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any, cast, overload

import numpy as np
import pandas as pd
from traitlets import Any as AnyTrait
from traitlets import Dict, Float, HasTraits, Instance, Int, Tuple, Unicode, observe, validate

from ..compute.bands import BAND_GROUPS, BandAnalysis, SnapshotGroups, analyse_band, group_band
from ..data.ensemble import Ensemble

__all__ = ["SelectionModel"]


@overload
def _range(value: None, name: str) -> None: ...


@overload
def _range(value: Sequence[float], name: str) -> tuple[float, float]: ...


@overload
def _range(value: Any, name: str) -> tuple[float, float] | None: ...


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
        The full ensemble (never modified; exclusions are a mask that every
        computation of the views honours, not a copy).
    **traits
        Initial values of the traits below.

    Attributes
    ----------
    ens : Ensemble
        The full ensemble.
    excluded : tuple of int
        Trajectory ids the user excluded (sorted). The views pass them as
        ``exclude=`` to the computations (weight 0, not counted); :attr:`current`
        is a copy without them, made only on request.
    trpes_map : TRPESMap or None
        The map currently shown (of :attr:`ens` without :attr:`excluded`), set by
        the map view.
    energy_range : (float, float) or None
        Selected photoelectron kinetic-energy interval in eV.
    delay_range : (float, float) or None
        Selected pump-probe delay interval in fs.
    band : DataFrame or None
        The strongest contributing snapshots of the selected band (at most
        :attr:`band_rows` rows, strongest first; the columns of
        :meth:`ensemblelab.compute.bands.BandAnalysis.table` plus ``weight``). Shares
        are fractions of the whole band.
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
    min_signal_fraction : float
        A band holding less than this fraction of the map's integrated intensity
        (default 0.1 %) has no signal: :attr:`band` is then empty (``attrs["no_signal"]``)
        and nothing is selected.
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
    min_signal_fraction = Float(1e-3)

    def __init__(self, ens: Ensemble, **traits: Any) -> None:
        if not isinstance(ens, Ensemble):
            raise TypeError(f"ens must be an ensemblelab.Ensemble; got {type(ens).__name__}.")
        super().__init__(ens=ens, **traits)
        self._current_key: tuple[int, ...] | None = None
        self._current: Ensemble | None = None
        self._stick_models: tuple[Any, Any, Any] | None = None
        self._band_sticks: tuple[Any, Any, Any] | None = None  # (map, excluded, source)
        ids = ens.snapshots["snapshot"].to_numpy()
        self._identity_ids = bool(np.array_equal(ids, np.arange(ids.size)))
        self._row_of = pd.Index(ids)
        self._weights = ens.snapshot_weights()  # per snapshot row (the ensemble is frozen)
        self._analysis: BandAnalysis | None = None  # behind band (see analysis)
        self._analysis_band: pd.DataFrame | None = None
        self._analysis_for: tuple[int, ...] | None = None
        self._groups_cache: SnapshotGroups | None = None
        self._groups_key: int = 0
        traj_col = ens.snapshots["traj"].to_numpy()
        self._traj_ids = ens.trajectories["traj"].to_numpy()
        self._snapshots_per_traj = pd.Series(traj_col).value_counts().reindex(
            self._traj_ids, fill_value=0).to_numpy()

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
        if value not in BAND_GROUPS:
            raise ValueError(f"group_by must be one of {list(BAND_GROUPS)}; got {value!r}.")
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
        """Keep the stick model of `trpes_map` (made from :attr:`ens` with the current
        exclusions as ``exclude=``) for band queries."""
        self._stick_models = (trpes_map, tuple(self.excluded), model)

    def remember_band_sticks(self, trpes_map: Any, source: Any) -> None:
        """Keep `source` (``source(trpes_map)``: indexed :class:`~ensemblelab.compute.bands.
        BandSticks` serving the map, or None) for the band queries of `trpes_map`."""
        self._band_sticks = (trpes_map, tuple(self.excluded), source)

    def known_stick_model(self) -> Any:
        """The stick model held for :attr:`trpes_map` and the current exclusions, or None
        (none is built: see :meth:`stick_model`)."""
        cached = self._stick_models
        if cached is None or cached[0] is not self.trpes_map or cached[1] != tuple(
                self.excluded):
            return None
        return cached[2]

    def stick_model(self) -> Any:
        """The stick model of :attr:`trpes_map` (built once per map and exclusion set).

        An explicit cache on this (mutable) model, valid while the map stays the same
        object and the exclusions the same; the map itself carries no model.
        """
        cached = getattr(self, "_stick_models", None)
        key = tuple(self.excluded)
        if cached is None or cached[0] is not self.trpes_map or cached[1] != key:
            cached = (self.trpes_map, key, _rebuild_model(self.ens, self.trpes_map, key))
            self._stick_models = cached
        return cached[2]

    @observe("excluded")
    def _on_excluded_change(self, change: Any) -> None:
        # the copy of :attr:`current` is made again only when asked for (no memory kept)
        self._current, self._current_key = None, None

    @observe("trpes_map")
    def _on_trpes_map_change(self, change: Any) -> None:
        # a new map (other pulses, exclusions): the band's contributions follow it
        self.refresh_band()

    # ------------------------------------------------------------------ derived
    @property
    def used(self) -> np.ndarray:
        """Whether each trajectory (row of ``ens.trajectories``) is used, shape (n_traj,)."""
        return ~np.isin(self._traj_ids, np.asarray(self.excluded, dtype=np.int64))

    @property
    def n_trajectories(self) -> int:
        """Trajectories used by every view (all but the excluded ones)."""
        return int(self._traj_ids.size - len(self.excluded))

    @property
    def n_snapshots(self) -> int:
        """Snapshots used by every view (those of the trajectories not excluded)."""
        return int(self._snapshots_per_traj[self.used].sum())

    @property
    def current(self) -> Ensemble:
        """A copy of the ensemble without the excluded trajectories (made on request, cached).

        The views do not use it (they pass :attr:`excluded` to the computations);
        it is for user code that wants the reduced ensemble itself.
        """
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
        traj = int(cast(int, snap["traj"].iat[row]))
        weight = float(self._weights[row])
        info = {
            "snapshot": int(snapshot_id),
            "traj": traj,
            "time": float(cast(float, snap["time"].iat[row])),
            "state": self.ens.state_labels[int(cast(int, snap["active"].iat[row]))],
            "cluster": int(self.cluster_of(np.array([row]))[0]),
            "cluster_name": self.cluster_name(int(self.cluster_of(np.array([row]))[0])),
            "weight": weight,
        }
        if self.band is not None:
            analysis = self.analysis
            if analysis is not None:
                share = float(analysis.share_of([snapshot_id])[0])
            else:
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

        Calls :func:`ensemblelab.compute.bands.analyse_band` on :attr:`ens` and
        :attr:`trpes_map` (every snapshot's band intensity, unsorted; held as
        :attr:`analysis`), keeps the :attr:`band_rows` strongest snapshots as
        :attr:`band`, then updates :attr:`energy_range`, :attr:`delay_range`,
        :attr:`band` and :attr:`selected` together (observers see a consistent
        state). No full sorted table is built (:meth:`full_band`).

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
        held = self._band_sticks  # sticks that serve this map: no new ones
        sticks = held[2](self.trpes_map) if held is not None and held[0] is self.trpes_map \
            and held[1] == tuple(self.excluded) else None
        analysis = analyse_band(self.ens, self.trpes_map, energy_range=e_rng,
                                delay_range=d_rng, groups=self._groups(), sticks=sticks,
                                model=None if sticks is not None else self.stick_model())
        fraction = _signal_fraction(analysis.total, self.trpes_map)
        no_signal = fraction < self.min_signal_fraction
        band = self._decorate(analysis.table(
            0 if no_signal else max(self.band_rows, self.max_selected)))
        band.attrs.update(signal_fraction=fraction, no_signal=no_signal)
        self._analysis, self._analysis_band = analysis, band
        self._analysis_for = tuple(self.excluded)
        with self.hold_trait_notifications():
            self.energy_range = e_rng
            self.delay_range = d_rng
            self.band = band
            self.cluster = None
            self.selected = tuple(band["snapshot"].to_numpy()[: self.max_selected].tolist())
        return band

    def show_band(self, analysis: BandAnalysis, *, delay_range: tuple[float, float],
                  where: str = "") -> pd.DataFrame:
        """Show a band found on another observable's map (absorption, scattering).

        Like :meth:`select_band`, but the per-snapshot band terms come from the caller
        (a :class:`~ensemblelab.compute.bands.BandAnalysis` of :attr:`current`, e.g. built
        from ``observable_contributions``). :attr:`energy_range` becomes None (the box
        is not on the photoelectron map), so a new photoelectron map does not replace it.

        Parameters
        ----------
        analysis : BandAnalysis
            Band terms of every row of :attr:`ens` (:meth:`snapshot_groups`; excluded
            rows hold 0).
        delay_range : (float, float)
            Delay interval in fs.
        where : str
            Text naming the band (map and ranges with units), kept in ``band.attrs``.

        Returns
        -------
        DataFrame
            The strongest contributing snapshots, strongest first (:attr:`band`).
        """
        d_rng = _range(delay_range, "delay_range")
        band = self._decorate(analysis.table(max(self.band_rows, self.max_selected)))
        band.attrs.update(signal_fraction=float("nan"), no_signal=False, where=str(where))
        self._analysis, self._analysis_band = analysis, band
        self._analysis_for = tuple(self.excluded)
        with self.hold_trait_notifications():
            self.energy_range = None
            self.delay_range = d_rng
            self.band = band
            self.cluster = None
            self.selected = tuple(band["snapshot"].to_numpy()[: self.max_selected].tolist())
        return band

    def snapshot_groups(self) -> SnapshotGroups:
        """Group keys (trajectory, state, cluster) of the rows of :attr:`ens`."""
        return self._groups()

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
        if key not in BAND_GROUPS:
            raise ValueError(f"key must be one of {list(BAND_GROUPS)}; got {key!r}.")
        analysis = self.analysis
        if analysis is not None:  # the group's strongest snapshots among all contributing
            ids = tuple(analysis.strongest(self.max_selected, group_by=key, key=value).tolist())
        else:  # a band table set by hand: its own rows
            part = self.band.loc[self.band[BAND_GROUPS[key]].to_numpy() == value]
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

    def group_table(self, group_by: str | None = None) -> pd.DataFrame | None:
        """The band's contributions summed over groups, exact over all contributing snapshots.

        Parameters
        ----------
        group_by : {"cluster", "state", "traj"}, optional
            Grouping (default :attr:`group_by`).

        Returns
        -------
        DataFrame or None
            Columns of :meth:`ensemblelab.compute.bands.BandAnalysis.group_table`:
            ``key``, ``label``, ``share`` (sums to 1 over the groups), ``intensity``,
            ``n_snapshots``, ``n_trajectories``; largest share first. None without a
            band. A band table set by hand is grouped from its own rows.
        """
        group_by = self.group_by if group_by is None else group_by
        if group_by not in BAND_GROUPS:
            raise ValueError(f"group_by must be one of {list(BAND_GROUPS)}; got {group_by!r}.")
        if self.band is None:
            return None
        analysis = self.analysis
        if analysis is None:
            return group_band(self.band, group_by, state_labels=self.ens.state_labels,
                              cluster_names=self.cluster_names)
        return analysis.group_table(group_by, cluster_names=self.cluster_names)

    def band_summary(self) -> dict[str, Any] | None:
        """Totals of the band: ``n_snapshots``, ``n_trajectories`` (contributing), ``total``."""
        band = self.band
        if band is None:
            return None
        analysis = self.analysis
        if analysis is not None:
            return {"n_snapshots": analysis.n_snapshots,
                    "n_trajectories": analysis.n_trajectories, "total": analysis.total}
        total = float(band["intensity"].sum()) if "intensity" in band else float("nan")
        n_traj = int(band["traj"].nunique()) if "traj" in band else 0
        return {"n_snapshots": len(band), "n_trajectories": n_traj, "total": total}

    def full_band(self) -> pd.DataFrame | None:
        """Every contributing snapshot of the band, strongest first (computed on demand).

        The whole per-snapshot table of :meth:`ensemblelab.compute.bands.BandAnalysis.table`
        with a ``weight`` column: millions of rows on a large ensemble, so this is for
        export, not for every brush. Returns :attr:`band` itself when it is already
        complete (or was set by hand), None without a band.
        """
        band = self.band
        analysis = self.analysis
        if band is None or analysis is None or bool(band.attrs.get("complete", False)):
            return band
        return self._decorate(analysis.table())

    def exclude(self, trajs: Iterable[int]) -> None:
        """Add trajectories to :attr:`excluded`."""
        self.excluded = tuple(set(self.excluded) | {int(t) for t in trajs})

    def restore(self, trajs: Iterable[int]) -> None:
        """Remove trajectories from :attr:`excluded`."""
        drop = {int(t) for t in trajs}
        self.excluded = tuple(t for t in self.excluded if t not in drop)

    # ------------------------------------------------------------------ internals
    @property
    def analysis(self) -> BandAnalysis | None:
        """The analysis behind :attr:`band`, while it still describes it (else None).

        Follows new :attr:`clusters` (regrouped from the same intensities).
        """
        analysis = self._analysis
        if analysis is None or self._analysis_band is not self.band or \
                self._analysis_for != tuple(self.excluded):
            return None
        groups = self._groups()
        if analysis.groups is not groups:  # new cluster labels: same band, new groups
            analysis = BandAnalysis.from_intensity(
                groups, analysis.intensity, energy_range=analysis.energy_range,
                delay_range=analysis.delay_range)
            self._analysis = analysis
        return analysis

    def _groups(self) -> SnapshotGroups:
        """Group keys of the rows of :attr:`ens` (kept while the clusters hold).

        Excluded trajectories stay in the groups: their intensity is zero, so they
        never contribute to a band.
        """
        key = id(self.clusters)
        if self._groups_cache is None or self._groups_key != key:
            labels = None if self.clusters is None else np.asarray(self.clusters)
            self._groups_cache = SnapshotGroups.from_ensemble(self.ens, clusters=labels)
            self._groups_key = key
        return self._groups_cache

    def _decorate(self, table: pd.DataFrame) -> pd.DataFrame:
        """Add ``weight`` (and any missing key columns) to a snapshot table."""
        rows = self.rows(table["snapshot"].to_numpy())
        if "cluster" not in table.columns:
            table["cluster"] = self.cluster_of(rows)
        table["weight"] = self._weights[rows]
        for column in ("active", "traj", "time"):
            if column not in table.columns:
                table[column] = self.ens.snapshots[column].to_numpy()[rows]
        return table


def _rebuild_model(ens: Ensemble, trpes_map: Any, excluded: tuple[int, ...]) -> Any:
    """The stick model of `trpes_map`, rebuilt from its params with the exclusions."""
    from ..compute.spectroscopy import model_for_map

    if not excluded:
        return model_for_map(ens, trpes_map)
    from ..compute.spectroscopy._checks import settings_from_params
    from ..compute.spectroscopy.maps import trpes_model

    p = trpes_map.params
    probe, pump, cs, weights = settings_from_params(p)
    return trpes_model(ens, probe=probe, pump=pump, resolution=float(p.get("resolution", 0.0)),
                       cross_section=cs, weights=weights, decompose=None,
                       time_step=p.get("time_step"), progress=False, exclude=excluded)


def _signal_fraction(band_total: float, trpes_map: Any) -> float:
    """The band's intensity as a fraction of the map's (both integrated over eV and fs)."""
    values = np.nan_to_num(np.asarray(trpes_map.intensity, float))
    e = np.asarray(trpes_map.kinetic_energies, float)
    d = np.asarray(trpes_map.delays, float)
    whole = float(np.trapezoid(np.trapezoid(values, e, axis=1), d)) if values.size else 0.0
    return float(band_total / whole) if whole > 0 else 0.0
