"""Compiled batch RMSD after optimal superposition: QCP and Kabsch in one pass per frame (private).

Used by :func:`ensemblelab.compute.structures.geometry.rmsd` when numba (the ``fast``
extra) is installed; without numba :func:`compiled_rmsd` returns None and the caller uses
the numpy kernels of :mod:`._kernels_geometry` (the vectorised twin; the per-frame loop
twin is :mod:`._reference_geometry`).

Per frame (frames run in parallel, ``numba.prange``) the selected atoms are read once
from the (n_frames, n_atoms, 3) array, float32 or float64 as stored, into three
contiguous float64 scratch rows (x, y, z) while the weighted centroid is summed; the
rows are centred in place (precentring once, in cache) and the inner products

    H_ij = sum_a w_a (p_ai - c_i) q_aj,    G_P = sum_a w_a |p_a - c|^2

run over contiguous rows, so the compiler vectorises them. The reference is centred
once per call (or per frame for a per-frame reference). All sums are float64;
a float32 input is only read (never copied to float64), which halves the memory traffic.

* QCP: the largest eigenvalue of the 4x4 key matrix by Newton iteration on its
  characteristic quartic [Acta Cryst. A61, 478 (2005), "Rapid calculation of RMSDs using
  a quaternion-based characteristic polynomial"], RMSD^2 = (G_P + G_Q - 2 lambda) / W.
* Kabsch: SVD of the 3x3 H [Acta Cryst. A32, 922 (1976); A34, 827 (1978)], then the
  residual sum_a w_a |R (p_a - c) - q_a|^2 from the centred rows still in cache (exact
  also for near-identical frames, where the QCP subtraction loses digits).
"""

from __future__ import annotations

import threading
from collections.abc import Callable

import numpy as np

__all__ = ["compiled_available", "compiled_rmsd"]

_LOCK = threading.Lock()
_CACHE: dict[str, tuple[Callable[..., None], Callable[..., None]] | None] = {}

# The kernels below are plain Python; :func:`_kernels` compiles them with numba on the
# first call. They call each other through these module globals, which the build
# rebinds to the compiled helpers (a module-level call graph keeps numba's on-disk
# cache valid, so later processes load the machine code instead of compiling).
_load = _inner = _lambda_max = _kabsch_msd = _frame_rmsd = None


def _load_py(p, sel, whole, w, wsum, x, y, z):
    """Copy p[sel] (all atoms when `whole`) into rows x, y, z; return the weighted centroid."""
    sx = 0.0
    sy = 0.0
    sz = 0.0
    if whole:
        for k in range(x.shape[0]):
            xk = np.float64(p[k, 0])
            yk = np.float64(p[k, 1])
            zk = np.float64(p[k, 2])
            x[k] = xk
            y[k] = yk
            z[k] = zk
            wk = w[k]
            sx += wk * xk
            sy += wk * yk
            sz += wk * zk
    else:
        for k in range(x.shape[0]):
            a = sel[k]
            xk = np.float64(p[a, 0])
            yk = np.float64(p[a, 1])
            zk = np.float64(p[a, 2])
            x[k] = xk
            y[k] = yk
            z[k] = zk
            wk = w[k]
            sx += wk * xk
            sy += wk * yk
            sz += wk * zk
    return sx / wsum, sy / wsum, sz / wsum


def _inner_py(x, y, z, cx, cy, cz, qx, qy, qz, w, h):
    """h[0:9] = H (row-major, P index first) of the rows centred on c; returns G_P."""
    h00 = h01 = h02 = h10 = h11 = h12 = h20 = h21 = h22 = 0.0
    g = 0.0
    for k in range(x.shape[0]):
        wk = w[k]
        xk = x[k] - cx
        yk = y[k] - cy
        zk = z[k] - cz
        wx = wk * xk
        wy = wk * yk
        wz = wk * zk
        ax = qx[k]
        ay = qy[k]
        az = qz[k]
        h00 += wx * ax
        h01 += wx * ay
        h02 += wx * az
        h10 += wy * ax
        h11 += wy * ay
        h12 += wy * az
        h20 += wz * ax
        h21 += wz * ay
        h22 += wz * az
        g += wx * xk + wy * yk + wz * zk
    h[0] = h00
    h[1] = h01
    h[2] = h02
    h[3] = h10
    h[4] = h11
    h[5] = h12
    h[6] = h20
    h[7] = h21
    h[8] = h22
    return g


