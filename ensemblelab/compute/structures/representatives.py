"""Representative structures per cluster, per time window and per spectral band.

Two kinds of representative (both common practice):

* ``"medoid"``: the member minimising the weighted sum of feature-space distances
  to the other members (on a random subset of at most `max_candidates` members);
* ``"mode"``: the most-populated-bin structure: members are projected on the two
  leading principal components of their features, binned on a ``bins x bins``
  grid, and the member nearest to the mean of the most populated bin (by weight)
  is returned.

All representatives are superimposed on one common frame (mass-weighted Kabsch
onto the ensemble's mean structure, or a given reference) so they can be overlaid
in a figure, and can be exported with :meth:`Representatives.write`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd

from ...errors import SchemaError
from .._threads import few_threads
from ._featurise import build_featuriser
from .clustering import ClusterResult

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = [
    "Representatives",
    "cluster_representatives",
    "time_window_representatives",
    "band_representatives",
]

Kind = Literal["medoid", "mode", "both"]


@dataclass(frozen=True)
class Representatives:
    """Selected structures, aligned to a common frame.

    Attributes
    ----------
    table : DataFrame
        One row per structure: ``group`` (cluster label, time window "t0-t1 fs" or
        band name), ``kind`` ("medoid" or "mode"), ``snapshot``, ``row`` (position in
        the ensemble), ``traj``, ``time`` (fs), ``active``, ``weight`` (the group's
        share: weighted fraction of snapshots, or of the band intensity), ``size``
        (members considered), ``rmsd_to_reference`` (Angstrom, after alignment).
    geometries : ndarray, shape (n_structures, n_atoms, 3)
        Aligned coordinates in Angstrom.
    symbols : tuple of str
    """

    table: pd.DataFrame
    geometries: np.ndarray
    symbols: tuple[str, ...]


def _pick(F: np.ndarray, w: np.ndarray, kind: str, bins: int) -> int:
    """Position (in F) of the medoid or of the most-populated-bin structure."""
    from sklearn.metrics import pairwise_distances

    if len(F) == 1:
        return 0
    if kind == "medoid":
        D = pairwise_distances(F)
        return int(np.argmin(D @ w))
    Fc = F - np.average(F, axis=0, weights=w)
    _, _, Vt = np.linalg.svd(Fc, full_matrices=False)
    Y = Fc @ Vt[:2].T
    if Y.shape[1] == 1:
        Y = np.column_stack([Y[:, 0], np.zeros(len(Y))])
    H, ex, ey = np.histogram2d(Y[:, 0], Y[:, 1], bins=bins, weights=w)
    ix, iy = np.unravel_index(int(np.argmax(H)), H.shape)
    bx = np.clip(np.digitize(Y[:, 0], ex) - 1, 0, bins - 1)
    by = np.clip(np.digitize(Y[:, 1], ey) - 1, 0, bins - 1)
    inside = np.flatnonzero((bx == ix) & (by == iy))
    centre = np.average(F[inside], axis=0, weights=w[inside] if w[inside].sum() > 0 else None)
    return int(inside[np.argmin(np.linalg.norm(F[inside] - centre, axis=1))])


def _common_frame(ens: Ensemble, rows: np.ndarray, reference: str | npt.ArrayLike,
                  random_state: int) -> tuple[np.ndarray, np.ndarray]:
    from .geometry import kabsch_align, mean_structure

    X = ens.geometries[rows]
    if isinstance(reference, str):
        if reference == "mean":
            rng = np.random.default_rng(random_state)
            finite = np.flatnonzero(np.isfinite(ens.geometries).all(axis=(1, 2)))
            sub = finite if finite.size <= 5000 else np.sort(rng.choice(finite, 5000, False))
            ref, _ = mean_structure(ens.geometries[sub], weights=ens.masses)
        elif reference == "first":
            ref = X[0]
        else:
            raise SchemaError(f"reference must be 'mean', 'first' or an array; got "
                              f"{reference!r}.")
    else:
        ref = np.asarray(reference, dtype=np.float64)
    res = kabsch_align(X, ref, weights=ens.masses)
    return res.aligned, res.rmsd


def _select(
    ens: Ensemble,
    groups: list[tuple[str, np.ndarray, np.ndarray, float]],
    *,
    features: object,
    kind: Kind,
    bins: int,
    max_candidates: int,
    reference: str | npt.ArrayLike,
    random_state: int,
    featuriser: object = None,
) -> Representatives:
    if kind not in ("medoid", "mode", "both"):
        raise SchemaError(f"kind must be 'medoid', 'mode' or 'both'; got {kind!r}.")
    rng = np.random.default_rng(random_state)
    finite = np.isfinite(ens.geometries).all(axis=(1, 2))
    fz = featuriser
    if fz is None:
        fit_rows = np.flatnonzero(finite)
        if fit_rows.size > 20000:
            fit_rows = np.sort(rng.choice(fit_rows, 20000, replace=False))
        fz = build_featuriser(ens, features, True).fit(fit_rows)
    kinds = ["medoid", "mode"] if kind == "both" else [kind]
    recs = []
    picked = []
    for name, rows, w, share in groups:
        ok = finite[rows]
        rows, w = rows[ok], w[ok]
        if rows.size == 0:
            continue
        if rows.size > max_candidates:
            sel = np.sort(rng.choice(rows.size, max_candidates, replace=False, p=None))
            rows, w = rows[sel], w[sel]
        F = fz(rows)  # type: ignore[operator]
        ww = w if w.sum() > 0 else np.ones_like(w)
        for kd in kinds:
            p = _pick(F, ww, kd, bins)
            picked.append(rows[p])
            recs.append({"group": name, "kind": kd, "row": int(rows[p]), "weight": share,
                         "size": int(rows.size)})
    if not recs:
        raise SchemaError("no group has any (finite) member to pick a representative from.")
    table = pd.DataFrame(recs)
    rows_sel = table["row"].to_numpy()
    snaps = ens.snapshots
    for col in ("snapshot", "traj", "time", "active"):
        table[col] = snaps[col].to_numpy()[rows_sel]
    aligned, rm = _common_frame(ens, rows_sel, reference, random_state)
    table["rmsd_to_reference"] = rm
    cols = ["group", "kind", "snapshot", "row", "traj", "time", "active", "weight", "size",
            "rmsd_to_reference"]
    return Representatives(table=table[cols], geometries=aligned, symbols=tuple(ens.symbols))


def _labels_of(ens: Ensemble, clusters: ClusterResult | npt.ArrayLike | str) -> np.ndarray:
    if isinstance(clusters, ClusterResult):
        if not np.array_equal(clusters.snapshot, ens.snapshots["snapshot"].to_numpy()):
            raise SchemaError("the ClusterResult belongs to different snapshots than `ens`.")
        return clusters.labels
    if isinstance(clusters, str):
        if clusters not in ens.snapshots.columns:
            raise SchemaError(f"no snapshot column {clusters!r}; found "
                              f"{list(ens.snapshots.columns)}.")
        return ens.snapshots[clusters].to_numpy()
    lab = np.asarray(clusters)
    if lab.shape != (ens.n_snapshots,):
        raise SchemaError(f"cluster labels must have shape (n_snapshots={ens.n_snapshots},); "
                          f"got {lab.shape}.")
    return lab


def cluster_representatives(
    ens: Ensemble,
    clusters: ClusterResult | npt.ArrayLike | str,
    *,
    kind: Kind = "medoid",
    features: object = "inverse_distances",
    bins: int = 10,
    max_candidates: int = 2000,
    reference: str | npt.ArrayLike = "mean",
    include_noise: bool = False,
    random_state: int = 0,
) -> Representatives:
    """One representative structure (or two, ``kind="both"``) per cluster.

    Parameters
    ----------
    ens : Ensemble
    clusters : ClusterResult, array_like (n_snapshots,) or str
        Cluster labels: a result of :func:`~ensemblelab.cluster_snapshots`
        (its features are reused), labels aligned to the snapshots, or a column name.
    kind : {"medoid", "mode", "both"}
    features : str or transformer
        Feature space for the choice when `clusters` is not a ClusterResult.
    bins : int
        Grid size per axis for ``kind="mode"``.
    max_candidates : int
        Largest random subset of a cluster considered.
    reference : "mean", "first" or array_like (n_atoms, 3)
        Common frame: the mass-weighted mean structure of the ensemble (default), the
        first selected structure, or given coordinates (Angstrom).
    include_noise : bool
        Also pick for noise labels ("...noise", -1).
    random_state : int

    Returns
    -------
    Representatives
        ``weight`` is the cluster's weighted snapshot fraction.

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> from ensemblelab.compute.structures.clustering import cluster_snapshots
    >>> ens = make_toy_ensemble(10, t_max=40.0)
    >>> reps = cluster_representatives(ens, cluster_snapshots(ens, n_clusters=2))
    >>> reps.geometries.shape
    (4, 4, 3)
    """
    labels = _labels_of(ens, clusters)
    w = ens.snapshot_weights()
    total = w.sum()
    groups = []
    for name in pd.unique(labels):
        if not include_noise and (str(name).endswith("noise") or str(name) == "-1"):
            continue
        rows = np.flatnonzero(labels == name)
        groups.append((str(name), rows, w[rows], float(w[rows].sum() / total)))
    fz = clusters.featuriser if isinstance(clusters, ClusterResult) else None
    with few_threads(max_candidates * max(len(groups), 1)):
        return _select(ens, groups, features=features, kind=kind, bins=bins,
                       max_candidates=max_candidates, reference=reference,
                       random_state=random_state, featuriser=fz)


def time_window_representatives(
    ens: Ensemble,
    *,
    windows: Sequence[tuple[float, float]] | int = 4,
    clusters: ClusterResult | npt.ArrayLike | str | None = None,
    kind: Kind = "medoid",
    features: object = "inverse_distances",
    bins: int = 10,
    max_candidates: int = 2000,
    reference: str | npt.ArrayLike = "mean",
    random_state: int = 0,
) -> Representatives:
    """Representative structures of time windows (optionally per cluster in each window).

    Parameters
    ----------
    ens : Ensemble
    windows : int or sequence of (t0, t1)
        Number of equal windows over the time range, or explicit [t0, t1) windows (fs).
    clusters : optional
        Cluster labels as in :func:`cluster_representatives`; then one representative
        per (window, cluster), group named "t0-t1 fs|label".
    kind, features, bins, max_candidates, reference, random_state
        As in :func:`cluster_representatives`.

    Returns
    -------
    Representatives
        ``weight``: weighted fraction of the window's snapshots in the group.
    """
    time = ens.snapshots["time"].to_numpy()
    if isinstance(windows, (int, np.integer)):
        if windows < 1:
            raise SchemaError(f"windows must be >= 1; got {windows}.")
        edges = np.linspace(time.min(), time.max(), int(windows) + 1)
        edges[-1] = np.nextafter(edges[-1], np.inf)
        wins = list(zip(edges[:-1], edges[1:], strict=True))
    else:
        wins = [(float(a), float(b)) for a, b in windows]
        if any(b <= a for a, b in wins):
            raise SchemaError(f"every window must have t1 > t0; got {wins}.")
    labels = None if clusters is None else _labels_of(ens, clusters)
    w = ens.snapshot_weights()
    groups = []
    for a, b in wins:
        inwin = np.flatnonzero((time >= a) & (time < b))
        if inwin.size == 0:
            continue
        tot = w[inwin].sum()
        name = f"{a:g}-{b:g} fs"
        if labels is None:
            groups.append((name, inwin, w[inwin], 1.0))
            continue
        for lab in pd.unique(labels[inwin]):
            rows = inwin[labels[inwin] == lab]
            groups.append((f"{name}|{lab}", rows, w[rows], float(w[rows].sum() / tot)))
    fz = clusters.featuriser if isinstance(clusters, ClusterResult) else None
    with few_threads(max_candidates * max(len(groups), 1)):
        return _select(ens, groups, features=features, kind=kind, bins=bins,
                       max_candidates=max_candidates, reference=reference,
                       random_state=random_state, featuriser=fz)


def band_representatives(
    ens: Ensemble,
    contributions: pd.DataFrame | dict[str, pd.DataFrame],
    *,
    coverage: float = 0.9,
    kind: Kind = "medoid",
    features: object = "inverse_distances",
    bins: int = 10,
    max_candidates: int = 2000,
    reference: str | npt.ArrayLike = "mean",
    random_state: int = 0,
) -> Representatives:
    """Representative structures of selected spectral bands.

    Parameters
    ----------
    ens : Ensemble
    contributions : DataFrame or mapping band name -> DataFrame
        Any table with columns ``snapshot`` (ids of ``ens.snapshots``) and ``share``
        (its share of the band intensity), such as
        ``ensemblelab.compute.spectroscopy.contributions(ens, map, group_by="snapshot", ...)``.
    coverage : float in (0, 1]
        Keep the largest-share snapshots that together hold this fraction of the
        band's share; the representative is the share-weighted medoid (or mode) of
        those.
    kind, features, bins, max_candidates, reference, random_state
        As in :func:`cluster_representatives`.

    Returns
    -------
    Representatives
        ``group`` is the band name ("band" for a single table); ``weight`` is the
        share held by the kept snapshots.
    """
    if not 0 < coverage <= 1:
        raise SchemaError(f"coverage must be in (0, 1]; got {coverage}.")
    bands = contributions if isinstance(contributions, dict) else {"band": contributions}
    sid = ens.snapshots["snapshot"].to_numpy()
    lookup = pd.Series(np.arange(len(sid)), index=sid)
    groups = []
    for name, df in bands.items():
        missing = {"snapshot", "share"} - set(df.columns)
        if missing:
            raise SchemaError(f"contributions for {name!r} lack column(s) {sorted(missing)}; "
                              f"found {list(df.columns)}.")
        agg = df.groupby("snapshot", sort=False)["share"].sum()
        agg = agg[agg > 0].sort_values(ascending=False)
        unknown = ~agg.index.isin(sid)
        if unknown.any():
            raise SchemaError(f"contributions for {name!r} name snapshot id(s) not in ens: "
                              f"{agg.index[unknown][:5].tolist()}.")
        total = float(agg.sum())
        if total <= 0:
            continue
        cum = np.cumsum(agg.to_numpy()) / total
        n_keep = int(np.searchsorted(cum, coverage - 1e-12) + 1)
        kept = agg.iloc[:n_keep]
        rows = lookup.loc[kept.index.to_numpy()].to_numpy()
        groups.append((str(name), rows, kept.to_numpy(dtype=np.float64),
                       float(kept.sum() / total)))
    return _select(ens, groups, features=features, kind=kind, bins=bins,
                   max_candidates=max_candidates, reference=reference,
                   random_state=random_state)
