"""Array-level kernel of band intensities from indexed sticks (private; inputs are trusted).

The sticks are sorted by time-grid index and, within one index, by energy:
``starts[j]:starts[j + 1]`` holds the sticks of grid time ``j`` in increasing energy. A
band ``[lo, hi] x delay window`` then touches only the grid times where the delay-window
weight ``tw`` is not zero and, within each, the energy slice ``[lo - 9 s, hi + 9 s)``
found by bisection: no pass over the other sticks. Per stick the term is the one of
``contributions._region_per_snapshot`` (its naive twin, which the tests compare):
``w * ew(x) * dw(t)`` with the energy weight ``ew = Phi((hi - x) / s) - Phi((lo - x) / s)``
(exactly 1 further than 9 s inside the window and one-sided at each edge when some
stick lies there, as there) and the time weight ``dw`` interpolated between
neighbouring grid times by the stick's time fraction.

Two interchangeable implementations: a compiled pass (numba, the ``fast`` extra) and
numpy on the contiguous block of sticks inside the delay window (the fallback).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy.special import ndtr

__all__ = ["EDGE_SIGMAS", "index_sticks", "region_sums", "region_backend"]

#: sticks further than this many energy standard deviations inside the window have an
#: energy weight of exactly 1.0 in double precision (1 - Phi(9) ~ 1e-19; common practice)
EDGE_SIGMAS = 9.0

_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}


def index_sticks(tbin: np.ndarray, energy: np.ndarray, n_time: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Order of the sticks by (time index, energy) and the start of each time index.

    Parameters
    ----------
    tbin : ndarray of int, shape (n_sticks,)
        Time-grid index of each stick (0 <= tbin < n_time).
    energy : ndarray of float, shape (n_sticks,)
        Stick energies (eV).
    n_time : int
        Size of the time grid.

    Returns
    -------
    order : ndarray of int, shape (n_sticks,)
        Sticks sorted by time index, then energy (ties keep the stick order).
    starts : ndarray of int64, shape (n_time + 1,)
        ``order[starts[j]:starts[j + 1]]`` are the sticks of grid time ``j``.
    """
    starts = np.zeros(n_time + 1, dtype=np.int64)
    np.cumsum(np.bincount(tbin, minlength=n_time)[:n_time], out=starts[1:])
    if _compiled() is not None:  # counting sort by time index, then each slice by energy
        out = np.empty(tbin.size, dtype=np.int64)
        _COMPILED["index"](np.ascontiguousarray(tbin, dtype=np.int64),
                           np.ascontiguousarray(energy, dtype=np.float64), starts, out)
        return out, starts
    order = np.argsort(energy, kind="stable")
    return order[np.argsort(tbin[order], kind="stable")], starts  # stable: energy order kept


def _index_kernel(tbin, energy, starts, order):  # pragma: no cover - compiled by numba
    """``order``: sticks by time index (a counting sort, stable), each slice by energy."""
    fill = starts[:-1].copy()
    for i in range(tbin.shape[0]):
        j = tbin[i]
        order[fill[j]] = i
        fill[j] += 1
    for j in range(starts.shape[0] - 1):
        s = starts[j]
        e = starts[j + 1]
        if e - s > 1:
            part = order[s:e].copy()
            o = np.argsort(energy[part], kind="mergesort")  # stable: ties keep stick order
            order[s:e] = part[o]


def _has_interior(energy, starts, lo, hi, sigma):  # pragma: no cover - compiled by numba
    """Whether any stick lies further than 9 sigma inside ``[lo, hi]`` (any time)."""
    span = 9.0 * sigma
    a_hi = lo + span
    b_lo = hi - span
    if not a_hi < b_lo:
        return False
    for j in range(starts.shape[0] - 1):
        s = starts[j]
        e = starts[j + 1]
        if e > s:
            seg = energy[s:e]
            if np.searchsorted(seg, b_lo) > np.searchsorted(seg, a_hi):
                return True
    return False


def _region_kernel(energy, weight, snap, tfrac, has_frac, starts, tw, lo, hi, sigma, floor,
                   interior, out):  # pragma: no cover - compiled by numba
    """Add every stick's band term to ``out[snap]`` (see the module docstring).

    Sticks at or below `floor` are left out. With `interior` (a stick lies further than
    9 sigma inside the window, so the window is wider than 18 sigma) each edge takes its
    one-sided error function and the inside weighs 1, as the naive twin does.
    """
    n_time = tw.shape[0]
    span = 9.0 * sigma
    a_lo = lo - span
    a_hi = lo + span
    b_lo = hi - span
    b_hi = hi + span
    inv = 1.0 / (sigma * math.sqrt(2.0))
    for j in range(n_time):
        t0 = tw[j]
        t1 = tw[j + 1] if j + 1 < n_time else t0
        if t0 == 0.0 and (not has_frac or t1 == 0.0):
            continue
        s = starts[j]
        e = starts[j + 1]
        if e <= s:
            continue
        seg = energy[s:e]
        i0 = s + max(np.searchsorted(seg, a_lo), np.searchsorted(seg, floor, side="right"))
        i1 = s + np.searchsorted(seg, b_hi)
        for i in range(i0, i1):
            x = energy[i]
            if not interior:
                ew = 0.5 * math.erfc((x - hi) * inv) - 0.5 * math.erfc((x - lo) * inv)
            elif x < a_hi:
                ew = 0.5 * math.erfc((lo - x) * inv)
            elif x < b_lo:
                ew = 1.0
            else:
                ew = 0.5 * math.erfc((x - hi) * inv)
            if has_frac:
                f = tfrac[i]
                dw = (1.0 - f) * t0 + f * t1
            else:
                dw = t0
            out[snap[i]] += weight[i] * ew * dw


