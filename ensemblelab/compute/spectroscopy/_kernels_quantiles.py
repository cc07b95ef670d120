"""Percentile intervals and standard errors of replicate maps (private).

:func:`percentile_summary` gives, per pixel, the quantiles of ``np.quantile``
(``method="linear"``) and the standard error ``std(ddof=1)`` of the replicates. The
compiled kernel (numba, when installed) keeps per pixel only the order statistics it
needs: the ``k`` smallest values for the lower quantile and the ``k'`` largest for the
upper one, in small sorted buffers (most values are rejected by one comparison; a
pixel whose buffers would be long is sorted instead). Sums are numpy's pairwise
summation (blocks of eight partial sums, halves above 128 values), so the standard
error is bitwise that of ``ndarray.std`` on float64 data. The numpy twin
(:func:`_summary_numpy`, one ``np.partition`` per pixel) is the fallback and the
reference of the tests.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from . import _kernels_deposit as KD

__all__ = ["percentile_summary", "SORT_ABOVE", "MIN_VALUES_PER_THREAD"]

#: a pixel whose order-statistic buffers would exceed this many values is sorted instead
SORT_ABOVE = 48

#: replicate values per thread below which the compiled kernel runs on one thread
MIN_VALUES_PER_THREAD = 1 << 18


def _pw_leaf(x, off, n):  # pragma: no cover - compiled by numba
    """numpy's pairwise sum of ``x[off:off + n]``, ``n <= 128``, as float64."""
    if n < 8:
        res = 0.0
        for i in range(n):
            res += np.float64(x[off + i])
        return res
    if n <= 128:
        r0, r1 = np.float64(x[off]), np.float64(x[off + 1])
        r2, r3 = np.float64(x[off + 2]), np.float64(x[off + 3])
        r4, r5 = np.float64(x[off + 4]), np.float64(x[off + 5])
        r6, r7 = np.float64(x[off + 6]), np.float64(x[off + 7])
        i = 8
        stop = n - n % 8
        while i < stop:
            j = off + i
            r0 += np.float64(x[j])
            r1 += np.float64(x[j + 1])
            r2 += np.float64(x[j + 2])
            r3 += np.float64(x[j + 3])
            r4 += np.float64(x[j + 4])
            r5 += np.float64(x[j + 5])
            r6 += np.float64(x[j + 6])
            r7 += np.float64(x[j + 7])
            i += 8
        res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
        while i < n:
            res += np.float64(x[off + i])
            i += 1
        return res


def _pw(x, off, n, st):  # pragma: no cover - compiled by numba
    """numpy's pairwise sum of ``x[off:off + n]`` as float64: the same order of additions
    (halves rounded to multiples of 8 above 128 values; left + right), without recursion
    (an explicit stack ``st``, shape (64, 4): offset, count, state, left sum)."""
    if n <= 128:
        return _pw_leaf(x, off, n)
    h = n // 2
    h -= h % 8
    if n - h <= 128:  # one split (up to 263 values): no stack
        return _pw_leaf(x, off, h) + _pw_leaf(x, off + h, n - h)
    top = 0
    st[0, 0], st[0, 1], st[0, 2] = off, n, 0.0
    have = False
    v = 0.0
    while True:
        if have:  # v is the sum of the child just finished
            if top < 0:
                return v
            if st[top, 2] == 0.0:  # left done: keep it, do the right half
                st[top, 3] = v
                st[top, 2] = 1.0
                m = int(st[top, 1])
                h = m // 2
                h -= h % 8
                st[top + 1, 0], st[top + 1, 1], st[top + 1, 2] = st[top, 0] + h, m - h, 0.0
                top += 1
                have = False
            else:  # both done
                v = st[top, 3] + v
                top -= 1
        else:
            o = int(st[top, 0])
            m = int(st[top, 1])
            if m <= 128:
                v = _pw_leaf(x, o, m)
                top -= 1
                have = True
            else:
                h = m // 2
                h -= h % 8
                st[top + 1, 0], st[top + 1, 1], st[top + 1, 2] = o, h, 0.0
                top += 1


