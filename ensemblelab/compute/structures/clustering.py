"""Clustering snapshots by structure (and active state), and clustering hopping geometries.

:func:`cluster_snapshots` featurises geometries (any transformer from
:mod:`ensemblelab.compute.structures.descriptors`, or your own features), optionally splits
the snapshots by active state, and clusters each group with any scikit-learn
clustering estimator. Defaults scale from 10^3 to 10^6 snapshots:

* the featuriser and the estimator are fitted on a random subsample of at most
  ``max_fit_samples`` snapshots per group;
* estimators with ``predict`` (k-means, mini-batch k-means, Gaussian mixtures) then
  label every snapshot chunk by chunk; estimators without it (HDBSCAN, DBSCAN,
  agglomerative) keep their own labels on the subsample and the rest is assigned to
  its nearest fitted neighbour (``assign="neighbour"``, default; noise neighbours
  give noise) or to the nearest cluster centroid (``assign="centroid"``, faster);
* features are computed chunk by chunk and never held for all snapshots at once.

:func:`cluster_hops` does the same for the geometries at every surface hop.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from sklearn.base import BaseEstimator, TransformerMixin, clone

from ...errors import SchemaError
from .._threads import few_threads
from ..uncertainty.clusters import cluster_fraction_intervals
from ._featurise import FeaturesLike, Featuriser, build_featuriser, make_featuriser

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = [
    "ClusterResult",
    "HopClusterResult",
    "cluster_snapshots",
    "cluster_hops",
    "make_featuriser",
    "wilson_interval",
]

Z_95 = 1.959963984540054  # two-sided 95 % normal quantile (scipy.stats.norm.ppf(0.975))


def wilson_interval(p: npt.ArrayLike, n: npt.ArrayLike, *, z: float = Z_95
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a fraction `p` out of `n` (J. Amer. Stat. Assoc. 22, 209 (1927)).

    For weighted data pass the weighted fraction and the Kish effective size.

    Returns
    -------
    lower, upper : ndarray
    """
    p = np.asarray(p, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = 1.0 + z * z / n
        centre = (p + z * z / (2 * n)) / denom
        half = z / denom * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    lo = np.where(n > 0, np.clip(centre - half, 0.0, 1.0), np.nan)
    hi = np.where(n > 0, np.clip(centre + half, 0.0, 1.0), np.nan)
    return lo, hi


# ---------------------------------------------------------------------- estimators
def _default_estimator(method: str, k: int, n_fit: int, random_state: int) -> BaseEstimator:
    from sklearn.cluster import HDBSCAN, AgglomerativeClustering, KMeans, MiniBatchKMeans

    if method == "kmeans":
        if n_fit > 10000:
            return MiniBatchKMeans(n_clusters=k, random_state=random_state, n_init=3,
                                   batch_size=4096)
        return KMeans(n_clusters=k, random_state=random_state, n_init=4)
    if method == "density":
        return HDBSCAN(min_cluster_size=max(10, n_fit // 100), copy=True)
    if method == "agglomerative":
        return AgglomerativeClustering(n_clusters=k, linkage="ward")
    raise SchemaError(
        f"method must be 'kmeans', 'density' or 'agglomerative'; got {method!r}."
    )


def _set_k(est: BaseEstimator, k: int) -> BaseEstimator:
    params = est.get_params(deep=False)
    for name in ("n_clusters", "n_components"):
        if name in params and isinstance(params[name], (int, np.integer)) and params[name] > k:
            est.set_params(**{name: k})
    return est


def _fit_group(rows: np.ndarray, fz: Featuriser, est: BaseEstimator, k: int,
               max_fit: int, chunk: int, rng: np.random.Generator, assign: str = "neighbour"
               ) -> tuple[np.ndarray, np.ndarray | None]:
    """Labels (local 0..K-1, -1 noise) for `rows`, and centroids (K, n_features)."""
    n = len(rows)
    if n == 0:
        return np.zeros(0, np.int64), None
    if n < 2:
        return np.zeros(n, np.int64), None
    fit_pos: np.ndarray = np.arange(n)
    if n > max_fit:
        fit_pos = np.sort(rng.choice(n, size=max_fit, replace=False))
    Ffit = fz(rows[fit_pos])
    est = _set_k(est, min(k, len(fit_pos)))
    labels = np.empty(n, dtype=np.int64)
    if hasattr(est, "predict") and len(fit_pos) < n:
        est.fit(Ffit)
        for s in range(0, n, chunk):
            labels[s:s + chunk] = est.predict(fz(rows[s:s + chunk]))
        fit_labels = labels[fit_pos]
    else:
        fit_labels = np.asarray(est.fit_predict(Ffit), dtype=np.int64)
        labels[fit_pos] = fit_labels
    # relabel 0..K-1 by decreasing size (deterministic) and compute centroids
    uniq = [c for c in np.unique(fit_labels) if c >= 0]
    if not uniq:
        labels[:] = -1
        return labels, None
    cent = np.stack([Ffit[fit_labels == c].mean(0) for c in uniq])
    if len(fit_pos) < n and not hasattr(est, "predict"):
        rest = np.setdiff1d(np.arange(n), fit_pos)
        if assign == "centroid":
            from sklearn.metrics import pairwise_distances_argmin

            def lab_of(F: np.ndarray) -> np.ndarray:
                return np.asarray(uniq)[pairwise_distances_argmin(F, cent)]
        else:
            from sklearn.neighbors import KNeighborsClassifier

            knn = KNeighborsClassifier(n_neighbors=1).fit(Ffit, fit_labels)

            def lab_of(F: np.ndarray) -> np.ndarray:
                return knn.predict(F)
        for s in range(0, len(rest), chunk):
            part = rest[s:s + chunk]
            labels[part] = lab_of(fz(rows[part]))
    sizes = np.array([np.sum(labels == c) for c in uniq])
    order = np.argsort(-sizes, kind="stable")
    remap = {uniq[o]: i for i, o in enumerate(order)}
    new = np.full(n, -1, dtype=np.int64)
    for old, nw in remap.items():
        new[labels == old] = nw
    return new, cent[order]


# ---------------------------------------------------------------------- results
@dataclass(frozen=True)
class ClusterResult:
    """Cluster labels of snapshots and their per-cluster summary.

    Attributes
    ----------
    labels : ndarray of str, shape (n_snapshots,)
        Aligned to ``ens.snapshots``: "S1:0", "S1:1", ... with ``by_state=True``
        (state label, colon, cluster within that state, 0 = largest), otherwise
        "0", "1", ...; noise points of density-based estimators are "S1:noise" / "noise".
    codes : ndarray of int, shape (n_snapshots,)
        A unique integer per cluster (row of :attr:`summary`), -1 for noise.
    summary : DataFrame
        One row per cluster: ``cluster``, ``code``, ``state`` (active state, -1 when
        not split by state), ``size``, ``fraction`` (weighted by trajectory weight),
        ``lower``, ``upper`` (95 % percentile bootstrap over whole trajectories,
        weights kept: snapshots of one trajectory are correlated, so they are not
        resampled one by one),
        ``n_trajectories``, ``time_mean``, ``time_q10``, ``time_median``,
        ``time_q90`` (fs), ``silhouette`` (mean silhouette on a subsample, within
        the state group), ``medoid_snapshot`` (on a subsample, in feature space).
    mean_features : DataFrame
        Mean (standardised, if so) feature vector of every cluster (index: cluster).
    silhouette : float
        Mean silhouette over the subsample (NaN when undefined).
    snapshot : ndarray of int, shape (n_snapshots,)
        The ``snapshot`` ids the labels refer to.
    time, active : ndarray, shape (n_snapshots,)
    """

    labels: np.ndarray
    codes: np.ndarray
    summary: pd.DataFrame
    mean_features: pd.DataFrame
    silhouette: float
    snapshot: np.ndarray
    time: np.ndarray
    active: np.ndarray
    weights: np.ndarray
    featuriser: Any = field(repr=False, default=None)

    def assign_to(self, ens: Ensemble, *, name: str = "cluster") -> Ensemble:
        """Return a new Ensemble with the labels as a snapshot column `name`."""
        if ens.n_snapshots != len(self.labels) or not np.array_equal(
                ens.snapshots["snapshot"].to_numpy(), self.snapshot):
            raise SchemaError("this ClusterResult belongs to a different ensemble (snapshot ids "
                              "differ); recluster or select the same snapshots.")
        return ens.assign(**{name: self.labels})

    def time_profile(self, *, bins: int | npt.ArrayLike = 20) -> pd.DataFrame:
        """Weighted fraction of snapshots in each cluster per time bin.

        Parameters
        ----------
        bins : int or array_like
            Number of equal time bins, or bin edges in fs.

        Returns
        -------
        DataFrame
            Index: bin centre (fs); one column per cluster; rows sum to 1 where
            snapshots exist.
        """
        edges = np.histogram_bin_edges(self.time, bins=bins)
        idx = np.clip(np.digitize(self.time, edges) - 1, 0, len(edges) - 2)
        frame = pd.DataFrame({"bin": idx, "cluster": self.labels, "w": self.weights})
        tab = frame.pivot_table(index="bin", columns="cluster", values="w", aggfunc="sum",
                                fill_value=0.0)
        tab = tab.div(tab.sum(axis=1), axis=0)
        tab.index = 0.5 * (edges[:-1] + edges[1:])[tab.index.to_numpy()]
        tab.index.name = "time"
        return tab


@dataclass(frozen=True)
class HopClusterResult:
    """Clustered hopping geometries.

    Attributes
    ----------
    hops : DataFrame
        :meth:`Ensemble.hops` plus ``row`` (snapshot row of the geometry used: the
        last step before the hop, where the gap is measured), ``de_kin`` (eV, change
        of ``e_kin`` across the hop when that column exists), ``cluster``, and, with
        references, ``nearest_reference`` and ``reference_rmsd`` (Angstrom).
    geometries : ndarray, shape (n_hops, n_atoms, 3)
    counts : DataFrame
        Per cluster (and transition ``from``->``to``): ``count``, ``fraction``,
        ``lower``, ``upper`` (95 % bootstrap over whole trajectories, weighted),
        ``gap_mean``, ``gap_max`` (eV),
        ``time_median`` (fs), ``medoid_row`` (snapshot row of the medoid geometry),
        ``medoid_snapshot`` (its snapshot id).
    labels : ndarray of str, shape (n_hops,)
    """

    hops: pd.DataFrame
    geometries: np.ndarray
    counts: pd.DataFrame
    labels: np.ndarray


# ---------------------------------------------------------------------- public API
#: scikit-learn working memory (MB) of the silhouette's chunked pair distances
SILHOUETTE_WORKING_MB = 8


def _silhouette(F: np.ndarray, labels: np.ndarray) -> tuple[float, dict[int, float]]:
    from sklearn.metrics import silhouette_samples

    ok = labels >= 0
    if len(np.unique(labels[ok])) < 2 or ok.sum() <= len(np.unique(labels[ok])):
        return np.nan, {}
    from sklearn import config_context

    # pair distances a few MB at a time instead of the whole (n, n) matrix at once
    # (reduced row by row, so the chunking does not change the result)
    with config_context(working_memory=SILHOUETTE_WORKING_MB):
        s = silhouette_samples(F[ok], labels[ok])
    per = {int(c): float(s[labels[ok] == c].mean()) for c in np.unique(labels[ok])}
    return float(s.mean()), per


def _medoid(F: np.ndarray, w: np.ndarray) -> int:
    """Position of the member minimising the weighted sum of distances to the others."""
    from sklearn.metrics import pairwise_distances

    with few_threads(len(F)):
        D = pairwise_distances(F)
    return int(np.argmin(D @ w))


def cluster_snapshots(
    ens: Ensemble,
    *,
    features: FeaturesLike = "inverse_distances",
    estimator: BaseEstimator | None = None,
    by_state: bool = True,
    n_clusters: int | Mapping[int, int] = 4,
    method: Literal["kmeans", "density", "agglomerative"] = "kmeans",
    standardise: bool = True,
    max_fit_samples: int = 50000,
    assign: Literal["neighbour", "centroid"] = "neighbour",
    silhouette_samples: int = 2000,
    chunk_size: int = 65536,
    random_state: int = 0,
    progress: bool = False,
) -> ClusterResult:
    """Cluster snapshots by structure, optionally within each active state.

    Parameters
    ----------
    ens : Ensemble
    features : str, transformer, array_like or list of str
        "inverse_distances" (default), "sorted_inverse_distances", "coulomb",
        "aligned"; a scikit-learn transformer taking flattened geometries
        (n_snapshots, n_atoms * 3), e.g. :class:`~.descriptors.InternalCoordinates`;
        a precomputed array (n_snapshots, n_features); or snapshot column names.
    estimator : scikit-learn clusterer, optional
        Any estimator with ``fit`` and ``predict`` or ``fit_predict`` (cloned per
        state group; ``n_clusters`` is applied when it has that parameter and is
        capped at the group size). Default chosen by `method`.
    by_state : bool
        Cluster each active state separately (labels "S1:0", ...).
    n_clusters : int or mapping state -> int
        Clusters per group (ignored by density-based estimators).
    method : {"kmeans", "density", "agglomerative"}
        Default estimator: k-means (mini-batch above 10^4 fitted samples), HDBSCAN,
        or Ward agglomerative (fitted on the subsample, the rest assigned by `assign`).
    standardise : bool
        Scale features to zero mean and unit variance before clustering.
    max_fit_samples : int
        Largest subsample per group the estimator is fitted on.
    assign : {"neighbour", "centroid"}
        How snapshots outside the subsample get labels from estimators without
        ``predict``: label of the nearest fitted snapshot, or nearest cluster mean.
    silhouette_samples : int
        Subsample size per group for the silhouette score.
    chunk_size : int
        Snapshots featurised at once (memory bound).
    random_state : int
        Seed of subsampling and of the default estimators.
    progress : bool
        Show a progress bar over state groups.

    Returns
    -------
    ClusterResult

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(10, t_max=50.0)
    >>> res = cluster_snapshots(ens, n_clusters=2)
    >>> sorted(res.summary["cluster"])
    ['S1:0', 'S1:1', 'S2:0', 'S2:1']
    >>> "cluster" in res.assign_to(ens).snapshots
    True
    """
    n = ens.n_snapshots
    if n == 0:
        raise SchemaError("cannot cluster an empty ensemble.")
    if max_fit_samples < 2:
        raise SchemaError(f"max_fit_samples must be >= 2; got {max_fit_samples}.")
    rng = np.random.default_rng(random_state)
    fz = build_featuriser(ens, features, standardise)
    fit_rows: np.ndarray = np.arange(n)
    if n > max_fit_samples:
        fit_rows = np.sort(rng.choice(n, size=max_fit_samples, replace=False))
    fz.fit(fit_rows)
    active = ens.snapshots["active"].to_numpy()
    time = ens.snapshots["time"].to_numpy()
    weights = ens.snapshot_weights()
    traj = ens.snapshots["traj"].to_numpy()
    groups = [(int(s), np.flatnonzero(active == s)) for s in np.unique(active)] if by_state \
        else [(-1, np.arange(n))]
    if progress:
        from tqdm.auto import tqdm

        groups = list(tqdm(groups, desc="clustering", leave=False))
    labels = np.empty(n, dtype=object)
    codes = np.full(n, -1, dtype=np.int64)
    rows_summary = []
    mean_rows = []
    sil_all: list[tuple[float, int]] = []
    code = 0
    wtot = weights.sum()
    for state, rows in groups:
        k = n_clusters.get(state, 4) if isinstance(n_clusters, Mapping) else int(n_clusters)
        if k < 1:
            raise SchemaError(f"n_clusters must be >= 1; got {k} for state {state}.")
        est = clone(estimator) if estimator is not None else _default_estimator(
            method, k, min(len(rows), max_fit_samples), random_state)
        if "random_state" in est.get_params(deep=False) and estimator is None:
            est.set_params(random_state=random_state)
        if assign not in ("neighbour", "centroid"):
            raise SchemaError(f"assign must be 'neighbour' or 'centroid'; got {assign!r}.")
        with few_threads(min(len(rows), max_fit_samples)):
            local, _ = _fit_group(rows, fz, est, k, max_fit_samples, chunk_size, rng, assign)
        prefix = f"{ens.state_labels[state]}:" if state >= 0 else ""
        # silhouette and medoids on a subsample of the group
        sub: np.ndarray = np.arange(len(rows))
        if len(sub) > silhouette_samples:
            sub = np.sort(rng.choice(len(rows), size=silhouette_samples, replace=False))
        Fsub = fz(rows[sub])
        with few_threads(len(sub)):
            sil, per = _silhouette(Fsub, local[sub])
        if np.isfinite(sil):
            sil_all.append((sil, len(sub)))
        for c in np.unique(local):
            members = rows[local == c]
            name = f"{prefix}{c}" if c >= 0 else f"{prefix}noise"
            labels[members] = name
            this_code = code if c >= 0 else -1
            codes[members] = this_code
            w = weights[members]
            frac = w.sum() / wtot if wtot > 0 else np.nan
            t = time[members]
            in_sub = local[sub] == c
            medoid = -1
            if in_sub.any():
                medoid = int(ens.snapshots["snapshot"].to_numpy()[
                    rows[sub[in_sub]][_medoid(Fsub[in_sub], weights[rows[sub[in_sub]]])]])
            # mean features by chunks
            acc = np.zeros(len(fz.names)) if fz.names else None
            for s in range(0, len(members), chunk_size):
                Fm = fz(members[s:s + chunk_size])
                acc = Fm.sum(0) if acc is None or acc.shape != Fm.shape[1:] else acc + Fm.sum(0)
            assert acc is not None
            mean_rows.append(pd.Series(acc / len(members), name=name))
            rows_summary.append({
                "cluster": name, "code": this_code, "state": state, "size": len(members),
                "fraction": frac, "n_trajectories": len(np.unique(traj[members])),
                "time_mean": float(np.average(t, weights=w)) if w.sum() > 0 else t.mean(),
                "time_q10": float(np.quantile(t, 0.1)), "time_median": float(np.median(t)),
                "time_q90": float(np.quantile(t, 0.9)),
                "silhouette": per.get(int(c), np.nan) if c >= 0 else np.nan,
                "medoid_snapshot": medoid,
            })
            if c >= 0:
                code += 1
    summary = pd.DataFrame(rows_summary)
    # trajectories are the independent units: resample them whole (snapshots are not)
    lo, hi = cluster_fraction_intervals(labels.astype(str), summary["cluster"], traj, weights,
                                        random_state=random_state)
    summary.insert(list(summary.columns).index("fraction") + 1, "lower", lo)
    summary.insert(list(summary.columns).index("lower") + 1, "upper", hi)
    mean_features = pd.DataFrame(mean_rows)
    if fz.names and mean_features.shape[1] == len(fz.names):
        mean_features.columns = fz.names
    mean_features.index.name = "cluster"
    sil = float(np.average([s for s, _ in sil_all], weights=[m for _, m in sil_all])) \
        if sil_all else np.nan
    return ClusterResult(
        labels=labels.astype(str), codes=codes, summary=summary, mean_features=mean_features,
        silhouette=sil, snapshot=ens.snapshots["snapshot"].to_numpy().copy(), time=time.copy(),
        active=active.copy(), weights=weights.copy(), featuriser=fz,
    )


def cluster_hops(
    ens: Ensemble,
    *,
    features: str | TransformerMixin = "inverse_distances",
    estimator: BaseEstimator | None = None,
    n_clusters: int = 3,
    method: Literal["kmeans", "density", "agglomerative"] = "kmeans",
    by_transition: bool = False,
    standardise: bool = True,
    references: Mapping[str, npt.ArrayLike] | None = None,
    random_state: int = 0,
) -> HopClusterResult:
    """Extract every surface hop with its gap and geometry, cluster the geometries.

    Parameters
    ----------
    ens : Ensemble
    features, estimator, n_clusters, method, standardise, random_state
        As in :func:`cluster_snapshots`.
    by_transition : bool
        Cluster each (from, to) transition separately (labels "S2->S1:0").
    references : mapping of name -> array (n_atoms, 3), optional
        Reference structures (Franck-Condon point, optimised crossings); every hop
        gets the nearest one by minimum RMSD (mass-weighted Kabsch).

    Returns
    -------
    HopClusterResult
        Empty tables when the ensemble has no hops.
    """
    from .geometry import rmsd as _rmsd

    hops = ens.hops().reset_index(drop=True)
    pos = np.searchsorted(ens.snapshots["snapshot"].to_numpy(), hops["snapshot"].to_numpy())
    # rows are sorted by snapshot id within an ensemble built by from_arrays; fall back safely
    sid = ens.snapshots["snapshot"].to_numpy()
    if len(pos) and not np.array_equal(sid[np.clip(pos, 0, len(sid) - 1)], hops["snapshot"]):
        lookup = pd.Series(np.arange(len(sid)), index=sid)
        pos = lookup.loc[hops["snapshot"].to_numpy()].to_numpy()
    before = pos - 1
    hops["row"] = before
    if "e_kin" in ens.snapshots.columns:
        ek = ens.snapshots["e_kin"].to_numpy(dtype=np.float64)
        hops["de_kin"] = ek[pos] - ek[before]
    G = ens.geometries[before]
    weights = ens.trajectories.set_index("traj")["weight"].reindex(hops["traj"]).to_numpy()
    labels = np.empty(len(hops), dtype=object)
    if len(hops) == 0:
        hops["cluster"] = labels
        counts = pd.DataFrame(columns=["cluster", "from", "to", "count", "fraction", "lower",
                                       "upper", "gap_mean", "gap_max", "time_median",
                                       "medoid_row"])
        return HopClusterResult(hops=hops, geometries=G, counts=counts, labels=labels)
    rng = np.random.default_rng(random_state)
    fz = build_featuriser(ens, features, standardise, geometries=G).fit(np.arange(len(hops)))
    F = fz(np.arange(len(hops)))
    if by_transition:
        groups = [(f"{ens.state_labels[int(a)]}->{ens.state_labels[int(b)]}:",
                   np.flatnonzero((hops["from"] == a).to_numpy() & (hops["to"] == b).to_numpy()))
                  for a, b in sorted({(int(x), int(y)) for x, y in zip(hops["from"], hops["to"],
                                                                        strict=True)})]
    else:
        groups = [("", np.arange(len(hops)))]
    for prefix, rows in groups:
        est = clone(estimator) if estimator is not None else _default_estimator(
            method, n_clusters, len(rows), random_state)
        local, _ = _fit_group(rows, fz, est, n_clusters, 10**9, 65536, rng)
        for c in np.unique(local):
            labels[rows[local == c]] = f"{prefix}{c}" if c >= 0 else f"{prefix}noise"
    hops["cluster"] = labels.astype(str)
    if references:
        names = list(references)
        R = np.stack([_rmsd(G, np.asarray(references[k], float), weights=ens.masses,
                            method="kabsch") for k in names], axis=1)
        hops["nearest_reference"] = np.asarray(names, dtype=object)[np.argmin(R, axis=1)]
        hops["reference_rmsd"] = R.min(axis=1)
    rows_out = []
    for name, idx in hops.groupby("cluster", sort=True).indices.items():
        w = weights[idx]
        med = int(hops["row"].to_numpy()[idx[_medoid(F[idx], w)]])
        rows_out.append({
            "cluster": name,
            "transitions": ", ".join(sorted({f"{ens.state_labels[int(a)]}->"
                                             f"{ens.state_labels[int(b)]}" for a, b in
                                             zip(hops["from"].to_numpy()[idx],
                                                 hops["to"].to_numpy()[idx], strict=True)})),
            "count": len(idx), "fraction": w.sum() / weights.sum(),
            "gap_mean": float(hops["gap"].to_numpy()[idx].mean()),
            "gap_max": float(hops["gap"].to_numpy()[idx].max()),
            "time_median": float(np.median(hops["time"].to_numpy()[idx])),
            "medoid_row": med,
            "medoid_snapshot": int(sid[med]),
        })
    counts = pd.DataFrame(rows_out)
    lo, hi = cluster_fraction_intervals(hops["cluster"].to_numpy(), counts["cluster"],
                                        hops["traj"].to_numpy(), weights,
                                        random_state=random_state)
    counts.insert(list(counts.columns).index("fraction") + 1, "lower", lo)
    counts.insert(list(counts.columns).index("lower") + 1, "upper", hi)
    return HopClusterResult(hops=hops, geometries=G, counts=counts, labels=labels.astype(str))
