"""Adiabatic-to-diabatic (ADT) matrices from overlaps or dipole matrices.

Convention (as ``Ensemble.adt``): ``A[i, alpha] = <phi_i | chi_alpha>``, rows adiabatic,
columns diabatic, so that ``phi_i = sum_alpha A[i, alpha] chi_alpha`` and the diabatic
character of adiabatic state i on diabat alpha is ``A[i, alpha]**2``.

* :func:`loewdin` -- the orthogonal polar factor of an overlap matrix
  ``S[i, alpha] = <phi_i(q) | phi_alpha(q_ref)>`` (symmetric orthonormalisation,
  ``A = S (S^T S)^(-1/2) = W Z^T`` from the SVD ``S = W Sigma Z^T``), warning when the
  smallest singular value says the reference states left the computed subspace.
* :func:`propagate_adt` -- local diabatisation along a trajectory from step-to-step
  overlaps ``O[i, j] = <phi_i(t) | phi_j(t + dt)>``: ``A(t + dt) = T^T A(t)`` with
  ``T = loewdin(O)``; sign flips and state swaps are absorbed by T.
* :func:`boys_rotation` -- Boys localisation (maximise ``sum_alpha |mu_alpha,alpha|^2``)
  by Jacobi sweeps; for two states it reduces to
  ``4 theta = atan2(2 a.b, a.a - b.b)`` (a = mu11 - mu22, b = 2 mu12), the generalised
  Mulliken-Hush angle when mu12 is parallel to mu11 - mu22 (:func:`gmh_two_state`).
* :func:`ensemble_adt` -- ADT matrices for every snapshot of an Ensemble from its
  ``overlaps`` (step or reference kind) or from dipole matrices (Boys, with the state
  order kept along each trajectory), ready for ``ens.replace(adt=...)``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import cast

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...errors import NumericalWarning, SchemaError

__all__ = [
    "loewdin",
    "propagate_adt",
    "boys_rotation",
    "boys_objective",
    "gmh_two_state",
    "GMHResult",
    "diabatic_hamiltonian",
    "ensemble_adt",
    "SMALL_SINGULAR_VALUE",
]

#: below this smallest singular value of S the reference states are flagged (common practice)
SMALL_SINGULAR_VALUE = 0.5


def _square(a: npt.ArrayLike, name: str) -> np.ndarray:
    arr = np.asarray(a, dtype=float)
    if arr.ndim < 2 or arr.shape[-1] != arr.shape[-2]:
        raise SchemaError(f"{name} must be square matrices (..., n, n); got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise SchemaError(f"{name} must be finite.")
    return arr


def loewdin(overlap: npt.ArrayLike, *, warn_below: float = SMALL_SINGULAR_VALUE,
            return_singular: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Orthogonal polar factor of overlap matrices (Loewdin orthonormalisation).

    Parameters
    ----------
    overlap : array_like, shape (..., n, n)
        ``S[i, alpha] = <phi_i | chi_alpha>``.
    warn_below : float
        Emit a :class:`~ensemblelab.errors.NumericalWarning` when the smallest
        singular value of any matrix is below this (reference states outside the
        subspace; the ADT is then unreliable).
    return_singular : bool
        Also return the smallest singular value of each matrix.

    Returns
    -------
    ndarray, shape (..., n, n)
        ``A = W Z^T`` (closest orthogonal matrix to S in the Frobenius norm), and
        optionally the singular values ``(...,)``.

    Examples
    --------
    >>> import numpy as np
    >>> np.round(loewdin([[0.9, 0.3], [-0.2, 0.95]]), 6)
    array([[ 0.965363,  0.260909],
           [-0.260909,  0.965363]])
    """
    s = _square(overlap, "overlap")
    w, sv, zt = np.linalg.svd(s)
    a = w @ zt
    smin = sv[..., -1]
    if np.any(smin < warn_below):
        worst = float(np.min(smin))
        n_bad = int(np.sum(smin < warn_below))
        warnings.warn(
            f"smallest singular value of the overlap matrix is {worst:.3g} (< {warn_below}) "
            f"in {n_bad} matri{'x' if n_bad == 1 else 'ces'}: the reference states are not "
            "well represented by the computed adiabatic states; the diabatisation is "
            "unreliable there. Hint: include more states or re-anchor the reference.",
            NumericalWarning, stacklevel=2)
    return (a, smin) if return_singular else a