def _lambda_max_py(h, e0, mirror):
    """Largest eigenvalue of the QCP key matrix of H (x row negated when `mirror`)."""
    s = -1.0 if mirror else 1.0
    sxx = s * h[0]
    sxy = s * h[1]
    sxz = s * h[2]
    syx = h[3]
    syy = h[4]
    syz = h[5]
    szx = h[6]
    szy = h[7]
    szz = h[8]
    k00 = sxx + syy + szz
    k01 = syz - szy
    k02 = szx - sxz
    k03 = sxy - syx
    k11 = sxx - syy - szz
    k12 = sxy + syx
    k13 = szx + sxz
    k22 = -sxx + syy - szz
    k23 = syz + szy
    k33 = -sxx - syy + szz
    s0 = k00 * k11 - k01 * k01
    s1 = k00 * k12 - k01 * k02
    s2 = k00 * k13 - k01 * k03
    s3 = k01 * k12 - k11 * k02
    s4 = k01 * k13 - k11 * k03
    s5 = k02 * k13 - k12 * k03
    m5 = k22 * k33 - k23 * k23
    m4 = k12 * k33 - k13 * k23
    m3 = k12 * k23 - k13 * k22
    m2 = k02 * k33 - k03 * k23
    m1 = k02 * k23 - k03 * k22
    m0 = k02 * k13 - k03 * k12
    c0 = s0 * m5 - s1 * m4 + s2 * m3 + s3 * m2 - s4 * m1 + s5 * m0
    c2 = -2.0 * (sxx * sxx + sxy * sxy + sxz * sxz + syx * syx + syy * syy
                 + syz * syz + szx * szx + szy * szy + szz * szz)
    det = (sxx * (syy * szz - syz * szy) - sxy * (syx * szz - syz * szx)
           + sxz * (syx * szy - syy * szx))
    c1 = -8.0 * det
    lam = e0
    for _ in range(50):
        l2 = lam * lam
        b = (l2 + c2) * lam
        a = b + c1
        f = a * lam + c0
        fp = 2.0 * l2 * lam + b + a
        if fp == 0.0:
            fp = 1.0
        step = f / fp
        lam -= step
        if abs(step) <= 1e-15 * max(abs(lam), 1.0):
            break
    return lam


def _kabsch_msd_py(x, y, z, cx, cy, cz, qx, qy, qz, w, wsum, h, reflect):
    """Weighted mean squared residual after the Kabsch rotation of the centred rows."""
    H = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            H[i, j] = h[3 * i + j]
    U, _, Vt = np.linalg.svd(H)
    R = Vt.T @ U.T
    if not reflect and np.linalg.det(R) < 0.0:
        for i in range(3):
            Vt[2, i] = -Vt[2, i]
        R = Vt.T @ U.T
    r00, r01, r02 = R[0, 0], R[0, 1], R[0, 2]
    r10, r11, r12 = R[1, 0], R[1, 1], R[1, 2]
    r20, r21, r22 = R[2, 0], R[2, 1], R[2, 2]
    acc = 0.0
    for k in range(x.shape[0]):
        xk = x[k] - cx
        yk = y[k] - cy
        zk = z[k] - cz
        dx = r00 * xk + r01 * yk + r02 * zk - qx[k]
        dy = r10 * xk + r11 * yk + r12 * zk - qy[k]
        dz = r20 * xk + r21 * yk + r22 * zk - qz[k]
        acc += w[k] * (dx * dx + dy * dy + dz * dz)
    return acc / wsum


def _frame_rmsd_py(x, y, z, cx, cy, cz, qx, qy, qz, gq, w, wsum, h, method, reflect):
    """RMSD of one loaded frame (rows x, y, z, centre c) to the centred reference rows q
    (``gq`` its weighted square sum): QCP (``method == 0``) or Kabsch; fills ``h``."""
    gp = _inner(x, y, z, cx, cy, cz, qx, qy, qz, w, h)
    if method == 0:
        e0 = 0.5 * (gp + gq)
        lam = _lambda_max(h, e0, False)
        if reflect:
            lam = max(lam, _lambda_max(h, e0, True))
        msd = (gp + gq - 2.0 * lam) / wsum
    else:
        msd = _kabsch_msd(x, y, z, cx, cy, cz, qx, qy, qz, w, wsum, h, reflect)
    return np.sqrt(max(msd, 0.0))


def _rmsd_one_ref_py(P, sel, whole, w, qx, qy, qz, gq, method, reflect, out):
    """RMSD of every frame of P (n, a, 3) to one centred reference (rows qx, qy, qz)."""
    n = P.shape[0]
    m = sel.shape[0]
    wsum = 0.0
    for k in range(m):
        wsum += w[k]
    for f in _prange(n):
        x = np.empty(m)
        y = np.empty(m)
        z = np.empty(m)
        h = np.empty(9)
        cx, cy, cz = _load(P[f], sel, whole, w, wsum, x, y, z)
        out[f] = _frame_rmsd(x, y, z, cx, cy, cz, qx, qy, qz, gq, w, wsum, h, method,
                             reflect)