def _summary_rows(x, out, p0, p1, idx, gam, k_lo, k_hi, sort
                  ):  # pragma: no cover - compiled by numba
    """Quantiles and standard error of pixels ``p0:p1`` of ``x`` (pixel, replicate).

    ``idx`` (4,): sorted positions (a, b) of the lower then the upper quantile, ``gam``
    (2,) their interpolation weights; ``k_lo``/``k_hi`` the smallest/largest values kept
    (sort: sort the whole pixel instead). ``out`` (3, n_pixels): lower, upper, std.
    """
    n = x.shape[1]
    buf_lo = np.empty(max(k_lo, 1))
    buf_hi = np.empty(max(k_hi, 1))
    dev = np.empty(n)
    st = np.empty((64, 4))
    for p in range(p0, p1):
        row = x[p]
        s = _pw(row, 0, n, st)
        mean = s / n
        for i in range(n):
            d = np.float64(row[i]) - mean
            dev[i] = d * d
        out[2, p] = math.sqrt(_pw(dev, 0, n, st) / max(n - 1, 0))
        nan = False
        if s != s:  # a NaN value, or +inf and -inf
            for i in range(n):
                if row[i] != row[i]:
                    nan = True
                    break
        if nan:  # as np.quantile: NaN when any replicate is NaN
            out[0, p] = np.nan
            out[1, p] = np.nan
            continue
        if sort:
            for i in range(n):
                dev[i] = row[i]
            dev.sort()
            va, vb = dev[idx[0]], dev[idx[1]]
            wa, wb = dev[idx[2]], dev[idx[3]]
        else:
            buf_lo[:] = np.inf  # +inf stands for values not seen (exact: order holds)
            buf_hi[:] = -np.inf
            top = np.inf  # largest of the k_lo smallest so far
            bot = -np.inf  # smallest of the k_hi largest so far
            for i in range(n):
                v = np.float64(row[i])
                if v < top:
                    j = k_lo - 1
                    while j > 0 and buf_lo[j - 1] > v:
                        buf_lo[j] = buf_lo[j - 1]
                        j -= 1
                    buf_lo[j] = v
                    top = buf_lo[k_lo - 1]
                if v > bot:
                    j = 0
                    while j < k_hi - 1 and buf_hi[j + 1] < v:
                        buf_hi[j] = buf_hi[j + 1]
                        j += 1
                    buf_hi[j] = v
                    bot = buf_hi[0]
            va, vb = buf_lo[idx[0]], buf_lo[idx[1]]
            base = n - k_hi  # buf_hi[0] is order statistic n - k_hi
            wa, wb = buf_hi[idx[2] - base], buf_hi[idx[3] - base]
        for q in range(2):
            a, b = (va, vb) if q == 0 else (wa, wb)
            g = gam[q]
            diff = b - a  # as numpy's lerp: from the nearer end
            out[q, p] = a + diff * g if g < 0.5 else b - diff * (1.0 - g)


_COMPILED: dict[str, Any] = {}


def _compiled() -> Callable[..., Any] | None:
    """The numba-compiled :func:`_summary_rows` (None without numba)."""
    global _pw_leaf, _pw
    if not KD.numba_available():
        return None
    if "rows" not in _COMPILED:
        import numba

        jit = numba.njit(cache=True, nogil=True, fastmath=False, boundscheck=False,
                         error_model="numpy")
        _pw_leaf = jit(_pw_leaf)  # globals of the kernel, resolved by name
        _pw = jit(_pw)
        _COMPILED["rows"] = jit(_summary_rows)
    return _COMPILED["rows"]


def _positions(n: int, ci: float) -> list[tuple[float, int, int]]:
    """(position, lower index, upper index) of the two quantiles, as ``np.quantile``."""
    alpha = (1.0 - ci) / 2.0
    pos = [q * (n - 1) for q in (alpha, 1.0 - alpha)]  # np.quantile's "linear" method
    lo_i = [min(int(math.floor(p)), n - 1) for p in pos]
    return [(p, i, min(i + 1, n - 1)) for p, i in zip(pos, lo_i, strict=True)]