def propagate_adt(step_overlaps: npt.ArrayLike, *, a0: npt.ArrayLike | None = None,
                  warn_below: float = SMALL_SINGULAR_VALUE) -> np.ndarray:
    """Local diabatisation along one trajectory.

    Parameters
    ----------
    step_overlaps : array_like, shape (n_steps, n, n)
        ``O[t, i, j] = <phi_i(t-1) | phi_j(t)>``; row 0 is ignored (the start).
    a0 : array_like, shape (n, n), optional
        ADT at the first step (default identity: diabatic = adiabatic at t = 0).
    warn_below : float
        See :func:`loewdin`.

    Returns
    -------
    ndarray, shape (n_steps, n, n)
        ``A(t) = T(t)^T A(t - 1)`` with ``T(t) = loewdin(O[t])``.
    """
    o = _square(step_overlaps, "step_overlaps")
    if o.ndim != 3:
        raise SchemaError(f"step_overlaps must have shape (n_steps, n, n); got {o.shape}.")
    n_steps, n, _ = o.shape
    t = loewdin(o[1:], warn_below=warn_below) if n_steps > 1 else np.zeros((0, n, n))
    out = np.empty_like(o)
    out[0] = np.eye(n) if a0 is None else np.asarray(a0, dtype=float)
    for k in range(1, n_steps):
        out[k] = t[k - 1].T @ out[k - 1]
    return out


def boys_objective(mu: npt.ArrayLike, rotation: npt.ArrayLike | None = None) -> float:
    """``sum_alpha |mu'_alpha,alpha|^2`` for ``mu' = R^T mu R`` (componentwise)."""
    m = np.asarray(mu, dtype=float)
    if rotation is not None:
        r = np.asarray(rotation, dtype=float)
        m = np.einsum("ia,ijx,jb->abx", r, m, r)
    d = np.einsum("aax->ax", m)
    return float(np.sum(d * d))


def boys_rotation(mu: npt.ArrayLike, *, tol: float = 1e-12, max_sweeps: int = 200
                  ) -> tuple[np.ndarray, list[float]]:
    """Boys localisation of states from their dipole matrix, by Jacobi sweeps.

    Parameters
    ----------
    mu : array_like, shape (n, n, 3)
        Symmetric dipole matrix (state dipoles on the diagonal, transition dipoles
        off it), in any consistent unit.
    tol : float
        Stop when a sweep raises the objective by less than this.
    max_sweeps : int
        Upper bound on sweeps.

    Returns
    -------
    rotation : ndarray, shape (n, n)
        ``R[i, alpha]``: diabat ``alpha = sum_i R[i, alpha] phi_i``; this is the ADT
        matrix ``A`` of the module convention.
    history : list of float
        Objective after each sweep (never decreasing; first entry = start).

    Notes
    -----
    Pair rotation (Jacobi sweeps of Boys localisation; J. Chem. Phys. 129, 244101 (2008),
    "Constructing diabatic states from adiabatic states: extending generalized Mulliken-Hush
    to multiple charge centers with Boys localization"): ``d = mu_ii - mu_jj``,
    ``A_ij = |mu_ij|^2 - |d|^2/4``, ``B_ij = mu_ij . d``, ``gamma = atan2(B, -A) / 4``,
    ``phi_i' = cos gamma phi_i + sin gamma phi_j``,
    ``phi_j' = -sin gamma phi_i + cos gamma phi_j``.
    """
    m = np.array(mu, dtype=float)
    if m.ndim != 3 or m.shape[0] != m.shape[1]:
        raise SchemaError(f"mu must have shape (n, n, 3); got {m.shape}.")
    if not np.allclose(m, m.transpose(1, 0, 2), atol=1e-10 * max(1.0, np.abs(m).max())):
        raise SchemaError("mu must be symmetric in its two state indices.")
    n = m.shape[0]
    r = np.eye(n)
    history = [boys_objective(m)]
    for _ in range(max_sweeps):
        for i in range(n - 1):
            for j in range(i + 1, n):
                d = m[i, i] - m[j, j]
                a_ij = float(m[i, j] @ m[i, j] - 0.25 * (d @ d))
                b_ij = float(m[i, j] @ d)
                if abs(b_ij) < 1e-300 and a_ij <= 0:
                    continue
                g = 0.25 * math.atan2(b_ij, -a_ij)
                c, s = math.cos(g), math.sin(g)
                rot = np.eye(n)
                rot[i, i], rot[j, i], rot[i, j], rot[j, j] = c, s, -s, c
                m = np.einsum("ia,ijx,jb->abx", rot, m, rot)
                r = r @ rot
        history.append(boys_objective(m))
        if history[-1] - history[-2] < tol:
            break
    return r, history


