"""Featurisation for clustering: geometries, precomputed arrays or snapshot columns to
(standardised) feature rows, computed chunk by chunk for any subset of rows."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, TypeAlias

import numpy as np
import numpy.typing as npt
from sklearn.base import BaseEstimator, TransformerMixin, clone

from ...data.elements import atomic_numbers_for
from ...errors import SchemaError
from .descriptors import AlignedCartesian, CoulombEigenvalues, InverseDistances

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = ["FeaturesLike", "make_featuriser"]

FeaturesLike: TypeAlias = str | TransformerMixin | npt.ArrayLike | Sequence[str]


# ---------------------------------------------------------------------- featurisation
class _ColumnFeatures(TransformerMixin, BaseEstimator):
    """Placeholder so precomputed features flow through the same code path."""

    def fit(self, X: Any, y: Any = None) -> _ColumnFeatures:
        return self

    def transform(self, X: Any) -> np.ndarray:
        return np.asarray(X, dtype=np.float64)


def make_featuriser(features: str | TransformerMixin, symbols: Sequence[str],
                    masses: npt.ArrayLike | None = None) -> TransformerMixin:
    """The transformer behind a feature name.

    Parameters
    ----------
    features : str or transformer
        "inverse_distances" (1/r_ij in atom-pair order), "sorted_inverse_distances"
        (sorted within element pairs), "coulomb" (Coulomb-matrix eigenvalues),
        "aligned" (mass-weighted aligned Cartesians), or a transformer taking
        flattened geometries (returned unfitted as a clone).
    symbols : sequence of str
    masses : array_like, optional

    Returns
    -------
    transformer
    """
    if not isinstance(features, str):
        return clone(features)
    if features == "inverse_distances":
        return InverseDistances()
    if features == "sorted_inverse_distances":
        return InverseDistances(sort="element_pair", symbols=list(symbols))
    if features == "coulomb":
        return CoulombEigenvalues(atomic_numbers=atomic_numbers_for(list(symbols)).tolist())
    if features == "aligned":
        return AlignedCartesian(weights=None if masses is None else np.asarray(masses))
    raise SchemaError(
        "features must be 'inverse_distances', 'sorted_inverse_distances', 'coulomb', "
        f"'aligned', a transformer, an array or a list of snapshot columns; got {features!r}."
    )


@dataclass
class Featuriser:
    """Compute (standardised) features for any rows of a geometry source, chunk by chunk."""

    source: Callable[[np.ndarray], np.ndarray]  # rows -> 2-D raw input
    transformer: TransformerMixin
    standardise: bool
    mean_: np.ndarray | None = None
    scale_: np.ndarray | None = None
    names: list[str] = field(default_factory=list)

    def fit(self, rows: np.ndarray) -> Featuriser:
        X = self.source(rows)
        F = np.asarray(self.transformer.fit_transform(X), dtype=np.float64)
        if F.ndim != 2 or F.shape[1] == 0:
            raise SchemaError(f"the featuriser returned an array of shape {F.shape}; expected "
                              "(n_samples, n_features >= 1).")
        if self.standardise:
            self.mean_ = F.mean(0)
            sc = F.std(0)
            sc[sc < 1e-12] = 1.0
            self.scale_ = sc
        try:
            self.names = [str(v) for v in self.transformer.get_feature_names_out()]
        except (AttributeError, ValueError, TypeError):
            self.names = [f"f{i}" for i in range(F.shape[1])]
        if len(self.names) != F.shape[1]:
            self.names = [f"f{i}" for i in range(F.shape[1])]
        return self

    def __call__(self, rows: np.ndarray) -> np.ndarray:
        F = np.asarray(self.transformer.transform(self.source(rows)), dtype=np.float64)
        if self.standardise:
            assert self.mean_ is not None and self.scale_ is not None
            if isinstance(self.transformer, _OWN_TRANSFORMERS) and F.flags.writeable:
                # our transformers return a fresh array (the source's rows are a copy):
                # standardise in place, the same operations without two temporaries
                F -= self.mean_
                F /= self.scale_
            else:
                F = (F - self.mean_) / self.scale_
        return F


_OWN_TRANSFORMERS = (InverseDistances, CoulombEigenvalues, AlignedCartesian, _ColumnFeatures)


def build_featuriser(ens: Ensemble, features: FeaturesLike, standardise: bool,
                      geometries: np.ndarray | None = None) -> Featuriser:
    G = ens.geometries if geometries is None else geometries
    n = G.shape[0]
    if isinstance(features, str) or isinstance(features, TransformerMixin):
        tr = make_featuriser(features, ens.symbols, ens.masses)

        def source(rows: np.ndarray) -> np.ndarray:
            return G[rows].reshape(len(rows), -1)

        return Featuriser(source, tr, standardise)
    if isinstance(features, (list, tuple)) and features and all(
            isinstance(c, str) for c in features):
        missing = [c for c in features if c not in ens.snapshots.columns]
        if missing:
            raise SchemaError(f"features names unknown snapshot column(s) {missing}; found "
                              f"{list(ens.snapshots.columns)}.")
        arr = ens.snapshots[list(features)].to_numpy(dtype=np.float64)
        if geometries is not None:
            raise SchemaError("column features cannot be used for hop geometries.")
        fz = Featuriser(lambda rows: arr[rows], _ColumnFeatures(), standardise)
        fz.names = list(features)
        return fz
    arr2: np.ndarray = np.asarray(features, dtype=np.float64)
    if arr2.ndim != 2 or arr2.shape[0] != n:
        raise SchemaError(
            f"a features array must have shape (n_rows={n}, n_features); got {arr2.shape}."
        )
    return Featuriser(lambda rows: arr2[rows], _ColumnFeatures(), standardise)
