"""Geometry descriptors as scikit-learn transformers.

Input convention: scikit-learn works on 2-D arrays, so every transformer here takes
*flattened* geometries ``X`` of shape (n_samples, n_atoms * 3) in Angstrom, i.e.
``ens.geometries.reshape(len(ens), -1)``; ``n_atoms`` is inferred at ``fit`` as
``n_features // 3`` (``n_features`` must be a multiple of 3). :func:`flatten` does
the reshaping. Each transformer can standardise its output (``standardise=True``:
zero mean and unit variance per feature, learnt at ``fit``), so they drop straight
into a :class:`sklearn.pipeline.Pipeline` or :func:`ensemblelab.cluster_snapshots`.

* :class:`InternalCoordinates` -- user-chosen bonds, angles, dihedrals (as cos, sin)
  and pyramidalisation heights (interpretable; common practice).
* :class:`InverseDistances` -- 1/r_ij for every pair, in atom order or sorted
  (globally or per element pair: invariant to permutations of identical atoms).
* :class:`CoulombEigenvalues` -- sorted eigenvalues of the Coulomb matrix
  (Phys. Rev. Lett. 108, 058301 (2012)), in bohr or Angstrom units.
* :class:`AlignedCartesian` -- coordinates after Kabsch superposition on the mean
  structure learnt at ``fit``.

All but :class:`AlignedCartesian` are invariant to rigid motions by construction.
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Integral
from typing import Any

import numpy as np
import numpy.typing as npt
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils._param_validation import Interval, StrOptions
from sklearn.utils.validation import check_is_fitted, validate_data

from ...data.elements import atomic_numbers_for
from ...units import BOHR_ANGSTROM
from . import _kernels_geometry as _k

__all__ = [
    "flatten",
    "InternalCoordinates",
    "InverseDistances",
    "CoulombEigenvalues",
    "AlignedCartesian",
]


def flatten(geometries: npt.ArrayLike) -> np.ndarray:
    """Reshape geometries (n_samples, n_atoms, 3) to the 2-D input (n_samples, n_atoms * 3).

    Examples
    --------
    >>> import numpy as np
    >>> flatten(np.zeros((5, 4, 3))).shape
    (5, 12)
    """
    arr = np.asarray(geometries, dtype=np.float64)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise ValueError(f"geometries must have shape (n_samples, n_atoms, 3); got {arr.shape}.")
    return arr.reshape(arr.shape[0], -1)


class _GeometryTransformer(TransformerMixin, BaseEstimator):
    """Shared fit/transform logic: validate, reshape, featurise, optionally standardise."""

    _parameter_constraints: dict[str, list[Any]] = {"standardise": ["boolean"]}

    def _n_atoms_of(self, X: np.ndarray) -> int:
        n_features = X.shape[1]
        if n_features % 3:
            raise ValueError(
                f"{type(self).__name__} expects flattened geometries with n_features = "
                f"3 * n_atoms; got n_features={n_features}, which is not a multiple of 3. "
                "Hint: use ensemblelab.compute.structures.descriptors.flatten(geometries)."
            )
        return n_features // 3

    def _setup(self, n_atoms: int) -> None:  # pragma: no cover - overridden when needed
        """Check parameters that depend on n_atoms and store derived fitted state."""

    def _features(self, G: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def _fit_extra(self, G: np.ndarray) -> None:
        """Learn anything beyond the scaler (AlignedCartesian's reference)."""

    def fit(self, X: npt.ArrayLike, y: Any = None) -> _GeometryTransformer:
        """Learn the number of atoms (and the scaler when ``standardise=True``).

        Parameters
        ----------
        X : array_like, shape (n_samples, n_atoms * 3)
            Flattened geometries in Angstrom.
        y : ignored

        Returns
        -------
        self
        """
        self._validate_params()
        arr: np.ndarray = validate_data(self, X, dtype=np.float64, ensure_min_samples=1)
        n_atoms = self._n_atoms_of(arr)
        self.n_atoms_ = n_atoms
        self._setup(n_atoms)
        G = arr.reshape(arr.shape[0], n_atoms, 3)
        self._fit_extra(G)
        F = self._features(G)
        if self.standardise:
            self.mean_ = F.mean(axis=0)
            scale = F.std(axis=0)
            scale[~np.isfinite(scale) | (scale < 1e-12 * np.maximum(np.abs(self.mean_), 1.0))] = 1.0
            self.scale_ = scale
        self.n_features_out_ = F.shape[1]
        return self

    def transform(self, X: npt.ArrayLike) -> np.ndarray:
        """Compute the descriptors.

        Parameters
        ----------
        X : array_like, shape (n_samples, n_atoms * 3)
            Flattened geometries in Angstrom, same n_atoms as at ``fit``.

        Returns
        -------
        ndarray, shape (n_samples, n_features_out_)
        """
        check_is_fitted(self, "n_atoms_")
        arr: np.ndarray = validate_data(self, X, dtype=np.float64, reset=False)
        F = self._features(arr.reshape(arr.shape[0], self.n_atoms_, 3))
        if self.standardise:
            F = (F - self.mean_) / self.scale_
        return F

    def get_feature_names_out(self, input_features: Any = None) -> np.ndarray:
        """Names of the output features, shape (n_features_out_,)."""
        check_is_fitted(self, "n_atoms_")
        return np.asarray(self._names(), dtype=object)

    def _names(self) -> list[str]:
        prefix = type(self).__name__.lower()
        return [f"{prefix}{i}" for i in range(self.n_features_out_)]


def _index_array(value: Any, width: int, name: str, n_atoms: int) -> np.ndarray:
    arr = np.asarray(value if value is not None else np.zeros((0, width)), dtype=np.int64)
    if arr.size == 0:
        return np.zeros((0, width), dtype=np.int64)
    arr = np.atleast_2d(arr)
    if arr.ndim != 2 or arr.shape[1] != width:
        raise ValueError(f"{name} must be a sequence of {width}-tuples of atom indices; got "
                         f"an array of shape {arr.shape}.")
    if arr.min() < 0 or arr.max() >= n_atoms:
        raise ValueError(f"{name} holds atom indices outside [0, {n_atoms - 1}] "
                         f"(n_atoms={n_atoms}); got max {arr.max()}, min {arr.min()}.")
    return arr


class InternalCoordinates(_GeometryTransformer):
    """User-chosen internal coordinates (common practice: interpretable descriptors).

    Output columns, in this order: bond lengths (Angstrom), angles (radians),
    dihedrals as (cos, sin) pairs (continuous across +-180 degrees), pyramidalisation
    heights (Angstrom; see :func:`ensemblelab.compute._kernels_geometry.pyramidalisation`).
    With nothing chosen, every interatomic distance is used.

    Parameters
    ----------
    bonds : sequence of (i, j), optional
    angles : sequence of (i, j, k), optional
        Angle at vertex j.
    dihedrals : sequence of (i, j, k, l), optional
    pyramidalisations : sequence of (centre, a, b, c), optional
        Height of `centre` above the plane of its three neighbours.
    standardise : bool, default False
        Scale every output column to zero mean and unit variance (learnt at fit).

    Attributes
    ----------
    n_atoms_ : int
    n_features_in_ : int
    n_features_out_ : int
    mean_, scale_ : ndarray, shape (n_features_out_,)
        Only with ``standardise=True``.

    Examples
    --------
    >>> import numpy as np
    >>> water = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
    >>> ic = InternalCoordinates(bonds=[(0, 1)], angles=[(1, 0, 2)])
    >>> F = ic.fit_transform(water.reshape(1, -1))
    >>> np.round(F, 4).tolist()
    [[0.9578, 1.8235]]
    """

    _parameter_constraints: dict[str, list[Any]] = {
        **_GeometryTransformer._parameter_constraints,
        "bonds": ["array-like", None],
        "angles": ["array-like", None],
        "dihedrals": ["array-like", None],
        "pyramidalisations": ["array-like", None],
    }

    def __init__(self, bonds: Sequence[Sequence[int]] | None = None,
                 angles: Sequence[Sequence[int]] | None = None,
                 dihedrals: Sequence[Sequence[int]] | None = None,
                 pyramidalisations: Sequence[Sequence[int]] | None = None,
                 standardise: bool = False) -> None:
        self.bonds = bonds
        self.angles = angles
        self.dihedrals = dihedrals
        self.pyramidalisations = pyramidalisations
        self.standardise = standardise

    def _setup(self, n_atoms: int) -> None:
        b = _index_array(self.bonds, 2, "bonds", n_atoms)
        a = _index_array(self.angles, 3, "angles", n_atoms)
        d = _index_array(self.dihedrals, 4, "dihedrals", n_atoms)
        p = _index_array(self.pyramidalisations, 4, "pyramidalisations", n_atoms)
        if len(b) + len(a) + len(d) + len(p) == 0:
            i, j = _k.pair_indices(n_atoms)
            b = np.stack([i, j], axis=1)
        self.bonds_, self.angles_, self.dihedrals_, self.pyramidalisations_ = b, a, d, p

    def _features(self, G: np.ndarray) -> np.ndarray:
        cols = []
        if len(self.bonds_):
            cols.append(_k.bond_lengths(G, self.bonds_))
        if len(self.angles_):
            cols.append(_k.bond_angles(G, self.angles_))
        if len(self.dihedrals_):
            c, s = _k.dihedral_cos_sin(G, self.dihedrals_)
            cols.append(np.stack([c, s], axis=2).reshape(G.shape[0], -1))
        if len(self.pyramidalisations_):
            cols.append(_k.pyramidalisation(G, self.pyramidalisations_))
        if not cols:  # a single atom has no internal coordinates
            return np.empty((G.shape[0], 0))
        return np.concatenate(cols, axis=1)

    def _names(self) -> list[str]:
        names = [f"r_{i}_{j}" for i, j in self.bonds_]
        names += [f"angle_{i}_{j}_{k}" for i, j, k in self.angles_]
        for q in self.dihedrals_:
            tag = "_".join(str(int(v)) for v in q)
            names += [f"cos_dihedral_{tag}", f"sin_dihedral_{tag}"]
        names += ["pyr_" + "_".join(str(int(v)) for v in q) for q in self.pyramidalisations_]
        return names


class InverseDistances(_GeometryTransformer):
    """Inverse interatomic distances 1/r_ij (Angstrom^-1) for all pairs i < j.

    Parameters
    ----------
    sort : {"none", "global", "element_pair"}, default "none"
        "none": atom-pair order (most informative for a fixed atom numbering);
        "global": all values sorted in descending order (invariant to any atom
        permutation); "element_pair": sorted descending within each element-pair
        block (invariant to permutations of identical atoms; needs `symbols`).
    symbols : sequence of str, optional
        Element symbols, needed for ``sort="element_pair"``.
    standardise : bool, default False

    Examples
    --------
    >>> import numpy as np
    >>> water = np.array([[0, 0, 0.1173], [0, 0.7572, -0.4692], [0, -0.7572, -0.4692]])
    >>> np.round(InverseDistances(sort="global").fit_transform(water.reshape(1, -1)), 6)
    array([[1.044086, 1.044086, 0.660328]])
    """

    _parameter_constraints: dict[str, list[Any]] = {
        **_GeometryTransformer._parameter_constraints,
        "sort": [StrOptions({"none", "global", "element_pair"})],
        "symbols": ["array-like", None],
    }

    def __init__(self, sort: str = "none", symbols: Sequence[str] | None = None,
                 standardise: bool = False) -> None:
        self.sort = sort
        self.symbols = symbols
        self.standardise = standardise

    def _setup(self, n_atoms: int) -> None:
        i, j = _k.pair_indices(n_atoms)
        self.pairs_ = np.stack([i, j], axis=1)
        if self.sort == "element_pair":
            if self.symbols is None or len(self.symbols) != n_atoms:
                raise ValueError(
                    f"sort='element_pair' needs symbols with n_atoms={n_atoms} entries; got "
                    f"{None if self.symbols is None else len(self.symbols)}."
                )
            z = atomic_numbers_for(list(self.symbols))
            lo = np.minimum(z[i], z[j])
            hi = np.maximum(z[i], z[j])
            key = lo * 1000 + hi
            self.blocks_ = [np.flatnonzero(key == v) for v in np.unique(key)]

    def _features(self, G: np.ndarray) -> np.ndarray:
        inv = _k.inverse_distances(G)
        if self.sort == "global":
            return -np.sort(-inv, axis=1)
        if self.sort == "element_pair":
            return np.concatenate([-np.sort(-inv[:, b], axis=1) for b in self.blocks_], axis=1)
        return inv

    def _names(self) -> list[str]:
        if self.sort == "none":
            return [f"inv_r_{i}_{j}" for i, j in self.pairs_]
        return [f"inv_r_sorted{k}" for k in range(len(self.pairs_))]


class CoulombEigenvalues(_GeometryTransformer):
    """Sorted (descending) eigenvalues of the Coulomb matrix.

    C_ii = 0.5 Z_i^2.4, C_ij = Z_i Z_j / |R_i - R_j| (Phys. Rev. Lett. 108, 058301
    (2012); atomic units in the original). Invariant to rigid motions and to
    permutations of identical atoms.

    Parameters
    ----------
    atomic_numbers : sequence of int, optional
        Nuclear charges Z in atom order. None gives Z = 1 for every atom (only useful
        for testing; pass real charges, e.g.
        ``ensemblelab.data.elements.atomic_numbers_for(ens.symbols)``).
    length_unit : {"bohr", "angstrom"}, default "bohr"
        Unit of r_ij in the off-diagonal elements (input is always Angstrom).
    standardise : bool, default False

    Examples
    --------
    >>> import numpy as np
    >>> h2 = np.array([[0.0, 0, 0, 0.74, 0, 0]])
    >>> np.round(CoulombEigenvalues(atomic_numbers=[1, 1]).fit_transform(h2), 7)
    array([[ 1.2151043, -0.2151043]])
    """

    _parameter_constraints: dict[str, list[Any]] = {
        **_GeometryTransformer._parameter_constraints,
        "atomic_numbers": ["array-like", None],
        "length_unit": [StrOptions({"bohr", "angstrom"})],
    }

    def __init__(self, atomic_numbers: Sequence[int] | None = None, length_unit: str = "bohr",
                 standardise: bool = False) -> None:
        self.atomic_numbers = atomic_numbers
        self.length_unit = length_unit
        self.standardise = standardise

    def _setup(self, n_atoms: int) -> None:
        if self.atomic_numbers is None:
            self.z_ = np.ones(n_atoms)
        else:
            z = np.asarray(self.atomic_numbers, dtype=np.float64).ravel()
            if z.shape != (n_atoms,) or np.any(z <= 0):
                raise ValueError(
                    f"atomic_numbers must hold n_atoms={n_atoms} positive charges; got "
                    f"{z.size} values."
                )
            self.z_ = z
        self.length_factor_ = 1.0 / BOHR_ANGSTROM if self.length_unit == "bohr" else 1.0

    def _features(self, G: np.ndarray) -> np.ndarray:
        return _k.coulomb_eigenvalues(G, self.z_, length_factor=self.length_factor_)

    def _names(self) -> list[str]:
        return [f"cm_eig{k}" for k in range(self.n_atoms_)]


class AlignedCartesian(_GeometryTransformer):
    """Cartesian coordinates after Kabsch superposition on a reference.

    The reference is the weighted mean structure of the training geometries (found
    by iterative superposition at ``fit``) unless given.

    Parameters
    ----------
    reference : array_like, shape (n_atoms, 3), optional
        Fixed reference (Angstrom); default: learnt at fit.
    atoms : sequence of int, optional
        Atoms used for the fit (all atoms are output).
    weights : array_like, shape (n_atoms,), optional
        Per-atom fit weights (e.g. masses).
    max_iter : int, default 20
        Mean-structure iterations.
    standardise : bool, default False

    Attributes
    ----------
    reference_ : ndarray, shape (n_atoms, 3)
    n_iter_ : int
        Mean-structure iterations used at fit (0 with a fixed reference).

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).normal(size=(4, 12))
    >>> AlignedCartesian().fit_transform(X).shape
    (4, 12)
    """

    _parameter_constraints: dict[str, list[Any]] = {
        **_GeometryTransformer._parameter_constraints,
        "reference": ["array-like", None],
        "atoms": ["array-like", None],
        "weights": ["array-like", None],
        "max_iter": [Interval(Integral, 1, None, closed="left")],
    }

    def __init__(self, reference: npt.ArrayLike | None = None,
                 atoms: Sequence[int] | None = None, weights: npt.ArrayLike | None = None,
                 max_iter: int = 20, standardise: bool = False) -> None:
        self.reference = reference
        self.atoms = atoms
        self.weights = weights
        self.max_iter = max_iter
        self.standardise = standardise

    def _setup(self, n_atoms: int) -> None:
        from .geometry import resolve_atoms, resolve_weights

        self.w_ = resolve_weights(self.weights, n_atoms, None, None)
        self.atoms_ = resolve_atoms(self.atoms, n_atoms)

    def _fit_extra(self, G: np.ndarray) -> None:
        from .geometry import mean_structure

        if self.reference is not None:
            ref = np.asarray(self.reference, dtype=np.float64)
            if ref.shape != (self.n_atoms_, 3):
                raise ValueError(f"reference must have shape ({self.n_atoms_}, 3); got "
                                 f"{ref.shape}.")
            self.reference_ = ref
            self.n_iter_ = 0
        else:
            self.reference_, self.n_iter_ = mean_structure(
                G, weights=self.w_, atoms=self.atoms_, max_iter=self.max_iter, tol=1e-8)

    def _features(self, G: np.ndarray) -> np.ndarray:
        sel = self.atoms_
        _, _, R, t = _k.kabsch_rmsd(G[:, sel], self.reference_[sel], self.w_[sel])
        aligned = np.matmul(G, R.transpose(0, 2, 1)) + t[:, None, :]
        return aligned.reshape(G.shape[0], -1)

    def _names(self) -> list[str]:
        return [f"{ax}{i}" for i in range(self.n_atoms_) for ax in "xyz"]

