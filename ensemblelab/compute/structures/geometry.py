"""Superposition and distances of geometries: batched Kabsch, QCP, mean structures, assignment.

All functions work on arrays of shape (n_frames, n_atoms, 3) in Angstrom and are
vectorised over frames (batched SVD / einsum), processed in chunks so memory
stays bounded. :func:`align_ensemble` applies them to an :class:`~ensemblelab.Ensemble`.

Methods: Kabsch [Acta Cryst. A32, 922 (1976);
correction A34, 827 (1978)] and the quaternion characteristic polynomial (QCP)
[Acta Cryst. A61, 478 (2005), "Rapid calculation of RMSDs using a quaternion-based
characteristic polynomial"]. Both exclude reflections unless ``allow_reflection=True``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import numpy as np
import numpy.typing as npt

from ...data.elements import masses_for, normalise_symbol
from ...errors import MissingDependencyError, SchemaError
from . import _kernels_geometry as _k
from ._kernels_superpose import compiled_rmsd

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = [
    "AlignmentResult",
    "COVALENT_RADII",
    "kabsch_align",
    "rmsd",
    "mean_structure",
    "permutation_rmsd",
    "align_ensemble",
    "covalent_radii_for",
    "connectivity",
]

#: covalent radii in Angstrom [from memory: Dalton Trans. 2008, "Covalent radii revisited";
#: carbon sp3 value]; used for bond detection (common practice: bonded when
#: r < 1.25 (r_A + r_B)).
COVALENT_RADII: dict[str, float] = {
    "H": 0.31, "D": 0.31, "He": 0.28, "Li": 1.28, "Be": 0.96, "B": 0.84, "C": 0.76,
    "N": 0.71, "O": 0.66, "F": 0.57, "Ne": 0.58, "Na": 1.66, "Mg": 1.41, "Al": 1.21,
    "Si": 1.11, "P": 1.07, "S": 1.05, "Cl": 1.02, "Ar": 1.06, "K": 2.03, "Ca": 1.76,
    "Ti": 1.60, "Fe": 1.32, "Co": 1.26, "Ni": 1.24, "Cu": 1.32, "Zn": 1.22, "Ga": 1.22,
    "Ge": 1.20, "As": 1.19, "Se": 1.20, "Br": 1.20, "Kr": 1.16, "Ru": 1.46, "Rh": 1.42,
    "Pd": 1.39, "Ag": 1.45, "Sn": 1.39, "I": 1.39, "Xe": 1.40, "Pt": 1.36, "Au": 1.36,
    "Hg": 1.32,
}

WeightsLike = None | Literal["mass"] | npt.ArrayLike


@dataclass(frozen=True)
class AlignmentResult:
    """Result of :func:`kabsch_align`.

    Attributes
    ----------
    aligned : ndarray, shape (n_frames, n_atoms, 3)
        All atoms moved by the rigid motion fitted on the selected atoms (Angstrom).
    rmsd : ndarray, shape (n_frames,)
        Weighted RMSD over the fitted atoms after the fit (Angstrom).
    rotations : ndarray, shape (n_frames, 3, 3)
        R with ``aligned = geometries @ R.T + translations[:, None]``.
    translations : ndarray, shape (n_frames, 3)
    reference : ndarray, shape (n_atoms, 3)
        The reference the frames were fitted to (the converged mean structure when
        none was given).
    n_iter : int
        Iterations of the mean-structure refinement (0 with a given reference).
    """

    aligned: np.ndarray
    rmsd: np.ndarray
    rotations: np.ndarray
    translations: np.ndarray
    reference: np.ndarray
    n_iter: int = 0


# ---------------------------------------------------------------------- validation
def _as_frames(x: npt.ArrayLike, name: str, *, keep_float32: bool = False) -> np.ndarray:
    keep = keep_float32 and isinstance(x, np.ndarray) and x.dtype == np.float32
    arr = np.asarray(x, dtype=np.float32 if keep else np.float64)
    if arr.ndim == 2 and arr.shape[1] == 3:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[2] != 3 or arr.shape[1] < 1:
        raise SchemaError(
            f"{name} must have shape (n_frames, n_atoms, 3) or (n_atoms, 3); got {arr.shape}."
        )
    return arr


def resolve_weights(weights: WeightsLike, n_atoms: int, masses: npt.ArrayLike | None,
                     symbols: Sequence[str] | None) -> np.ndarray:
    if weights is None:
        return np.ones(n_atoms)
    if isinstance(weights, str):
        if weights != "mass":
            raise SchemaError(
                f"weights must be None, 'mass' or an array of n_atoms={n_atoms} values; got "
                f"{weights!r}."
            )
        if masses is None and symbols is None:
            raise SchemaError("weights='mass' needs masses= (amu) or symbols=.")
        w = masses_for(symbols or ()) if masses is None else np.asarray(masses, float)
    else:
        w = np.asarray(weights, dtype=np.float64)
    if w.shape != (n_atoms,) or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise SchemaError(
            f"weights must be {n_atoms} finite non-negative values with a positive sum; got "
            f"shape {w.shape}. Hint: pass one weight per atom."
        )
    return w


def resolve_atoms(atoms: npt.ArrayLike | None, n_atoms: int) -> np.ndarray:
    if atoms is None:
        return np.arange(n_atoms)
    idx = np.asarray(atoms)
    if idx.dtype == bool:
        if idx.shape != (n_atoms,):
            raise SchemaError(f"a boolean atoms mask must have shape ({n_atoms},); got "
                              f"{idx.shape}.")
        idx = np.flatnonzero(idx)
    idx = idx.astype(np.int64).ravel()
    if idx.size < 1 or idx.min() < -n_atoms or idx.max() >= n_atoms:
        raise SchemaError(
            f"atoms must be indices in [0, {n_atoms - 1}] (at least one); got {idx[:10].tolist()}."
        )
    return np.unique(idx % n_atoms)


def _check_reference(reference: npt.ArrayLike, n_atoms: int, n_frames: int) -> np.ndarray:
    ref = np.asarray(reference, dtype=np.float64)
    if ref.shape == (n_atoms, 3) or ref.shape == (n_frames, n_atoms, 3):
        return ref
    raise SchemaError(
        f"reference must have shape (n_atoms={n_atoms}, 3) or (n_frames={n_frames}, "
        f"n_atoms, 3); got {ref.shape}."
    )


# ---------------------------------------------------------------------- public API
def mean_structure(
    geometries: npt.ArrayLike,
    *,
    weights: WeightsLike = None,
    masses: npt.ArrayLike | None = None,
    symbols: Sequence[str] | None = None,
    atoms: npt.ArrayLike | None = None,
    max_iter: int = 50,
    tol: float = 1e-8,
    chunk_size: int = 65536,
) -> tuple[np.ndarray, int]:
    """Mean structure by iterative superposition (align all, average, repeat).

    Starts from the first frame; stops when the mean moves by less than `tol`
    (RMS, Angstrom). The result is centred on the weighted centroid of the
    fitted atoms.

    Parameters
    ----------
    geometries : array_like, shape (n_frames, n_atoms, 3)
        Coordinates in Angstrom.
    weights, masses, symbols, atoms
        As in :func:`kabsch_align`.
    max_iter : int
        Largest number of refinement iterations.
    tol : float
        Convergence threshold on the RMS change of the mean (Angstrom).
    chunk_size : int
        Frames processed at once.

    Returns
    -------
    reference : ndarray, shape (n_atoms, 3)
    n_iter : int

    Examples
    --------
    >>> import numpy as np
    >>> X = np.array([[[0.0, 0, 0], [1, 0, 0], [0, 1, 0]]] * 3)
    >>> ref, _ = mean_structure(X)
    >>> np.allclose(ref - ref.mean(0), X[0] - X[0].mean(0))
    True
    """
    X = _as_frames(geometries, "geometries")
    n, a, _ = X.shape
    w = resolve_weights(weights, a, masses, symbols)
    sel = resolve_atoms(atoms, a)
    ws = w[sel]
    ref = X[0] - _k.weighted_centre(X[0][sel], ws)
    it = 0
    for it in range(1, max_iter + 1):  # noqa: B007
        acc = np.zeros((a, 3))
        for s in range(0, n, chunk_size):
            Xc = X[s:s + chunk_size]
            _, _, R, t = _k.kabsch_rmsd(Xc[:, sel], ref[sel], ws)
            acc += (np.matmul(Xc, R.transpose(0, 2, 1)) + t[:, None, :]).sum(0)
        new = acc / n
        new -= _k.weighted_centre(new[sel], ws)
        change = float(np.sqrt(np.mean(np.sum((new - ref) ** 2, axis=1))))
        ref = new
        if change < tol:
            break
    return ref, it


def kabsch_align(
    geometries: npt.ArrayLike,
    reference: npt.ArrayLike | None = None,
    *,
    weights: WeightsLike = None,
    masses: npt.ArrayLike | None = None,
    symbols: Sequence[str] | None = None,
    atoms: npt.ArrayLike | None = None,
    allow_reflection: bool = False,
    max_iter: int = 50,
    tol: float = 1e-8,
    chunk_size: int = 65536,
) -> AlignmentResult:
    """Superimpose every frame onto a reference by the Kabsch method (batched SVD).

    Parameters
    ----------
    geometries : array_like, shape (n_frames, n_atoms, 3) or (n_atoms, 3)
        Mobile coordinates in Angstrom (not modified).
    reference : array_like, shape (n_atoms, 3) or (n_frames, n_atoms, 3), optional
        Target coordinates. Default: the mean structure found by iterative
        superposition (:func:`mean_structure`).
    weights : None, "mass" or array_like, shape (n_atoms,)
        Per-atom weights of the fit and the RMSD; "mass" uses `masses` (amu) or
        the standard masses of `symbols`.
    masses : array_like, shape (n_atoms,), optional
    symbols : sequence of str, optional
    atoms : array_like of int or bool, optional
        Atom subset used for the fit and the RMSD; every atom is moved.
    allow_reflection : bool
        Also allow improper rotations (mirror images superimpose; for enantiomers).
    max_iter, tol : int, float
        Mean-structure refinement controls (only without a reference).
    chunk_size : int
        Frames processed at once (memory bound).

    Returns
    -------
    AlignmentResult

    Examples
    --------
    >>> import numpy as np
    >>> P = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
    >>> c, s = np.cos(0.5), np.sin(0.5)
    >>> Q = P @ np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]]).T + 1.0
    >>> res = kabsch_align(P, Q)
    >>> bool(res.rmsd[0] < 1e-12)
    True
    """
    X = _as_frames(geometries, "geometries")
    n, a, _ = X.shape
    w = resolve_weights(weights, a, masses, symbols)
    sel = resolve_atoms(atoms, a)
    n_iter = 0
    if reference is None:
        ref, n_iter = mean_structure(X, weights=w, atoms=sel, max_iter=max_iter, tol=tol,
                                     chunk_size=chunk_size)
    else:
        ref = _check_reference(reference, a, n)
    ws = w[sel]
    aligned = np.empty_like(X)
    out_rmsd = np.empty(n)
    rots = np.empty((n, 3, 3))
    trans = np.empty((n, 3))
    for s in range(0, n, chunk_size):
        Xc = X[s:s + chunk_size]
        Rc = ref if ref.ndim == 2 else ref[s:s + chunk_size]
        r, _, R, t = _k.kabsch_rmsd(Xc[:, sel], Rc[..., sel, :], ws,
                                    allow_reflection=allow_reflection)
        aligned[s:s + chunk_size] = np.matmul(Xc, R.transpose(0, 2, 1)) + t[:, None, :]
        out_rmsd[s:s + chunk_size] = r
        rots[s:s + chunk_size] = R
        trans[s:s + chunk_size] = t
    return AlignmentResult(aligned=aligned, rmsd=out_rmsd, rotations=rots, translations=trans,
                           reference=ref if ref.ndim == 2 else ref.copy(), n_iter=n_iter)


def rmsd(
    geometries: npt.ArrayLike,
    reference: npt.ArrayLike | None = None,
    *,
    weights: WeightsLike = None,
    masses: npt.ArrayLike | None = None,
    symbols: Sequence[str] | None = None,
    atoms: npt.ArrayLike | None = None,
    method: Literal["qcp", "kabsch"] = "qcp",
    allow_reflection: bool = False,
    chunk_size: int = 65536,
    backend: Literal["auto", "numba", "numpy"] = "auto",
) -> np.ndarray:
    """RMSD of every frame to a reference after optimal rigid superposition.

    Parameters
    ----------
    geometries : array_like, shape (n_frames, n_atoms, 3) or (n_atoms, 3)
        Coordinates in Angstrom.
    reference : array_like, shape (n_atoms, 3) or (n_frames, n_atoms, 3), optional
        Default: the iterative mean structure.
    weights, masses, symbols, atoms, allow_reflection, chunk_size
        As in :func:`kabsch_align`.
    method : {"qcp", "kabsch"}
        "qcp" (default, fastest) finds the largest eigenvalue of the quaternion key
        matrix by Newton iteration; "kabsch" uses a batched SVD and rotates the
        coordinates, which is exact also for near-identical frames (QCP loses
        precision below ~1e-4 Angstrom).
    backend : {"auto", "numba", "numpy"}
        "auto" uses the compiled kernel (the ``fast`` extra: one pass over each frame,
        frame chunks shared by ``numba.get_num_threads()`` threads) when numba is
        installed, else the batched numpy kernels; both give the same numbers to
        ~1e-10 Angstrom. A C-contiguous float64 or float32 `geometries` array is read
        as stored by the compiled kernel (no copy; float32 halves the memory traffic);
        all sums are float64 either way, so float32 storage changes the RMSD only by
        the rounding of the stored coordinates (~1e-7 Angstrom at 50 Angstrom).

    Returns
    -------
    ndarray, shape (n_frames,)
        RMSD in Angstrom (weighted when `weights` is given).

    Examples
    --------
    >>> import numpy as np
    >>> P = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
    >>> Q = P.copy(); Q[0, 0] += 0.1
    >>> round(float(rmsd(Q, P)[0]), 7)
    0.0402486
    """
    if method not in ("qcp", "kabsch"):
        raise SchemaError(f"method must be 'qcp' or 'kabsch'; got {method!r}.")
    if backend not in ("auto", "numba", "numpy"):
        raise SchemaError(f"backend must be 'auto', 'numba' or 'numpy'; got {backend!r}.")
    X = _as_frames(geometries, "geometries", keep_float32=backend != "numpy")
    n, a, _ = X.shape
    w = resolve_weights(weights, a, masses, symbols)
    sel = resolve_atoms(atoms, a)
    if reference is None:
        ref, _ = mean_structure(X, weights=w, atoms=sel, chunk_size=chunk_size)
    else:
        ref = _check_reference(reference, a, n)
    ws = w[sel]
    if backend != "numpy":
        fast = compiled_rmsd(X, ref, ws, sel, method=method, allow_reflection=allow_reflection)
        if fast is not None:
            return fast
        if backend == "numba":
            raise MissingDependencyError(
                "backend='numba' needs numba; install with pip install 'ensemblelab[fast]'.")
        X = X.astype(np.float64, copy=False)
    out = np.empty(n)
    whole = sel.size == a
    for s in range(0, n, chunk_size):
        Xc = X[s:s + chunk_size] if whole else X[s:s + chunk_size][:, sel]
        Rc = ref if ref.ndim == 2 else ref[s:s + chunk_size]
        Rc = Rc if whole else Rc[..., sel, :]
        if method == "qcp":
            out[s:s + chunk_size] = _k.qcp_rmsd(Xc, Rc, ws, allow_reflection=allow_reflection)
        else:
            out[s:s + chunk_size] = _k.kabsch_rmsd(Xc, Rc, ws,
                                                   allow_reflection=allow_reflection)[0]
    return out


def permutation_rmsd(
    geometries: npt.ArrayLike,
    reference: npt.ArrayLike,
    *,
    symbols: Sequence[str],
    weights: WeightsLike = None,
    masses: npt.ArrayLike | None = None,
    max_iter: int = 20,
) -> tuple[np.ndarray, np.ndarray]:
    """Smallest RMSD over rigid motions and permutations of identical atoms.

    Alternates a Kabsch fit with a per-element optimal assignment
    (:func:`scipy.optimize.linear_sum_assignment` on squared distances) until the
    assignment no longer changes (common practice; a local search, started from the
    given order, from the centred frame, and from the four proper matchings of the
    principal axes; the best result is kept).

    Parameters
    ----------
    geometries : array_like, shape (n_frames, n_atoms, 3) or (n_atoms, 3)
    reference : array_like, shape (n_atoms, 3)
    symbols : sequence of str, length n_atoms
        Element symbols; atoms with equal symbols may be exchanged.
    weights, masses
        As in :func:`kabsch_align` (weights must be equal within each element).
    max_iter : int
        Largest number of fit/assign rounds.

    Returns
    -------
    rmsd : ndarray, shape (n_frames,)
    permutations : ndarray of int, shape (n_frames, n_atoms)
        ``geometries[f, permutations[f]]`` matches ``reference`` atom by atom.
    """
    from scipy.optimize import linear_sum_assignment

    X = _as_frames(geometries, "geometries")
    n, a, _ = X.shape
    ref = np.asarray(reference, dtype=np.float64)
    if ref.shape != (a, 3):
        raise SchemaError(f"reference must have shape (n_atoms={a}, 3); got {ref.shape}.")
    sym = [normalise_symbol(s) for s in symbols]
    if len(sym) != a:
        raise SchemaError(f"symbols must have n_atoms={a} entries; got {len(sym)}.")
    w = resolve_weights(weights, a, masses, sym)
    groups = [np.flatnonzero(np.array(sym) == e) for e in dict.fromkeys(sym)]
    for g in groups:
        if np.ptp(w[g]) > 0:
            raise SchemaError("weights must be equal for atoms of the same element.")
    refc = ref - _k.weighted_centre(ref, w)

    def assign(Y: np.ndarray) -> np.ndarray:
        perm = np.arange(a)
        for g in groups:
            if g.size == 1:
                continue
            cost = ((refc[g][:, None, :] - Y[g][None, :, :]) ** 2).sum(-1)
            _, cols = linear_sum_assignment(cost)
            perm[g] = g[cols]
        return perm

    def refine(P: np.ndarray, perm: np.ndarray) -> tuple[float, np.ndarray]:
        for _ in range(max_iter):
            r, al, _, _ = _k.kabsch_rmsd(P[perm][None], refc, w, return_aligned=True)
            assert al is not None
            new = perm[assign(al[0])]
            if np.array_equal(new, perm):
                break
            perm = new
        r = _k.kabsch_rmsd(P[perm][None], refc, w)[0]
        return float(r[0]), perm

    def axes(Y: np.ndarray) -> np.ndarray:
        _, vec = np.linalg.eigh((Y * w[:, None]).T @ Y)
        return vec

    v_ref = axes(refc)
    signs = [np.diag(d) for d in ((1, 1, 1), (1, -1, -1), (-1, 1, -1), (-1, -1, 1))]
    out = np.empty(n)
    perms = np.empty((n, a), dtype=np.int64)
    for f in range(n):
        P = X[f] - _k.weighted_centre(X[f], w)
        best = refine(P, np.arange(a))
        starts = [P]
        v_p = axes(P)
        for S in signs:  # principal-axis frames matched with the 4 proper sign choices
            R = v_ref @ S @ v_p.T
            if np.linalg.det(R) < 0:
                R = v_ref @ (S * np.array([1, 1, -1])) @ v_p.T
            starts.append(P @ R.T)
        for Y in starts:
            other = refine(P, assign(Y))
            if other[0] < best[0]:
                best = other
        out[f], perms[f] = best
    return out, perms


def align_ensemble(
    ens: Ensemble,
    *,
    reference: Literal["mean", "first"] | npt.ArrayLike = "mean",
    atoms: npt.ArrayLike | None = None,
    mass_weighted: bool = True,
    max_fit_frames: int = 20000,
    random_state: int = 0,
) -> Ensemble:
    """Return a new Ensemble with every geometry superimposed on a common reference.

    Velocities (if any) are rotated with their geometries.

    Parameters
    ----------
    ens : Ensemble
    reference : "mean", "first" or array_like, shape (n_atoms, 3)
        "mean": iterative mean structure of (a random subset of at most
        `max_fit_frames`) snapshots; "first": the first snapshot.
    atoms : array_like, optional
        Atom subset used for the fit.
    mass_weighted : bool
        Weight the fit by atomic masses.
    max_fit_frames : int
        Snapshots used to build the mean structure.
    random_state : int
        Seed of that subset.

    Returns
    -------
    Ensemble
        A new Ensemble; geometries (and velocities) aligned.
    """
    X = ens.geometries
    w = ens.masses if mass_weighted else None
    if isinstance(reference, str):
        if reference == "first":
            ref = X[0]
        elif reference == "mean":
            rng = np.random.default_rng(random_state)
            rows = np.arange(len(X))
            if len(rows) > max_fit_frames:
                rows = np.sort(rng.choice(rows, size=max_fit_frames, replace=False))
            ref, _ = mean_structure(X[rows], weights=w, atoms=atoms)
        else:
            raise SchemaError(f"reference must be 'mean', 'first' or an array; got {reference!r}.")
    else:
        ref = reference
    res = kabsch_align(X, ref, weights=w, atoms=atoms)
    changes: dict[str, np.ndarray] = {"geometries": res.aligned}
    if ens.velocities is not None:
        changes["velocities"] = np.matmul(ens.velocities, res.rotations.transpose(0, 2, 1))
    return ens.replace(**changes)


def covalent_radii_for(symbols: Sequence[str]) -> np.ndarray:
    """Covalent radii (Angstrom) for `symbols`, shape (n_atoms,).

    Raises
    ------
    SchemaError
        For an element without a tabulated radius.
    """
    out = []
    for i, s in enumerate(symbols):
        key = normalise_symbol(s)
        if key not in COVALENT_RADII:
            raise SchemaError(
                f"no covalent radius for element {s!r} (atom {i}); known: "
                f"{sorted(COVALENT_RADII)}."
            )
        out.append(COVALENT_RADII[key])
    return np.asarray(out)


def connectivity(
    geometries: npt.ArrayLike, symbols: Sequence[str], *, scale: float = 1.25
) -> np.ndarray:
    """Bonded atom pairs by covalent radii: r_ij < scale (r_i + r_j) (common practice).

    Parameters
    ----------
    geometries : array_like, shape (n_frames, n_atoms, 3) or (n_atoms, 3)
    symbols : sequence of str
    scale : float
        Tolerance factor on the sum of covalent radii.

    Returns
    -------
    ndarray of bool, shape (n_frames, n_pairs)
        For the pairs ``numpy.triu_indices(n_atoms, 1)``.
    """
    X = _as_frames(geometries, "geometries")
    rad = covalent_radii_for(symbols)
    i, j = _k.pair_indices(X.shape[1])
    return _k.pair_distances(X, i, j) < scale * (rad[i] + rad[j])
