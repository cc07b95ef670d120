"""Array-level geometry kernels (private): batched Kabsch and QCP, descriptors, connectivity.

Every function assumes valid input (shapes checked by the public wrappers in
:mod:`ensemblelab.compute.structures.geometry` and
:mod:`ensemblelab.compute.structures.descriptors`).
Naive per-frame twins live in :mod:`ensemblelab.compute.structures._reference_geometry`.

Conventions: ``P`` is the mobile set, ``Q`` the reference, both (n_frames, n_atoms, 3)
(``Q`` may also be (n_atoms, 3)); ``w`` are per-atom weights (n_atoms,). The rotation
``R`` acts on column vectors, ``p' = R p``; in row form ``P_c @ R.T``.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "PAIR_BLOCK_ELEMENTS",
    "weighted_centre",
    "covariance",
    "kabsch_rotations",
    "kabsch_rmsd",
    "qcp_rmsd",
    "pair_indices",
    "pair_distances",
    "inverse_distances",
    "coulomb_eigenvalues",
    "bond_lengths",
    "bond_angles",
    "dihedral_cos_sin",
    "pyramidalisation",
]


def weighted_centre(X: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Weighted centroid of every frame, shape (..., 3)."""
    return np.tensordot(X, w / w.sum(), axes=([-2], [0]))


def covariance(Pc: np.ndarray, Qc: np.ndarray, w: np.ndarray) -> np.ndarray:
    """H[n, i, j] = sum_a w_a Pc[n, a, i] Qc[n, a, j] for centred sets, shape (n, 3, 3)."""
    Pw = Pc * w[:, None]
    if Qc.ndim == 2:
        # (n, a, 3)^T (a, 3): one matmul for the whole batch
        return np.einsum("nai,aj->nij", Pw, Qc, optimize=True)
    return np.matmul(Pw.transpose(0, 2, 1), Qc)


def kabsch_rotations(
    Pc: np.ndarray, Qc: np.ndarray, w: np.ndarray, *, allow_reflection: bool = False
) -> np.ndarray:
    """Optimal rotations R (n, 3, 3) taking centred `Pc` onto centred `Qc` (batched SVD).

    H = Pc^T W Qc = U S V^T, d = sign det(V U^T), R = V diag(1, 1, d) U^T.
    """
    H = covariance(Pc, Qc, w)
    U, _, Vt = np.linalg.svd(H)
    V = Vt.transpose(0, 2, 1)
    Ut = U.transpose(0, 2, 1)
    if allow_reflection:
        return V @ Ut
    d = np.sign(np.linalg.det(V @ Ut))
    d[d == 0] = 1.0
    V = V.copy()
    V[:, :, 2] *= d[:, None]
    return V @ Ut


def kabsch_rmsd(
    P: np.ndarray,
    Q: np.ndarray,
    w: np.ndarray,
    *,
    allow_reflection: bool = False,
    return_aligned: bool = False,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray, np.ndarray]:
    """Batched Kabsch fit of `P` onto `Q`.

    Returns
    -------
    rmsd : (n,) weighted RMSD after the fit (computed from the rotated coordinates,
        so it is exact near zero).
    aligned : (n, n_atoms, 3) or None
        ``R (p - c_P) + c_Q`` when `return_aligned`.
    R : (n, 3, 3)
    t : (n, 3) translation so that ``aligned = P @ R^T + t``.
    """
    cP = weighted_centre(P, w)
    cQ = weighted_centre(Q, w)
    Pc = P - cP[..., None, :]
    Qc = Q - cQ[..., None, :]
    R = kabsch_rotations(Pc, Qc, w, allow_reflection=allow_reflection)
    rot = np.matmul(Pc, R.transpose(0, 2, 1))
    diff = rot - Qc
    rmsd = np.sqrt(np.einsum("nai,a->n", diff * diff, w) / w.sum())
    cQb = np.broadcast_to(cQ, (P.shape[0], 3))
    t = cQb - np.einsum("nij,nj->ni", R, cP)
    aligned = rot + cQb[:, None, :] if return_aligned else None
    return rmsd, aligned, R, t


def _det3(H: np.ndarray) -> np.ndarray:
    return (
        H[:, 0, 0] * (H[:, 1, 1] * H[:, 2, 2] - H[:, 1, 2] * H[:, 2, 1])
        - H[:, 0, 1] * (H[:, 1, 0] * H[:, 2, 2] - H[:, 1, 2] * H[:, 2, 0])
        + H[:, 0, 2] * (H[:, 1, 0] * H[:, 2, 1] - H[:, 1, 1] * H[:, 2, 0])
    )