def _compiled() -> Callable[..., None] | None:
    """The compiled :func:`_region_kernel`, or None without numba."""
    if "kernel" not in _COMPILED:
        with _LOCK:
            if "kernel" not in _COMPILED:
                try:
                    import numba
                except ImportError:
                    _COMPILED["kernel"] = None
                else:
                    jit = numba.njit(cache=True, nogil=True, boundscheck=False)
                    _COMPILED["interior"] = jit(_has_interior)
                    _COMPILED["index"] = jit(_index_kernel)
                    _COMPILED["kernel"] = jit(_region_kernel)
    return _COMPILED["kernel"]


def region_backend(backend: str = "auto") -> str:
    """The backend :func:`region_sums` uses for `backend` ("auto": numba when installed)."""
    if backend not in ("auto", "numba", "numpy"):
        raise ValueError(f"backend must be 'auto', 'numba' or 'numpy'; got {backend!r}.")
    if backend == "auto":
        return "numba" if _compiled() is not None else "numpy"
    return backend


def _numpy_sums(energy: np.ndarray, weight: np.ndarray, snap: np.ndarray,
                tfrac: np.ndarray | None, starts: np.ndarray, tw: np.ndarray, lo: float,
                hi: float, sigma: float | Callable[[np.ndarray], np.ndarray], shift: float,
                floor: float, n_snapshots: int) -> np.ndarray:
    """numpy twin of the kernel on the block of sticks inside the delay window."""
    n_time = tw.size
    live = tw != 0.0
    if tfrac is not None:  # a stick also takes the weight of the next grid time
        live = live | np.r_[tw[1:] != 0.0, False]
    hit = np.flatnonzero(live)
    if hit.size == 0:
        return np.zeros(n_snapshots)
    j0, j1 = int(hit[0]), int(hit[-1]) + 1
    s, e = int(starts[j0]), int(starts[j1])
    tb = np.repeat(np.arange(j0, j1), np.diff(starts[j0:j1 + 1]))
    x = energy[s:e]
    if callable(sigma):  # energy-dependent width: every stick, both error functions
        keep = np.flatnonzero(x > floor)
        xs = x[keep] + shift
        sig = np.asarray(sigma(xs), dtype=float)
        ew = ndtr((hi + shift - xs) / sig) - ndtr((lo + shift - xs) / sig)
    else:
        span = EDGE_SIGMAS * sigma
        keep = np.flatnonzero((x >= lo - span) & (x < hi + span) & (x > floor))
        xk = x[keep]
        if np.any((energy >= lo + span) & (energy < hi - span)):  # as the naive twin
            ew = np.where(xk < lo + span, ndtr((xk - lo) / sigma),
                          np.where(xk < hi - span, 1.0, ndtr((hi - xk) / sigma)))
        else:
            ew = ndtr((hi - xk) / sigma) - ndtr((lo - xk) / sigma)
    tbk = tb[keep]
    if tfrac is None:
        dw = tw[tbk]
    else:
        f = tfrac[s:e][keep]
        dw = (1.0 - f) * tw[tbk] + f * tw[np.minimum(tbk + 1, n_time - 1)]
    return np.bincount(snap[s:e][keep], weight[s:e][keep] * ew * dw, minlength=n_snapshots)


def region_sums(energy: np.ndarray, weight: np.ndarray, snap: np.ndarray,
                tfrac: np.ndarray | None, starts: np.ndarray, tw: np.ndarray, *, lo: float,
                hi: float, sigma: float | Callable[[np.ndarray], np.ndarray],
                n_snapshots: int, shift: float = 0.0, floor: float = -np.inf,
                backend: str = "auto") -> np.ndarray:
    """Band intensity of every snapshot from sticks indexed by :func:`index_sticks`.

    Parameters
    ----------
    energy, weight : ndarray of float, shape (n_sticks,)
        Stick energies (eV, in the frame the sticks were made in) and weights, in the
        indexed order.
    snap : ndarray of int, shape (n_sticks,)
        Snapshot row of each stick.
    tfrac : ndarray of float, shape (n_sticks,), or None
        Fraction of each stick towards the next grid time (None: on grid times).
    starts : ndarray of int64, shape (n_time + 1,)
        From :func:`index_sticks`.
    tw : ndarray of float, shape (n_time,)
        Normalised delay-window weight of every grid time.
    lo, hi : float
        The energy window (eV) in the sticks' frame (the map's window minus `shift`).
    sigma : float or callable
        Energy standard deviation of a stick (eV), or a function of the stick energy in
        the map's frame (then the numpy path).
    n_snapshots : int
        Length of the result.
    shift : float
        Map-frame energy minus stick-frame energy (eV); used only by a callable `sigma`.
    floor : float
        Sticks at or below this energy (eV, sticks' frame) are left out (channels a
        fresh model of the map's probe would not hold).
    backend : {"auto", "numba", "numpy"}

    Returns
    -------
    ndarray of float, shape (n_snapshots,)
    """
    if callable(sigma) or region_backend(backend) == "numpy":
        return _numpy_sums(energy, weight, snap, tfrac, starts, tw, lo, hi, sigma, shift,
                           floor, n_snapshots)
    kernel = _compiled()
    assert kernel is not None  # region_backend said numba
    out = np.zeros(n_snapshots)
    frac = tfrac if tfrac is not None else np.zeros(1)
    lo, hi, sigma = float(lo), float(hi), float(sigma)
    interior = bool(_COMPILED["interior"](energy, starts, lo, hi, sigma))
    kernel(energy, weight, snap, frac, tfrac is not None, starts,
           np.ascontiguousarray(tw, dtype=np.float64), lo, hi, sigma, float(floor), interior,
           out)
    return out
