"""Array-level Debye-sum kernels (private): the molecular part of the isotropic intensity.

For one geometry with atoms a, b and form factors f_a(q), the isotropic (Debye)
intensity is ``I(q) = sum_a f_a^2 + sum_{a != b} f_a f_b sin(q r_ab) / (q r_ab)``. The
first (atomic) sum does not depend on the geometry; the kernels here compute the
second (molecular) sum for many geometries at once.

Atom pairs are grouped by their element pair t (C-O, C-H, ...). For each snapshot the
kernel accumulates ``A_t(q) = sum_{pairs of type t} sin(q r) / r`` and returns
``I_mol(q) = sum_t 2 F_t(q) A_t(q) / q`` with ``F_t = f_a f_b``; at ``q = 0`` the
limit ``sin(q r)/(q r) = 1`` is used. On a uniform q grid ``q_k = q_0 + k h`` the
sines follow from the recurrence ``sin(x + h r) = 2 cos(h r) sin(x) - sin(x - h r)``
(three flops per pair and q point instead of a sine); otherwise ``sin`` is called.

Two interchangeable implementations (``backend``):

* ``"numba"`` (default when the optional ``fast`` extra is installed): one compiled
  pass per block of snapshots, run on several threads (GIL-free); numba is imported
  on the first call only.
* ``"numpy"``: a loop over atom pairs, vectorised over snapshots and q (chunks of
  snapshots bound the memory).

The naive twin (one geometry, one pair, one q at a time with ``np.sinc``) is in
``_reference_scattering``; tests compare all three.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from ..spectroscopy._kernels_deposit import usable_cores

__all__ = ["pair_types", "molecular_intensity", "numba_available", "is_uniform"]

_NUMBA: dict[str, Any] = {}
_LOCK = threading.Lock()

#: snapshots per numpy chunk (bounds the (chunk, n_q) temporaries)
NUMPY_CHUNK = 2048

#: snapshots per thread task of the numba backend
NUMBA_BLOCK = 1024


def pair_types(element_of_atom: np.ndarray, table: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Atom pairs a < b, their element-pair type and the products ``F_t = f_a f_b``.

    Parameters
    ----------
    element_of_atom : ndarray of int, shape (n_atoms,)
    table : ndarray, shape (n_elements, n_q)

    Returns
    -------
    ia, ib : ndarray of int64, shape (n_pairs,)
    ptype : ndarray of int64, shape (n_pairs,)
    fprod : ndarray, shape (n_types, n_q)
    """
    n_atoms = element_of_atom.size
    ia, ib = np.triu_indices(n_atoms, k=1)
    ea, eb = element_of_atom[ia], element_of_atom[ib]
    lo, hi = np.minimum(ea, eb), np.maximum(ea, eb)
    keys = lo * max(int(table.shape[0]), 1) + hi
    uniq, ptype = np.unique(keys, return_inverse=True)
    n_el = max(int(table.shape[0]), 1)
    fprod = table[uniq // n_el] * table[uniq % n_el] if uniq.size else np.zeros((0, table.shape[1]))
    return ia.astype(np.int64), ib.astype(np.int64), ptype.astype(np.int64), fprod


def is_uniform(q: np.ndarray) -> bool:
    """True for an (increasing) evenly spaced grid of at least 3 points (to 1e-9 relative)."""
    if q.size < 3:
        return False
    d = np.diff(q)
    return bool(d[0] > 0 and np.all(np.abs(d - d[0]) <= 1e-9 * max(abs(q[-1]), d[0])))


def _mol_range(geoms, ia, ib, tstart, coef, q, uniform, out, start, stop):  # pragma: no cover
    # compiled by numba (the numpy backend is its uncompiled peer); out[s] is overwritten.
    # Pairs are sorted by type: pairs tstart[t] .. tstart[t + 1] - 1 are of type t. The
    # q loop is outside and the pair loop inside, so the per-pair sine recurrences are
    # independent (vectorisable) instead of one serial chain per pair.
    n_q = q.size
    n_types = coef.shape[0]
    n_pairs = ia.size
    h = q[1] - q[0] if n_q > 1 else 0.0
    inv = np.empty(n_pairs)
    r = np.empty(n_pairs)
    c2 = np.empty(n_pairs)
    cur = np.empty(n_pairs)
    prev = np.empty(n_pairs)
    nz = np.zeros(n_types)
    for s in range(start, stop):
        nz[:] = 0.0
        for t in range(n_types):
            for p in range(tstart[t], tstart[t + 1]):
                a = ia[p]
                b = ib[p]
                dx = geoms[s, a, 0] - geoms[s, b, 0]
                dy = geoms[s, a, 1] - geoms[s, b, 1]
                dz = geoms[s, a, 2] - geoms[s, b, 2]
                rp = math.sqrt(dx * dx + dy * dy + dz * dz)
                r[p] = rp
                if rp > 0.0:
                    inv[p] = 1.0 / rp
                else:  # coincident atoms: sin(q r)/r -> q, added through nz
                    inv[p] = 0.0
                    nz[t] += 1.0
                # the recurrence is linear: run it on sin(q r) / r directly
                c2[p] = 2.0 * math.cos(h * rp)
                prev[p] = math.sin((q[0] - h) * rp) * inv[p]
                cur[p] = math.sin(q[0] * rp) * inv[p]
        if uniform:
            for k in range(n_q):
                v = 0.0
                for t in range(n_types):
                    acc = nz[t] * q[k]
                    for p in range(tstart[t], tstart[t + 1]):
                        sk = cur[p]
                        acc += sk
                        cur[p] = c2[p] * sk - prev[p]
                        prev[p] = sk
                    v += coef[t, k] * acc
                out[s, k] = v
        else:
            for k in range(n_q):
                v = 0.0
                for t in range(n_types):
                    acc = nz[t] * q[k]
                    for p in range(tstart[t], tstart[t + 1]):
                        acc += math.sin(q[k] * r[p]) * inv[p]
                    v += coef[t, k] * acc
                out[s, k] = v
    return 0


def _numba_kernel() -> Callable[..., int] | None:
    if "mol" not in _NUMBA:
        with _LOCK:
            if "mol" not in _NUMBA:
                try:
                    import numba
                except ImportError:
                    _NUMBA["mol"] = None
                else:
                    _NUMBA["mol"] = numba.njit(cache=True, nogil=True, boundscheck=False,
                                               fastmath={"reassoc", "contract"})(_mol_range)
    return _NUMBA["mol"]


def numba_available() -> bool:
    """True when the compiled Debye kernel can be used (the ``fast`` extra)."""
    return _numba_kernel() is not None


def molecular_intensity(geoms: np.ndarray, element_of_atom: np.ndarray, table: np.ndarray,
                        q: np.ndarray, *, backend: str | None = None,
                        threads: int | None = None) -> np.ndarray:
    """Molecular Debye intensity ``sum_{a != b} f_a f_b sin(q r_ab)/(q r_ab)``.

    Parameters
    ----------
    geoms : ndarray, shape (n_snapshots, n_atoms, 3)
        Coordinates in Angstrom.
    element_of_atom : ndarray of int, shape (n_atoms,)
    table : ndarray, shape (n_elements, n_q)
        Form factors per element.
    q : ndarray, shape (n_q,)
        Momentum transfer (inverse Angstrom), >= 0.
    backend : {"numba", "numpy"}, optional
        Default numba when installed.
    threads : int, optional
        Threads of the numba backend (default: usable cores).

    Returns
    -------
    ndarray, shape (n_snapshots, n_q)
    """
    geoms = np.ascontiguousarray(geoms, dtype=np.float64)
    q = np.ascontiguousarray(q, dtype=np.float64)
    ia, ib, ptype, fprod = pair_types(np.asarray(element_of_atom, dtype=np.int64), table)
    n = geoms.shape[0]
    out = np.zeros((n, q.size))
    if ia.size == 0 or n == 0:
        return out
    kernel = _numba_kernel() if backend in (None, "numba") else None
    if backend == "numba" and kernel is None:
        from ...errors import MissingDependencyError

        raise MissingDependencyError("backend='numba' needs numba; install "
                                     "'ensemblelab[fast]' or use backend='numpy'.")
    if backend not in (None, "numba", "numpy"):
        from ...errors import SchemaError

        raise SchemaError(f"The 'backend' parameter must be 'numba' or 'numpy'. Got "
                          f"{backend!r} instead.")
    if kernel is None:
        return _numpy_molecular(geoms, ia, ib, fprod[ptype], q)
    # the kernel sums A_t = sum sin(q r)/r per pair type and returns sum_t coef_t A_t
    # with coef_t = 2 F_t / q; at q = 0 (sin(q r)/(q r) = 1) the pair count is added here
    with np.errstate(divide="ignore", invalid="ignore"):
        invq = np.where(q > 0, 1.0 / np.where(q > 0, q, 1.0), 0.0)
    coef = np.ascontiguousarray(2.0 * fprod * invq[None, :])
    uniform = is_uniform(q)
    order = np.argsort(ptype, kind="stable")
    ia, ib = np.ascontiguousarray(ia[order]), np.ascontiguousarray(ib[order])
    tstart = np.searchsorted(ptype[order], np.arange(fprod.shape[0] + 1)).astype(np.int64)
    blocks = [(s, min(s + NUMBA_BLOCK, n)) for s in range(0, n, NUMBA_BLOCK)]
    n_threads = max(1, min(threads or usable_cores(), len(blocks)))
    if n_threads == 1:
        for s0, s1 in blocks:
            kernel(geoms, ia, ib, tstart, coef, q, uniform, out, s0, s1)
    else:
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(lambda st: kernel(geoms, ia, ib, tstart, coef, q, uniform, out,
                                            st[0], st[1]), blocks))
    zero = q == 0
    if np.any(zero):
        counts = np.bincount(ptype, minlength=fprod.shape[0]).astype(float)
        out[:, zero] += 2.0 * (counts[:, None] * fprod[:, zero]).sum(axis=0)[None, :]
    return out


def _numpy_molecular(geoms: np.ndarray, ia: np.ndarray, ib: np.ndarray, fpair: np.ndarray,
                     q: np.ndarray) -> np.ndarray:
    """numpy backend: loop over pairs, vectorised over snapshots (chunked) and q."""
    n = geoms.shape[0]
    out = np.zeros((n, q.size))
    for s0 in range(0, n, NUMPY_CHUNK):
        g = geoms[s0:s0 + NUMPY_CHUNK]
        r = np.linalg.norm(g[:, ia] - g[:, ib], axis=-1)  # (chunk, n_pairs)
        for p in range(ia.size):
            out[s0:s0 + NUMPY_CHUNK] += 2.0 * fpair[p][None, :] * np.sinc(
                r[:, p, None] * q[None, :] / math.pi)
    return out
