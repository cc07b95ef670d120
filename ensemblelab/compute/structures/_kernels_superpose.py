"""Compiled batch RMSD after optimal superposition: QCP and Kabsch in one pass per frame (private).

Used by :func:`ensemblelab.compute.structures.geometry.rmsd` when numba (the ``fast``
extra) is installed; without numba :func:`compiled_rmsd` returns None and the caller uses
the numpy kernels of :mod:`._kernels_geometry` (the vectorised twin; the per-frame loop
twin is :mod:`._reference_geometry`).

QCP to one reference (the common call) reads every frame once, as stored (float32 or
float64, never copied), in a single pass that sums, with the reference centred and
weighted once per call (``u_a = w_a (q_a - c_Q)``, so that ``sum_a u_a = 0``),

    H_ij = sum_a x_ai u_aj,   s_i = sum_a w_a x_ai,   g = sum_a w_a |x_a|^2,

over ``x_a = p_a - p_0`` (the frame shifted by its first selected atom, which keeps the
cancellation in ``G_P = g - |s|^2 / W`` to the size of the molecule, not its distance from
the origin). ``H`` needs no frame centroid because the weighted reference sums to zero.
Two frames share one pass (the reference rows are read once for both: this halves the
cache traffic that otherwise stalls the stream of frames), all sums are float64 and the
loop over atoms is vectorised (contiguous reference rows, stride-3 frame reads). Frames
are split into chunks that worker threads take in turn (a persistent pool, the kernels
release the GIL), so a core busy with another program delays only its current chunk.

Kabsch and per-frame references (frame chunks shared by the same threads) read the selected
atoms into three contiguous float64 scratch rows (x, y, z) while the weighted centroid is
summed, centre them in place and form ``H`` and ``G_P`` over the rows.

* QCP: the largest eigenvalue of the 4x4 key matrix by Newton iteration on its
  characteristic quartic [Acta Cryst. A61, 478 (2005), "Rapid calculation of RMSDs using
  a quaternion-based characteristic polynomial"], RMSD^2 = (G_P + G_Q - 2 lambda) / W.
* Kabsch: SVD of the 3x3 H [Acta Cryst. A32, 922 (1976); A34, 827 (1978)], then the
  residual sum_a w_a |R (p_a - c) - q_a|^2 from the centred rows still in cache (exact
  also for near-identical frames, where the QCP subtraction loses digits).
"""

from __future__ import annotations

import itertools
import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

__all__ = ["compiled_available", "compiled_rmsd"]

_LOCK = threading.Lock()
_CACHE: dict[str, tuple[Callable[..., Any], ...] | None] = {}
_POOL: list[tuple[int, ThreadPoolExecutor]] = []  # (size, pool): persistent, made lazily
if hasattr(os, "register_at_fork"):  # a forked child has none of the parent's threads
    os.register_at_fork(after_in_child=_POOL.clear)

#: frame-atoms per chunk of the QCP pass (~0.1-0.3 ms of work; the unit the threads share)
CHUNK_ATOMS = 1 << 18
#: below this many frame-atoms the QCP pass runs in the calling thread only
SERIAL_ATOMS = 1 << 17

# The kernels below are plain Python; :func:`_kernels` compiles them with numba on the
# first call. They call each other through these module globals, which the build
# rebinds to the compiled helpers (a module-level call graph keeps numba's on-disk
# cache valid, so later processes load the machine code instead of compiling).
_load = _inner = _lambda_max = _kabsch_msd = _frame_rmsd = _sums2 = _qcp_msd = None


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