@dataclass(frozen=True)
class GMHResult:
    """Two-state generalised Mulliken-Hush result.

    Attributes
    ----------
    theta : float
        Mixing angle in radians (``tan 2 theta = 2 mu12 / d_mu``).
    coupling : float
        ``|H_ab| = |mu12| dE / sqrt(d_mu^2 + 4 mu12^2)`` (energy unit of dE).
    dipole_difference : float
        ``d_mu_ab = sqrt(d_mu^2 + 4 mu12^2)``.
    hamiltonian : ndarray, shape (2, 2)
        Diabatic Hamiltonian ``R^T diag(E1, E2) R``.
    rotation : ndarray, shape (2, 2)
        ADT matrix (rows adiabatic, columns diabatic).
    """

    theta: float
    coupling: float
    dipole_difference: float
    hamiltonian: np.ndarray
    rotation: np.ndarray


def gmh_two_state(*, e1: float, e2: float, dmu: float, mu12: float) -> GMHResult:
    """Generalised Mulliken-Hush for two states (collinear / projected dipoles).

    Parameters
    ----------
    e1, e2 : float
        Adiabatic energies.
    dmu : float
        ``mu11 - mu22`` projected on the charge-transfer direction.
    mu12 : float
        Transition dipole projected on the same direction.

    Returns
    -------
    GMHResult

    Examples
    --------
    >>> r = gmh_two_state(e1=0.5, e2=0.0, dmu=2.0, mu12=1.0)
    >>> round(math.degrees(r.theta), 6), round(r.coupling, 7)
    (22.5, 0.1767767)
    """
    de = abs(e1 - e2)
    root = math.hypot(dmu, 2.0 * mu12)
    theta = 0.5 * math.atan2(2.0 * mu12, dmu)
    c, s = math.cos(theta), math.sin(theta)
    rot = np.array([[c, -s], [s, c]])
    ham = rot.T @ np.diag([e1, e2]) @ rot
    return GMHResult(theta=theta, coupling=abs(mu12) * de / root if root else 0.0,
                     dipole_difference=root, hamiltonian=ham, rotation=rot)


def diabatic_hamiltonian(energies: npt.ArrayLike, adt: npt.ArrayLike) -> np.ndarray:
    """``H^d = A^T diag(E) A`` for shapes (..., n) and (..., n, n)."""
    e = np.asarray(energies, dtype=float)
    a = np.asarray(adt, dtype=float)
    return np.einsum("...ia,...i,...ib->...ab", a, e, a)


def ensemble_adt(ens: Ensemble, *, kind: str = "step",
                 warn_below: float = SMALL_SINGULAR_VALUE,
                 dipoles: npt.ArrayLike | None = None, progress: bool = True) -> np.ndarray:
    """ADT matrices for every snapshot of `ens`, from ``ens.overlaps`` or dipole matrices.

    Parameters
    ----------
    ens : Ensemble
        With ``overlaps`` (n_snapshots, n_states, n_states) for the overlap kinds.
    kind : {"step", "reference", "boys"}
        ``"step"``: overlaps with the previous step of the same trajectory (row 0 of
        each trajectory ignored; local diabatisation from the identity).
        ``"reference"``: overlaps with fixed reference-geometry states (Loewdin per
        snapshot).
        ``"boys"``: Boys localisation of `dipoles` per snapshot. The order of the
        Boys states (free in each snapshot) is kept along each trajectory: at its
        first snapshot each diabat takes the place of the adiabatic state it resembles
        most, later the place of the previous snapshot's diabat with the nearest state
        dipole (a linear assignment; diabatic dipoles vary smoothly, adiabatic states
        need not). Signs are a convention (each column's largest element positive):
        dipoles alone cannot fix them, and the diabatic characters ``A**2`` that
        ``compute_trpes(decompose="diabatic")`` uses do not depend on them.
    warn_below : float
        See :func:`loewdin`.
    dipoles : array_like, shape (n_snapshots, n_states, n_states, 3), optional
        Adiabatic dipole matrices (state dipoles on the diagonal, transition dipoles
        off it; any consistent unit) for ``kind="boys"``.
    progress : bool
        Progress bar for ``kind="boys"`` (one Jacobi localisation per snapshot).

    Returns
    -------
    ndarray, shape (n_snapshots, n_states, n_states)
        Use as ``ens.replace(adt=...)``.
    """
    if kind == "boys":
        return _ensemble_boys(ens, dipoles, progress=progress)
    if ens.overlaps is None:
        raise SchemaError("ens has no overlaps; the ADT cannot be built from overlaps. Hint: "
                          "use ensemble_adt(ens, kind='boys', dipoles=...) with dipole "
                          "matrices instead.")
    o = ens.overlaps
    if kind == "reference":
        return cast(np.ndarray, loewdin(o, warn_below=warn_below))
    if kind != "step":
        raise SchemaError(f"The 'kind' parameter must be 'step', 'reference' or 'boys'. Got "
                          f"{kind!r}.")
    first = _first_rows(ens)
    t = np.empty_like(o)
    if np.any(~first):  # a trajectory's first row has no previous step: not used
        t[~first] = loewdin(o[~first], warn_below=warn_below)
    out = np.empty_like(o)
    n = o.shape[1]
    for k in range(o.shape[0]):
        if first[k]:
            out[k] = np.eye(n)
        else:
            out[k] = t[k].T @ out[k - 1]
    return out


