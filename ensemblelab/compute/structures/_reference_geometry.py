"""Naive reference twins of :mod:`ensemblelab.compute.structures._kernels_geometry` (private).

Straightforward per-frame / per-pair Python loops with ``np.linalg.svd`` and
``math``; slow on purpose and used only by tests and benchmarks to check the
vectorised kernels.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "kabsch_rmsd_loop",
    "inverse_distances_loop",
    "coulomb_eigenvalues_loop",
    "bond_angles_loop",
    "dihedral_loop",
    "pyramidalisation_loop",
]


def kabsch_rmsd_loop(
    P: np.ndarray, Q: np.ndarray, w: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame Kabsch fit with ``np.linalg.svd``; returns (rmsd (n,), R (n, 3, 3))."""
    n, a, _ = P.shape
    w = np.ones(a) if w is None else np.asarray(w, float)
    out = np.empty(n)
    rots = np.empty((n, 3, 3))
    for f in range(n):
        p = P[f]
        q = Q if Q.ndim == 2 else Q[f]
        pc = p - (w[:, None] * p).sum(0) / w.sum()
        qc = q - (w[:, None] * q).sum(0) / w.sum()
        H = (pc * w[:, None]).T @ qc
        U, _, Vt = np.linalg.svd(H)
        d = 1.0 if np.linalg.det(Vt.T @ U.T) >= 0 else -1.0
        R = Vt.T @ np.diag([1.0, 1.0, d]) @ U.T
        diff = pc @ R.T - qc
        out[f] = math.sqrt(float((w * (diff * diff).sum(1)).sum() / w.sum()))
        rots[f] = R
    return out, rots


def inverse_distances_loop(X: np.ndarray) -> np.ndarray:
    """1/r_ij for i < j with two nested loops, shape (n, n_pairs)."""
    n, a, _ = X.shape
    out = np.empty((n, a * (a - 1) // 2))
    for f in range(n):
        k = 0
        for i in range(a):
            for j in range(i + 1, a):
                out[f, k] = 1.0 / math.dist(X[f, i], X[f, j])
                k += 1
    return out


def coulomb_eigenvalues_loop(X: np.ndarray, Z: np.ndarray, length_factor: float = 1.0
                             ) -> np.ndarray:
    """Coulomb matrix built element by element, eigenvalues descending, shape (n, n_atoms)."""
    n, a, _ = X.shape
    out = np.empty((n, a))
    for f in range(n):
        C = np.empty((a, a))
        for i in range(a):
            for j in range(a):
                if i == j:
                    C[i, j] = 0.5 * float(Z[i]) ** 2.4
                else:
                    C[i, j] = float(Z[i]) * float(Z[j]) / (
                        length_factor * math.dist(X[f, i], X[f, j]))
        out[f] = np.sort(np.linalg.eigvalsh(C))[::-1]
    return out


def bond_angles_loop(X: np.ndarray, triples: np.ndarray) -> np.ndarray:
    """Angles by arccos of the normalised dot product, shape (n, n_triples)."""
    out = np.empty((X.shape[0], len(triples)))
    for f in range(X.shape[0]):
        for k, (i, j, l) in enumerate(triples):
            u = X[f, i] - X[f, j]
            v = X[f, l] - X[f, j]
            c = float(u @ v) / (np.linalg.norm(u) * np.linalg.norm(v))
            out[f, k] = math.acos(max(-1.0, min(1.0, c)))
    return out


def dihedral_loop(X: np.ndarray, quads: np.ndarray) -> np.ndarray:
    """Dihedral angles (radians, in (-pi, pi]) from plane normals, shape (n, n_quads)."""
    out = np.empty((X.shape[0], len(quads)))
    for f in range(X.shape[0]):
        for k, (i, j, l, m) in enumerate(quads):
            b1 = X[f, j] - X[f, i]
            b2 = X[f, l] - X[f, j]
            b3 = X[f, m] - X[f, l]
            n1 = np.cross(b1, b2)
            n1 /= np.linalg.norm(n1)
            n2 = np.cross(b2, b3)
            n2 /= np.linalg.norm(n2)
            c = max(-1.0, min(1.0, float(n1 @ n2)))
            phi = math.acos(c)
            # sign: positive when looking along b2 the far bond turns clockwise (IUPAC)
            if float(np.cross(n1, n2) @ b2) < 0:
                phi = -phi
            out[f, k] = phi
    return out


def pyramidalisation_loop(X: np.ndarray, quads: np.ndarray) -> np.ndarray:
    """Height of atom c above the plane (a, b, d) by projecting on the normal."""
    out = np.empty((X.shape[0], len(quads)))
    for f in range(X.shape[0]):
        for k, (c, a, b, d) in enumerate(quads):
            nrm = np.cross(X[f, b] - X[f, a], X[f, d] - X[f, a])
            out[f, k] = float((X[f, c] - X[f, a]) @ (nrm / np.linalg.norm(nrm)))
    return out