def _sums2_py(p, r, ux, uy, uz, w, h):
    """One pass over two frames (flat, x0 y0 z0 x1 ...): h[0:13] for p, h[13:26] for r.

    Per frame: H (9, row-major, frame index first) with the weighted centred reference
    rows u, then s (3) and g (1) of the frame shifted by its first atom. ``w`` None: unit
    weights (numba compiles that variant without the weight row).
    """
    ox = np.float64(p[0])
    oy = np.float64(p[1])
    oz = np.float64(p[2])
    vx = np.float64(r[0])
    vy = np.float64(r[1])
    vz = np.float64(r[2])
    h00 = h01 = h02 = h10 = h11 = h12 = h20 = h21 = h22 = 0.0
    e00 = e01 = e02 = e10 = e11 = e12 = e20 = e21 = e22 = 0.0
    sx = sy = sz = g = tx = ty = tz = gr = 0.0
    for k in range(ux.shape[0]):
        a = ux[k]
        b = uy[k]
        c = uz[k]
        x = np.float64(p[3 * k]) - ox
        y = np.float64(p[3 * k + 1]) - oy
        z = np.float64(p[3 * k + 2]) - oz
        h00 += x * a
        h01 += x * b
        h02 += x * c
        h10 += y * a
        h11 += y * b
        h12 += y * c
        h20 += z * a
        h21 += z * b
        h22 += z * c
        if w is None:  # unit weights: a compiled variant without the weight row
            sx += x
            sy += y
            sz += z
            g += x * x + y * y + z * z
        else:
            sx += w[k] * x
            sy += w[k] * y
            sz += w[k] * z
            g += w[k] * (x * x + y * y + z * z)
        x = np.float64(r[3 * k]) - vx
        y = np.float64(r[3 * k + 1]) - vy
        z = np.float64(r[3 * k + 2]) - vz
        e00 += x * a
        e01 += x * b
        e02 += x * c
        e10 += y * a
        e11 += y * b
        e12 += y * c
        e20 += z * a
        e21 += z * b
        e22 += z * c
        if w is None:
            tx += x
            ty += y
            tz += z
            gr += x * x + y * y + z * z
        else:
            tx += w[k] * x
            ty += w[k] * y
            tz += w[k] * z
            gr += w[k] * (x * x + y * y + z * z)
    h[0] = h00
    h[1] = h01
    h[2] = h02
    h[3] = h10
    h[4] = h11
    h[5] = h12
    h[6] = h20
    h[7] = h21
    h[8] = h22
    h[9] = sx
    h[10] = sy
    h[11] = sz
    h[12] = g
    h[13] = e00
    h[14] = e01
    h[15] = e02
    h[16] = e10
    h[17] = e11
    h[18] = e12
    h[19] = e20
    h[20] = e21
    h[21] = e22
    h[22] = tx
    h[23] = ty
    h[24] = tz
    h[25] = gr


def _qcp_msd_py(h, wsum, gq, reflect):
    """QCP RMSD from the 13 sums of one frame (H, s, g; see :func:`_sums2_py`)."""
    cx = h[9] / wsum
    cy = h[10] / wsum
    cz = h[11] / wsum
    gp = h[12] - wsum * (cx * cx + cy * cy + cz * cz)
    e0 = 0.5 * (gp + gq)
    lam = _lambda_max(h, e0, False)
    if reflect:
        lam = max(lam, _lambda_max(h, e0, True))
    return np.sqrt(max((gp + gq - 2.0 * lam) / wsum, 0.0))


def _qcp_chunk_py(P, sel, whole, ux, uy, uz, w, wsum, gq, reflect, out, lo, hi):
    """QCP RMSD of frames lo..hi-1 of P (n, 3 * n_atoms; flat frames), two per pass."""
    m = ux.shape[0]
    h = np.empty(26)
    a = np.empty(3 * m, dtype=P.dtype)
    b = np.empty(3 * m, dtype=P.dtype)
    for f in range(lo, hi, 2):
        f2 = f + 1 if f + 1 < hi else f
        if whole:
            _sums2(P[f], P[f2], ux, uy, uz, w, h)
        else:
            for k in range(m):
                j = 3 * sel[k]
                a[3 * k] = P[f, j]
                a[3 * k + 1] = P[f, j + 1]
                a[3 * k + 2] = P[f, j + 2]
                b[3 * k] = P[f2, j]
                b[3 * k + 1] = P[f2, j + 1]
                b[3 * k + 2] = P[f2, j + 2]
            _sums2(a, b, ux, uy, uz, w, h)
        out[f] = _qcp_msd(h[:13], wsum, gq, reflect)
        out[f2] = _qcp_msd(h[13:], wsum, gq, reflect)