def _qcp_lambda_max(H: np.ndarray, e0: np.ndarray, *, max_iter: int = 50,
                    tol: float = 1e-15) -> np.ndarray:
    """Largest eigenvalue of the 4x4 key matrix of H by Newton iteration on its quartic.

    P(l) = l^4 + c2 l^2 + c1 l + c0 with c2 = -2 tr(H^T H), c1 = -8 det H, c0 = det K.
    Starts from the upper bound e0 = (G_P + G_Q) / 2 (Acta Cryst. A61, 478 (2005)).
    """
    Sxx, Sxy, Sxz = H[:, 0, 0], H[:, 0, 1], H[:, 0, 2]
    Syx, Syy, Syz = H[:, 1, 0], H[:, 1, 1], H[:, 1, 2]
    Szx, Szy, Szz = H[:, 2, 0], H[:, 2, 1], H[:, 2, 2]
    # key matrix K (symmetric 4x4)
    k00 = Sxx + Syy + Szz
    k01 = Syz - Szy
    k02 = Szx - Sxz
    k03 = Sxy - Syx
    k11 = Sxx - Syy - Szz
    k12 = Sxy + Syx
    k13 = Szx + Sxz
    k22 = -Sxx + Syy - Szz
    k23 = Syz + Szy
    k33 = -Sxx - Syy + Szz
    # det K by Laplace expansion over the 2x2 minors of rows (0, 1) and (2, 3)
    s0 = k00 * k11 - k01 * k01
    s1 = k00 * k12 - k01 * k02
    s2 = k00 * k13 - k01 * k03
    s3 = k01 * k12 - k11 * k02
    s4 = k01 * k13 - k11 * k03
    s5 = k02 * k13 - k12 * k03
    c5 = k22 * k33 - k23 * k23
    c4 = k12 * k33 - k13 * k23
    c3 = k12 * k23 - k13 * k22
    c2_ = k02 * k33 - k03 * k23
    c1_ = k02 * k23 - k03 * k22
    c0_ = k02 * k13 - k03 * k12
    c0 = s0 * c5 - s1 * c4 + s2 * c3 + s3 * c2_ - s4 * c1_ + s5 * c0_
    c2 = -2.0 * np.einsum("nij,nij->n", H, H)
    c1 = -8.0 * _det3(H)
    lam = e0.copy()
    for _ in range(max_iter):
        l2 = lam * lam
        b = (l2 + c2) * lam
        a = b + c1
        f = a * lam + c0                 # P(l)
        fp = 2.0 * l2 * lam + b + a      # P'(l) = 4 l^3 + 2 c2 l + c1
        fp[fp == 0] = 1.0
        step = f / fp
        lam -= step
        if np.all(np.abs(step) <= tol * np.maximum(np.abs(lam), 1.0)):
            break
    return lam


def qcp_rmsd(
    P: np.ndarray, Q: np.ndarray, w: np.ndarray, *, allow_reflection: bool = False
) -> np.ndarray:
    """Batched RMSD after optimal superposition by the quaternion characteristic polynomial.

    RMSD^2 = (G_P + G_Q - 2 lambda_max) / sum(w). Agrees with :func:`kabsch_rmsd` to
    ~1e-12 Angstrom for RMSDs above ~1e-3 Angstrom; below that the subtraction limits
    the precision to about sqrt(eps * G) (use Kabsch for near-identical frames).
    """
    n, n_atoms, _ = P.shape
    wsum = w.sum()
    if Q.ndim == 2:
        # one reference: H = P^T W Qc needs no centring of P because sum_a w_a Qc_a = 0,
        # so the whole batch is one dense GEMM (n, 3 n_atoms) @ (3 n_atoms, 9)
        Qc = Q - weighted_centre(Q, w)
        Qw = Qc * w[:, None]
        M = np.zeros((n_atoms, 3, 3, 3))
        for i in range(3):
            M[:, i, i, :] = Qw
        flat = P.reshape(n, 3 * n_atoms)
        H = (flat @ M.reshape(3 * n_atoms, 9)).reshape(n, 3, 3)
        w3 = np.repeat(w, 3)
        cP = (flat @ (np.eye(3)[None, :, :] * (w / wsum)[:, None, None]).reshape(
            3 * n_atoms, 3))
        GP = (flat * flat) @ w3 - wsum * np.einsum("ni,ni->n", cP, cP)
        GQ = np.full(n, float(np.einsum("ai,a->", Qc * Qc, w)))
    else:
        cP = weighted_centre(P, w)
        cQ = weighted_centre(Q, w)
        Pc = P - cP[..., None, :]
        Qc = Q - cQ[..., None, :]
        H = covariance(Pc, Qc, w)
        GP = np.einsum("nai,a->n", Pc * Pc, w)
        GQ = np.einsum("nai,a->n", Qc * Qc, w)
    e0 = 0.5 * (GP + GQ)
    lam = _qcp_lambda_max(H, e0)
    if allow_reflection:
        Hm = H.copy()
        Hm[:, 0, :] *= -1.0  # mirror x of P
        lam = np.maximum(lam, _qcp_lambda_max(Hm, e0))
    msd = (GP + GQ - 2.0 * lam) / wsum
    return np.sqrt(np.maximum(msd, 0.0))


# ---------------------------------------------------------------------- descriptors
#: row x atom-pair elements per block of :func:`pair_distances` (about 2 MB per temporary)
PAIR_BLOCK_ELEMENTS = 1 << 18