def _first_rows(ens: Ensemble) -> np.ndarray:
    """(n_snapshots,) bool: the snapshot starts its trajectory."""
    traj = ens.snapshots["traj"].to_numpy()
    first = np.ones(traj.size, dtype=bool)
    first[1:] = traj[1:] != traj[:-1]
    return first


def _boys_order(prev_dip: np.ndarray | None, r: np.ndarray, mu: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray]:
    """Columns of the Boys rotation `r` of dipole matrix `mu`, ordered to follow
    `prev_dip` (the previous snapshot's diabatic state dipoles, shape (n, 3)) by a
    linear assignment on their distances, or, without one, each diabat on the
    adiabatic state it resembles most; then signed so that each column's largest
    element is positive. Returns the ordered rotation and its state dipoles (n, 3)."""
    from scipy.optimize import linear_sum_assignment

    dip = np.einsum("ib,ijx,jb->bx", r, mu, r)  # sign-independent
    if prev_dip is None:
        cost = -np.abs(r)  # cost[i, beta]: diabat beta on adiabatic state i
    else:
        cost = ((prev_dip[:, None, :] - dip[None, :, :]) ** 2).sum(axis=2)
    rows, cols = linear_sum_assignment(cost)
    pick = cols[np.argsort(rows)]
    out = r[:, pick]
    big = out[np.argmax(np.abs(out), axis=0), np.arange(out.shape[1])]
    return out * np.where(big < 0, -1.0, 1.0), dip[pick]


def _ensemble_boys(ens: Ensemble, dipoles: npt.ArrayLike | None, *,
                   progress: bool) -> np.ndarray:
    from tqdm.auto import tqdm

    if dipoles is None:
        raise SchemaError("kind='boys' needs dipoles, shape (n_snapshots, n_states, n_states, "
                          "3). Hint: pass the adiabatic dipole matrices of every snapshot.")
    mu = np.asarray(dipoles, dtype=float)
    n, ns = ens.n_snapshots, ens.n_states
    if mu.shape != (n, ns, ns, 3):
        raise SchemaError(f"dipoles must have shape (n_snapshots, n_states, n_states, 3) = "
                          f"{(n, ns, ns, 3)}; got {mu.shape}.")
    if not np.all(np.isfinite(mu)):
        bad = int(np.flatnonzero(~np.isfinite(mu).reshape(n, -1).all(axis=1))[0])
        raise SchemaError(f"dipoles of snapshot {bad} are not finite. Hint: fix or drop that "
                          "snapshot first.")
    first = _first_rows(ens)
    out = np.empty((n, ns, ns))
    prev = None
    for k in tqdm(range(n), desc="Boys localisation", disable=not progress or n < 2000):
        try:
            r, _ = boys_rotation(mu[k])
        except SchemaError as exc:
            raise SchemaError(f"dipoles of snapshot {k}: {exc}") from exc
        out[k], prev = _boys_order(None if first[k] else prev, r, mu[k])
    return out