def _rmsd_one_ref_py(P, sel, whole, w, qx, qy, qz, gq, method, reflect, out, lo, hi):
    """RMSD of frames lo..hi-1 of P (n, a, 3) to one centred reference (rows qx, qy, qz)."""
    m = sel.shape[0]
    wsum = 0.0
    for k in range(m):
        wsum += w[k]
    x = np.empty(m)
    y = np.empty(m)
    z = np.empty(m)
    h = np.empty(9)
    for f in range(lo, hi):
        cx, cy, cz = _load(P[f], sel, whole, w, wsum, x, y, z)
        out[f] = _frame_rmsd(x, y, z, cx, cy, cz, qx, qy, qz, gq, w, wsum, h, method,
                             reflect)


def _rmsd_per_frame_py(P, Q, sel, whole, w, method, reflect, out, lo, hi):
    """RMSD of frames lo..hi-1 of P (n, a, 3) to the same frames of Q (n, a, 3)."""
    m = sel.shape[0]
    wsum = 0.0
    for k in range(m):
        wsum += w[k]
    x = np.empty(m)
    y = np.empty(m)
    z = np.empty(m)
    qx = np.empty(m)
    qy = np.empty(m)
    qz = np.empty(m)
    h = np.empty(9)
    for f in range(lo, hi):
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


def _build(numba):
    """Compile the kernels (helpers first, so the kernels see them as globals)."""
    global _load, _inner, _lambda_max, _kabsch_msd, _frame_rmsd, _sums2, _qcp_msd
    opts = {"boundscheck": False, "nogil": True, "cache": True}
    _load = numba.njit(fastmath=True, **opts)(_load_py)
    _inner = numba.njit(fastmath=True, **opts)(_inner_py)
    _lambda_max = numba.njit(**opts)(_lambda_max_py)
    _kabsch_msd = numba.njit(**opts)(_kabsch_msd_py)
    _frame_rmsd = numba.njit(**opts)(_frame_rmsd_py)
    _sums2 = numba.njit(fastmath=True, **opts)(_sums2_py)
    _qcp_msd = numba.njit(**opts)(_qcp_msd_py)
    chunk = numba.njit(**opts)(_qcp_chunk_py)
    one = numba.njit(**opts)(_rmsd_one_ref_py)
    per = numba.njit(**opts)(_rmsd_per_frame_py)
    return one, per, chunk, numba.get_num_threads


def _kernels() -> tuple[Callable[..., Any], ...] | None:
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


def _pool(workers: int) -> ThreadPoolExecutor:
    """The persistent worker pool (at least `workers` threads; remade larger if needed)."""
    with _LOCK:
        if not _POOL or _POOL[0][0] < workers:
            old = _POOL[:]
            pool = ThreadPoolExecutor(workers, thread_name_prefix="ensemblelab-rmsd")
            _POOL[:] = [(workers, pool)]
            for _, stale in old:
                stale.shutdown(wait=False)
        return _POOL[0][1]