def pair_indices(n_atoms: int) -> tuple[np.ndarray, np.ndarray]:
    """Upper-triangle atom pairs (i < j) in row-major order."""
    return np.triu_indices(n_atoms, k=1)


def pair_distances(X: np.ndarray, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """|X[:, i] - X[:, j]| for index arrays i, j, shape (n, n_pairs).

    One coordinate at a time from a (3, rows, n_atoms) copy: every gather and sum runs
    over contiguous rows (2-3x faster than gathering (n, n_pairs, 3) and reducing the
    last axis of length 3); no (n, n_pairs, 3) temporary. Rows go in blocks of about
    ``PAIR_BLOCK_ELEMENTS`` row x pair elements, so the temporaries stay a few MB
    whatever n (each row is computed alone: the blocks do not change the result).
    """
    n = X.shape[0]
    d2 = np.zeros((n, len(i)))
    step = max(1, PAIR_BLOCK_ELEMENTS // max(1, len(i)))
    for s in range(0, n, step):
        Xt = np.ascontiguousarray(np.moveaxis(X[s:s + step], -1, 0))
        out = d2[s:s + step]
        for c in range(3):
            diff = Xt[c][:, i]  # a gathered copy: subtract in place (one temporary fewer)
            diff -= Xt[c][:, j]
            diff *= diff
            out += diff
    return np.sqrt(d2, out=d2)


def inverse_distances(X: np.ndarray, *, min_distance: float = 1e-8) -> np.ndarray:
    """1 / r_ij for all pairs i < j, shape (n, n_atoms (n_atoms - 1) / 2)."""
    i, j = pair_indices(X.shape[1])
    r = pair_distances(X, i, j)  # a fresh array: clip and invert it in place
    np.maximum(r, min_distance, out=r)
    return np.divide(1.0, r, out=r)


def coulomb_eigenvalues(
    X: np.ndarray, Z: np.ndarray, *, length_factor: float = 1.0, min_distance: float = 1e-8
) -> np.ndarray:
    """Eigenvalues of the Coulomb matrix, sorted in descending order, shape (n, n_atoms).

    C_ii = 0.5 Z_i^2.4, C_ij = Z_i Z_j / (length_factor * r_ij); `length_factor`
    converts the input length unit to the matrix's (1 / bohr-in-Angstrom for bohr).
    """
    n, a, _ = X.shape
    diff = X[:, :, None, :] - X[:, None, :, :]
    r = np.sqrt(np.einsum("nijk,nijk->nij", diff, diff)) * length_factor
    np.maximum(r, min_distance, out=r)
    Zf = Z.astype(np.float64)
    C = np.outer(Zf, Zf)[None, :, :] / r
    diag = np.arange(a)
    C[:, diag, diag] = 0.5 * Zf**2.4
    return np.linalg.eigvalsh(C)[:, ::-1]


def bond_lengths(X: np.ndarray, pairs: np.ndarray) -> np.ndarray:
    """Distances for atom pairs (n_pairs, 2), shape (n, n_pairs)."""
    return pair_distances(X, pairs[:, 0], pairs[:, 1])


def bond_angles(X: np.ndarray, triples: np.ndarray) -> np.ndarray:
    """Angles i-j-k (radians, vertex j) for (n_triples, 3), shape (n, n_triples)."""
    a = X[:, triples[:, 0]] - X[:, triples[:, 1]]
    b = X[:, triples[:, 2]] - X[:, triples[:, 1]]
    cross = np.linalg.norm(np.cross(a, b), axis=-1)
    dot = np.einsum("npk,npk->np", a, b)
    return np.arctan2(cross, dot)


def dihedral_cos_sin(X: np.ndarray, quads: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin of the dihedral i-j-k-l (IUPAC sign), each (n, n_quads)."""
    b1 = X[:, quads[:, 1]] - X[:, quads[:, 0]]
    b2 = X[:, quads[:, 2]] - X[:, quads[:, 1]]
    b3 = X[:, quads[:, 3]] - X[:, quads[:, 2]]
    n1 = np.cross(b1, b2)
    n2 = np.cross(b2, b3)
    y = np.linalg.norm(b2, axis=-1) * np.einsum("npk,npk->np", b1, n2)
    x = np.einsum("npk,npk->np", n1, n2)
    phi = np.arctan2(y, x)
    return np.cos(phi), np.sin(phi)


def pyramidalisation(X: np.ndarray, quads: np.ndarray) -> np.ndarray:
    """Signed height (Angstrom) of atom c above the plane of its neighbours a, b, d.

    For rows (c, a, b, d): h = (X_c - X_a) . n, n = unit((X_b - X_a) x (X_d - X_a)).
    Zero for a planar centre; the sign follows the neighbour order.
    """
    c = X[:, quads[:, 0]]
    a = X[:, quads[:, 1]]
    b = X[:, quads[:, 2]]
    d = X[:, quads[:, 3]]
    n = np.cross(b - a, d - a)
    n /= np.maximum(np.linalg.norm(n, axis=-1, keepdims=True), 1e-300)
    return np.einsum("npk,npk->np", c - a, n)