def _summary_numpy(r: np.ndarray, ci: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Naive twin: one ``np.partition`` per pixel; ``r`` float64, replicates last."""
    plan = _positions(r.shape[-1], ci)
    part = np.partition(r, sorted({k for _, i, j in plan for k in (i, j)}), axis=-1)
    qs = []
    for p, i, j in plan:
        a, b, g = part[..., i], part[..., j], p - i
        diff = b - a  # as numpy's lerp: from the nearer end
        qs.append(a + diff * g if g < 0.5 else b - diff * (1.0 - g))
    nan = np.isnan(r).any(axis=-1)  # np.quantile: NaN when any replicate is NaN
    qs = [np.where(nan, np.nan, q) for q in qs]
    return qs[0], qs[1], r.std(axis=-1, ddof=1)


def _summary_numba(kernel: Callable[..., Any], r: np.ndarray, ci: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The compiled summary; ``r`` float32/float64, replicates last."""
    n = r.shape[-1]
    x = np.ascontiguousarray(r).reshape(-1, n)
    n_pix = x.shape[0]
    (p_lo, i0, j0), (p_hi, i1, j1) = _positions(n, ci)
    idx = np.array([i0, j0, i1, j1], np.int64)
    gam = np.array([p_lo - i0, p_hi - i1])
    k_lo, k_hi = j0 + 1, n - i1
    sort = max(k_lo, k_hi) > SORT_ABOVE
    out = np.empty((3, n_pix))
    n_threads = max(1, min(KD.usable_cores(), (n_pix * n) // MIN_VALUES_PER_THREAD,
                           n_pix))
    edges = np.linspace(0, n_pix, n_threads + 1).astype(np.int64).tolist()

    def run(t: int) -> None:
        kernel(x, out, edges[t], edges[t + 1], idx, gam, k_lo, k_hi, sort)

    if n_threads == 1:
        run(0)
    else:  # disjoint pixel ranges
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(run, range(n_threads)))
    shape = r.shape[:-1]
    return out[0].reshape(shape), out[1].reshape(shape), out[2].reshape(shape)


def percentile_summary(reps: np.ndarray, estimate: np.ndarray, ci: float, *, axis: int = 0,
                       backend: str = "auto") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Percentile interval and relative standard error from replicate maps.

    The quantiles are those of ``np.quantile(..., method="linear")`` (linear
    interpolation between order statistics; NaN for a pixel with a NaN replicate), the
    standard error that of ``std(ddof=1)``, both computed in float64. Fastest with the
    replicates on the last, contiguous axis (another axis is moved there by a copy).

    Parameters
    ----------
    reps : ndarray
        Replicate values (float32 or float64; others are converted to float64), the
        replicates along ``axis``.
    estimate : ndarray
        The map itself (the shape of ``reps`` without ``axis``).
    ci : float
        Confidence level.
    axis : int
        Axis of the replicates.
    backend : {"auto", "numba", "numpy"}
        Compiled kernel (when numba is installed) or one ``np.partition`` per pixel.

    Returns
    -------
    lower, upper : ndarray of float64, shape of ``estimate``
        The ``(1 - ci) / 2`` and ``(1 + ci) / 2`` quantiles over the replicates.
    rel_se : ndarray of float64, shape of ``estimate``
        Bootstrap standard error over ``|estimate|``; NaN where the estimate is 0.
    """
    r = np.moveaxis(np.asarray(reps), axis, -1)
    if r.dtype not in (np.float32, np.float64):
        r = r.astype(np.float64)
    if r.shape[-1] == 0:
        raise ValueError("No replicates along the given axis.")
    kernel = _compiled() if backend in ("auto", "numba") else None
    if kernel is None:
        lo, hi, se = _summary_numpy(r.astype(np.float64, copy=False), ci)
    else:
        lo, hi, se = _summary_numba(kernel, r, ci)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(estimate != 0, se / np.abs(estimate), np.nan)
    return lo, hi, rel