def _run_chunks(kernel: Callable[..., None], n: int, n_atoms: int, args: tuple,
                n_threads: int, chunk_frames: int | None) -> None:
    """Run ``kernel(*args, lo, hi)`` over frames 0..n-1 in chunks the threads take in turn."""
    if chunk_frames is None:
        chunk_frames = max(2, CHUNK_ATOMS // max(n_atoms, 1))
        chunk_frames = min(chunk_frames, max(2, -(-n // (4 * n_threads))))
    size = max(1, int(chunk_frames))
    n_chunks = -(-n // size)
    if n_threads <= 1 or n_chunks <= 1 or n * n_atoms < SERIAL_ATOMS:
        kernel(*args, 0, n)
        return
    counter = itertools.count()
    lock = threading.Lock()
    finished = threading.Event()
    done = [0]
    errors: list[BaseException] = []

    def work() -> None:
        try:
            while True:
                c = next(counter)  # atomic under the GIL: each chunk goes to one thread
                if c >= n_chunks:
                    return
                kernel(*args, c * size, min(n, (c + 1) * size))
                with lock:
                    done[0] += 1
                    if done[0] == n_chunks:
                        finished.set()
        except BaseException as exc:  # pragma: no cover - the kernels do not raise
            errors.append(exc)
            finished.set()

    pool = _pool(n_threads - 1)
    for _ in range(min(n_threads, n_chunks) - 1):
        pool.submit(work)
    work()
    # wait for the chunks other threads have taken, not for threads that have not started
    # (on a busy machine a worker may wake only after the caller has done every chunk;
    # it then finds none left and touches nothing)
    finished.wait()
    if errors:
        raise errors[0]


def compiled_rmsd(
    P: np.ndarray,
    Q: np.ndarray,
    w: np.ndarray,
    sel: np.ndarray,
    *,
    method: str = "qcp",
    allow_reflection: bool = False,
    n_threads: int | None = None,
    chunk_frames: int | None = None,
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
    n_threads : int, optional
        Threads sharing the frames (default ``numba.get_num_threads()``).
    chunk_frames : int, optional
        Frames per chunk the threads take in turn (default ~2.6e5 frame-atoms).

    Returns
    -------
    ndarray, shape (n_frames,) or None
    """
    kernels = _kernels()
    if kernels is None:
        return None
    one, per, chunk, get_threads = kernels
    if P.dtype not in (np.float32, np.float64) or not P.flags.c_contiguous:
        P = np.ascontiguousarray(P, dtype=np.float64)
    sel = np.ascontiguousarray(sel, dtype=np.int64)
    whole = sel.shape[0] == P.shape[1] and bool(np.all(sel == np.arange(P.shape[1])))
    w = np.ascontiguousarray(w, dtype=np.float64)
    code = 0 if method == "qcp" else 1
    n, m = P.shape[0], sel.shape[0]
    out = np.empty(n)
    threads = max(1, int(n_threads if n_threads is not None else get_threads()))
    reflect = bool(allow_reflection)
    if Q.ndim == 2:
        q = np.asarray(Q, dtype=np.float64)[sel]
        wsum = float(w.sum())
        qc = q - (w[:, None] * q).sum(0) / wsum
        gq = float(np.einsum("ai,ai,a->", qc, qc, w))
        if code == 0:
            u = w[:, None] * qc
            ux, uy, uz = (np.ascontiguousarray(u[:, i]) for i in range(3))
            flat = P.reshape(n, -1)  # a view: P is C-contiguous here
            wu = None if bool(np.all(w == w[0])) else w  # equal weights: the unweighted pass
            if wu is None:
                ux, uy, uz = ux / w[0], uy / w[0], uz / w[0]
                wsum, gq = wsum / w[0], gq / w[0]
            _run_chunks(chunk, n, m, (flat, sel, whole, ux, uy, uz, wu, wsum, gq, reflect, out),
                        threads, chunk_frames)
            return out
        qx, qy, qz = (np.ascontiguousarray(qc[:, i]) for i in range(3))
        _run_chunks(one, n, m, (P, sel, whole, w, qx, qy, qz, gq, code, reflect, out),
                    threads, chunk_frames)
    else:
        if Q.dtype != P.dtype or not Q.flags.c_contiguous:
            Q = np.ascontiguousarray(Q, dtype=P.dtype)
        _run_chunks(per, n, m, (P, Q, sel, whole, w, code, reflect, out), threads,
                    chunk_frames)
    return out