def _rmsd_per_frame_py(P, Q, sel, whole, w, method, reflect, out):
    """RMSD of every frame of P (n, a, 3) to the same frame of Q (n, a, 3)."""
    n = P.shape[0]
    m = sel.shape[0]
    wsum = 0.0
    for k in range(m):
        wsum += w[k]
    for f in _prange(n):
        x = np.empty(m)
        y = np.empty(m)
        z = np.empty(m)
        qx = np.empty(m)
        qy = np.empty(m)
        qz = np.empty(m)
        h = np.empty(9)
        dx, dy, dz = _load(Q[f], sel, whole, w, wsum, qx, qy, qz)
        gq = 0.0
        for k in range(m):
            qx[k] -= dx
            qy[k] -= dy
            qz[k] -= dz
            gq += w[k] * (qx[k] * qx[k] + qy[k] * qy[k] + qz[k] * qz[k])
        cx, cy, cz = _load(P[f], sel, whole, w, wsum, x, y, z)
        out[f] = _frame_rmsd(x, y, z, cx, cy, cz, qx, qy, qz, gq, w, wsum, h, method,
                             reflect)


_prange = range  # rebound to numba.prange by the build


def _build(numba):
    """Compile the kernels (helpers first, so the kernels see them as globals)."""
    global _load, _inner, _lambda_max, _kabsch_msd, _frame_rmsd, _prange
    opts = {"boundscheck": False, "nogil": True, "cache": True}
    _prange = numba.prange
    _load = numba.njit(fastmath=True, **opts)(_load_py)
    _inner = numba.njit(fastmath=True, **opts)(_inner_py)
    _lambda_max = numba.njit(**opts)(_lambda_max_py)
    _kabsch_msd = numba.njit(**opts)(_kabsch_msd_py)
    _frame_rmsd = numba.njit(**opts)(_frame_rmsd_py)
    one = numba.njit(parallel=True, **opts)(_rmsd_one_ref_py)
    per = numba.njit(parallel=True, **opts)(_rmsd_per_frame_py)
    return one, per


def _kernels() -> tuple[Callable[..., None], Callable[..., None]] | None:
    if "rmsd" not in _CACHE:
        with _LOCK:
            if "rmsd" not in _CACHE:
                try:
                    import numba
                except ImportError:
                    _CACHE["rmsd"] = None
                else:
                    _CACHE["rmsd"] = _build(numba)
    return _CACHE["rmsd"]


def compiled_available() -> bool:
    """True when numba is installed and the compiled RMSD kernels can be used."""
    return _kernels() is not None


def compiled_rmsd(
    P: np.ndarray,
    Q: np.ndarray,
    w: np.ndarray,
    sel: np.ndarray,
    *,
    method: str = "qcp",
    allow_reflection: bool = False,
) -> np.ndarray | None:
    """Batch RMSD (Angstrom) of `P` to `Q` over the atoms `sel`, or None without numba.

    Parameters
    ----------
    P : ndarray, shape (n_frames, n_atoms, 3), float32 or float64
        Mobile coordinates (Angstrom), read as stored (no float64 copy).
    Q : ndarray, shape (n_atoms, 3) or (n_frames, n_atoms, 3)
        Reference (one, or one per frame).
    w : ndarray, shape (len(sel),)
        Weights of the selected atoms, positive sum.
    sel : ndarray of int, shape (n_sel,)
        Atom indices used for the fit and the RMSD.
    method : {"qcp", "kabsch"}
    allow_reflection : bool

    Returns
    -------
    ndarray, shape (n_frames,) or None
    """
    kernels = _kernels()
    if kernels is None:
        return None
    one, per = kernels
    if P.dtype not in (np.float32, np.float64) or not P.flags.c_contiguous:
        P = np.ascontiguousarray(P, dtype=np.float64)
    sel = np.ascontiguousarray(sel, dtype=np.int64)
    whole = sel.shape[0] == P.shape[1] and bool(np.all(sel == np.arange(P.shape[1])))
    w = np.ascontiguousarray(w, dtype=np.float64)
    code = 0 if method == "qcp" else 1
    out = np.empty(P.shape[0])
    if Q.ndim == 2:
        q = np.asarray(Q, dtype=np.float64)[sel]
        qc = q - (w[:, None] * q).sum(0) / w.sum()
        gq = float(np.einsum("ai,ai,a->", qc, qc, w))
        qx, qy, qz = (np.ascontiguousarray(qc[:, i]) for i in range(3))
        one(P, sel, whole, w, qx, qy, qz, gq, code, bool(allow_reflection), out)
    else:
        if Q.dtype != P.dtype or not Q.flags.c_contiguous:
            Q = np.ascontiguousarray(Q, dtype=P.dtype)
        per(P, Q, sel, whole, w, code, bool(allow_reflection), out)
    return out
