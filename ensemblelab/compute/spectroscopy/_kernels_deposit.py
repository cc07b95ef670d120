"""Array-level kernels depositing TRPES sticks into Taylor-moment histograms (private).

Idea. Every stick (one snapshot and one open ionisation channel) is a Gaussian
``w G(E - x; Gamma)`` in kinetic energy, all with the same FWHM ``Gamma`` for a
given probe and resolution, sitting at the snapshot's time bin. Instead of
evaluating ``n_sticks x n_energies`` Gaussians the sticks are deposited into a fine
uniform energy grid (spacing ``h`` a small fraction of ``Gamma``), keeping ``order``
Taylor moments per bin ``M_k[b] = sum w (delta / h)^k`` with ``delta = x - c_b`` the
offset from the bin centre; :mod:`._kernels_broadening` turns them into a map. The
default, 8 moments at 4 bins per FWHM, fills exactly one 64-byte cache line per fine
bin (the accumulator is aligned), so a stick touches one line.

Two interchangeable implementations (``backend``):

* ``"numba"`` (used by default when the optional ``fast`` extra, numba, is
  installed): one compiled pass over the stick arrays per thread, depositing all
  ``order`` moments of a stick into a contiguous row of a per-thread accumulator laid
  out (component, time, fine bin, moment); no temporaries of size ``n_sticks``. The
  pass is software-pipelined (each stick's cell is prefetched ``PREFETCH_AHEAD``
  sticks before it is added, see :func:`_dep_range`) and, for 8 moments, adds a
  stick with one 8-wide vector load/add/store. The threads are plain Python threads
  running GIL-free compiled code, so the kernel is safe to call from several threads
  at once (e.g. Dask workers). numba is imported on the first call only.
* ``"numpy"``: chunked ``np.bincount`` per moment (the fallback without numba).

Both return the same numbers up to summation order (tests compare them to 1e-12).
"""

from __future__ import annotations

import os
import threading
import weakref
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ._intrinsics import add8_scalar, make_prefetch, pick_add8

__all__ = [
    "DEFAULT_CHUNK",
    "BACKENDS",
    "numba_available",
    "usable_cores",
    "deposit_moments",
    "deposit_counts",
    "pooled_accumulators",
    "release_accumulators",
]

#: sticks per chunk in :func:`deposit_moments` (~2 MB per float64 buffer)
DEFAULT_CHUNK = 1 << 18

#: accepted values of the ``backend`` argument of :func:`deposit_moments`
BACKENDS = ("auto", "numba", "numpy")

#: fewest sticks per thread before a second thread is worth its accumulator
MIN_STICKS_PER_THREAD = 1 << 19

#: numba backend: sticks ahead whose accumulator cells are prefetched (24 was slower,
#: 32, 48 and 64 alike on 10^8 random-order sticks in benchmarks/bench_trpes.py)
PREFETCH_AHEAD = 48

#: numba backend: slots of the ring of prepared sticks (a power of two > PREFETCH_AHEAD)
RING = 64


def _dep_range(tbin, energy, weight, comp, tfrac, acc, lo, hi, n_time, n_fine, n_comp,
               order, shift, inv_h):  # pragma: no cover - compiled by numba
    """Deposit sticks ``lo:hi`` into ``acc`` (flat, layout comp/time/fine/moment).

    `comp` / `tfrac` may be None ("no components" / "no time split"); numba compiles a
    separate specialisation for each combination. Without a time split the loop is
    software-pipelined: stick ``i + PREFETCH_AHEAD`` is checked, its accumulator cell
    computed and prefetched and the result parked in a small ring, while stick ``i``
    (taken from the ring) is added, so the memory latency of the random access
    overlaps the work. Returns the number of sticks out of range (they add nothing;
    the caller raises).
    """
    fn = float(n_fine)
    # 8 moments on a 64-byte aligned accumulator: a bin is one cache line
    two_lines = order != 8 or acc.ctypes.data % 64 != 0
    bad = 0
    if tfrac is None:
        ring_r = np.zeros(RING, np.uint64)
        ring_d = np.zeros(RING)
        ring_v = np.zeros(RING)
        for it in range(lo, hi + PREFETCH_AHEAD):
            if it < hi:  # prepare stick `it` (unsigned indices: no negative-index handling)
                ui = np.uint64(it)
                p = energy[ui] * inv_h + shift  # (x - e_lo)/h + 1/2
                tb = tbin[ui]
                v = weight[ui]
                if comp is None:
                    c = 0
                    ok = p >= 0.0 and p < fn and tb >= 0 and tb < n_time
                else:
                    c = comp[ui]
                    ok = (p >= 0.0 and p < fn and tb >= 0 and tb < n_time and c >= 0
                          and c < n_comp)
                if not ok:  # adds zero to cell 0 (the caller raises anyway)
                    bad += 1
                    p = 0.5
                    tb = 0
                    c = 0
                    v = 0.0
                b = np.int64(p)  # p >= 0: truncation = floor = nearest bin centre
                r = np.uint64(((c * n_time + tb) * n_fine + b) * order)
                slot = np.uint64(it & (RING - 1))
                ring_r[slot] = r
                ring_d[slot] = p - b - 0.5  # delta / h in [-1/2, 1/2)
                ring_v[slot] = v
                _prefetch(acc, r)
                if two_lines:
                    _prefetch(acc, r + np.uint64(order - 1))
            i = it - PREFETCH_AHEAD
            if i >= lo:  # add stick i
                slot = np.uint64(i & (RING - 1))
                row = ring_r[slot]
                d = ring_d[slot]
                v = ring_v[slot]
                if order == 8:
                    _add8(acc, row, v, d)
                elif order == 6:
                    d2 = d * d
                    d3 = d2 * d
                    v3 = v * d3
                    acc[row] += v
                    acc[row + np.uint64(1)] += v * d
                    acc[row + np.uint64(2)] += v * d2
                    acc[row + np.uint64(3)] += v3
                    acc[row + np.uint64(4)] += v3 * d
                    acc[row + np.uint64(5)] += v3 * d2
                else:
                    for k in range(order):
                        acc[row + np.uint64(k)] += v
                        v *= d
        return bad
    row_t = n_fine * order
    stop = hi - PREFETCH_AHEAD
    for i in range(lo, hi):
        if i < stop:  # prefetch the cells of stick j (any address is harmless)
            j = i + PREFETCH_AHEAD
            pj = energy[j] * inv_h + shift
            pj = pj if pj >= 0.0 else 0.0
            pj = pj if pj < fn else 0.0  # also catches NaN
            gj = tbin[j] if comp is None else comp[j] * n_time + tbin[j]
            rj = np.uint64((gj * n_fine + np.int64(pj)) * order)
            _prefetch(acc, rj)
            _prefetch(acc, rj + np.uint64(row_t))
            if two_lines:
                _prefetch(acc, rj + np.uint64(order - 1))
                _prefetch(acc, rj + np.uint64(row_t + order - 1))
        p = energy[i] * inv_h + shift
        tb = tbin[i]
        if comp is None:
            ok = p >= 0.0 and p < fn and tb >= 0 and tb < n_time
            g = tb
        else:
            c = comp[i]
            ok = p >= 0.0 and p < fn and tb >= 0 and tb < n_time and c >= 0 and c < n_comp
            g = c * n_time + tb
        if not ok:
            bad += 1
            continue
        b = np.int64(p)
        d = p - b - 0.5
        row = np.uint64((g * n_fine + b) * order)
        v = weight[i]
        f = tfrac[i]
        if f > 0.0:  # a fraction f to the next time bin
            if tb + 1 >= n_time:
                bad += 1
                continue
            v0 = v * (1.0 - f)
            v1 = v * f
            r1 = row + np.uint64(row_t)
            for k in range(order):
                acc[row + np.uint64(k)] += v0
                acc[r1 + np.uint64(k)] += v1
                v0 *= d
                v1 *= d
        else:
            for k in range(order):
                acc[row + np.uint64(k)] += v
                v *= d
    return bad


def _prefetch(arr, index):  # pragma: no cover - replaced by a numba intrinsic
    """Hint the CPU to fetch ``arr[index]`` into cache (no effect on results)."""


#: replaced by the vector intrinsic (or the compiled scalar version) on first use
_add8 = add8_scalar


_NUMBA_LOCK = threading.Lock()
_NUMBA: dict[str, Callable[..., int] | None] = {}


def _numba_kernel() -> Callable[..., int] | None:
    """The compiled :func:`_dep_range`, or None when numba is not installed."""
    global _prefetch, _add8
    if "dep" not in _NUMBA:
        with _NUMBA_LOCK:
            if "dep" not in _NUMBA:
                try:
                    import numba
                except ImportError:
                    _NUMBA["dep"] = None
                else:
                    _prefetch = make_prefetch(numba)  # globals of _dep_range
                    _add8 = pick_add8(numba)
                    _NUMBA["dep"] = numba.njit(cache=True, nogil=True, boundscheck=False)(
                        _dep_range)
    return _NUMBA["dep"]


def pooled_accumulators(size: int, count: int) -> list[np.ndarray]:
    """`count` 64-byte aligned float64 accumulators of `size` from the pool (contents
    undefined: zero them in the thread that uses them, as :func:`_deposit_numba` does).

    The first is leased (it re-enters the pool when nothing refers to it any more: return
    it, or views of it, to callers); hand the others back with
    :func:`release_accumulators`. Reused memory saves the page faults of fresh memory.
    """
    taken = _scratch_take(size, count)
    return [_lease(taken[0])] + taken[1:] if taken else []


def release_accumulators(arrays: list[np.ndarray]) -> None:
    """Give scratch accumulators from :func:`pooled_accumulators` back to the pool."""
    _scratch_give(arrays)


def numba_available() -> bool:
    """True when the compiled deposit kernel can be used (the ``fast`` extra)."""
    return _numba_kernel() is not None


def usable_cores() -> int:
    """Cores this process may run on, at most 8."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, 8))


def _default_threads(n: int) -> int:
    return max(1, min(usable_cores(), n // MIN_STICKS_PER_THREAD))


def _empty_aligned(size: int, align: int = 64) -> np.ndarray:
    """An uninitialised float64 array whose data start on an `align`-byte boundary.

    With 8 moments per fine bin every bin is then exactly one cache line.
    """
    pad = align // 8
    buf = np.empty(size + pad)
    off = (-buf.ctypes.data % align) // 8
    return buf[off:off + size]


#: most bytes of scratch accumulators kept between calls of the numba backend
SCRATCH_BYTES = 1 << 27

_SCRATCH_LOCK = threading.Lock()
_SCRATCH: list[np.ndarray] = []  # free per-thread accumulators, oldest first


def _scratch_take(size: int, count: int) -> list[np.ndarray]:
    """`count` aligned float64 arrays of `size` (reused when free ones fit; contents
    undefined). Reusing them saves the page faults of fresh memory on every map.

    Callers hand them back with :func:`_scratch_give` (directly, or through a
    ``weakref.finalize`` on an array they return, so that a buffer re-enters the pool
    only once nothing refers to it any more)."""
    out: list[np.ndarray] = []
    with _SCRATCH_LOCK:
        keep: list[np.ndarray] = []
        for a in _SCRATCH:  # (by identity: arrays do not compare as list items)
            (out if len(out) < count and a.size == size else keep).append(a)
        _SCRATCH[:] = keep
    return out + [_empty_aligned(size) for _ in range(count - len(out))]


def _lease(raw: np.ndarray) -> np.ndarray:
    """An array on the memory of pool buffer `raw` that gives `raw` back to the pool
    once it and every view of it are gone.

    NumPy points a view's ``base`` at the array that owns the memory, skipping
    intermediate views, so a finaliser on a plain view would fire while views of it
    live on. An array made by ``np.frombuffer`` has a non-array base and stays the
    ``base`` of all its views, so its finaliser runs only when the last one dies.
    """
    # ndarray exports the buffer protocol; numpy's stubs lack __buffer__ below Python 3.12
    out = np.frombuffer(memoryview(raw), dtype=np.float64)  # type: ignore[arg-type]
    weakref.finalize(out, _scratch_give, [raw])
    return out


def _scratch_give(arrays: list[np.ndarray]) -> None:
    """Return arrays from :func:`_scratch_take`, keeping at most ``SCRATCH_BYTES``."""
    with _SCRATCH_LOCK:
        _SCRATCH.extend(arrays)
        total = sum(a.nbytes for a in _SCRATCH)
        while _SCRATCH and total > SCRATCH_BYTES:
            total -= _SCRATCH.pop(0).nbytes


def _deposit_numba(kernel, tbin, energy, weight, comp, tfrac, *, n_time, e_lo, h, n_fine,
                   order, n_comp, n_threads) -> np.ndarray:
    size = n_comp * n_time * n_fine * order
    n = energy.shape[0]
    inv_h = 1.0 / h
    shift = 0.5 - e_lo * inv_h
    tbin = np.ascontiguousarray(tbin)
    energy = np.ascontiguousarray(energy, dtype=np.float64)
    weight = np.ascontiguousarray(weight, dtype=np.float64)
    if comp is not None:
        comp = np.ascontiguousarray(comp)
        if comp.dtype.kind not in "iu":
            comp = comp.astype(np.int64)
    if tfrac is not None:
        tfrac = np.ascontiguousarray(tfrac, dtype=np.float64)
    if tbin.dtype.kind not in "iu":
        tbin = tbin.astype(np.int64)
    n_threads = _default_threads(n) if n_threads is None else max(1, min(int(n_threads), n))
    bounds = [t * n // n_threads for t in range(n_threads + 1)]
    # thread 0's accumulator is the result, the others are scratch: all come from the
    # pool of freed accumulators, and the result goes back to it when the caller lets
    # it go (fresh memory costs a page fault per 4 KiB on first touch: 2-20 ms for the
    # 7.6 MB of a 600 x 300 map on the 2-core development VM, more than the deposit of
    # 10^6 sticks)
    taken = _scratch_take(size, n_threads)
    accs = [_lease(taken[0])] + taken[1:]

    def run(t: int) -> int:
        # zero in order (fresh pages fault in sequentially, several times cheaper than
        # the kernel's random first touch), in the thread that will use the memory
        accs[t].fill(0.0)
        return kernel(tbin, energy, weight, comp, tfrac, accs[t], bounds[t], bounds[t + 1],
                      n_time, n_fine, n_comp, order, shift, inv_h)

    out = accs[0]
    if n_threads == 1:
        bad = run(0)
    else:
        try:
            cuts = [t * size // n_threads for t in range(n_threads + 1)]

            def run_sum(t: int) -> None:  # out = accs[0] + accs[1] + ..., in this order
                sl = slice(cuts[t], cuts[t + 1])
                for a in accs[1:]:
                    out[sl] += a[sl]

            with ThreadPoolExecutor(n_threads) as pool:
                bad = sum(pool.map(run, range(n_threads)))
                if not bad:
                    list(pool.map(run_sum, range(n_threads)))
        finally:
            _scratch_give(taken[1:])
    if bad:
        raise ValueError(
            f"deposit_moments: {bad} stick(s) outside the grid (time bin in [0, {n_time}), "
            f"component in [0, {n_comp}), energy in [{e_lo - h / 2}, {e_lo + (n_fine - 0.5) * h})"
            "). Hint: size the fine grid from the stick energies.")
    # a view with the documented axis order (moment, comp, time, fine bin)
    return out.reshape(n_comp, n_time, n_fine, order).transpose(3, 0, 1, 2)


def deposit_moments(
    tbin: np.ndarray,
    energy: np.ndarray,
    weight: np.ndarray,
    *,
    n_time: int,
    e_lo: float,
    h: float,
    n_fine: int,
    order: int,
    comp: np.ndarray | None = None,
    n_comp: int = 1,
    tfrac: np.ndarray | None = None,
    chunk: int = DEFAULT_CHUNK,
    backend: str = "auto",
    n_threads: int | None = None,
) -> np.ndarray:
    """Deposit sticks into Taylor-moment histograms.

    Parameters
    ----------
    tbin : ndarray of int, shape (n_sticks,)
        Time bin of each stick in [0, n_time).
    energy, weight : ndarray, shape (n_sticks,)
        Stick position (eV) and weight.
    n_time, n_fine : int
        Number of time and fine energy bins; fine bin ``b`` is centred at
        ``e_lo + b * h``. Energies outside ``[e_lo - h/2, e_lo + (n_fine - 1/2) h)``
        must not occur (callers size the grid).
    order : int
        Number of moments (1 = nearest bin only).
    comp : ndarray of int, shape (n_sticks,), optional
        Component of each stick in [0, n_comp).
    tfrac : ndarray, shape (n_sticks,), optional
        Linear time interpolation: a fraction ``f`` of the stick goes to
        ``tbin + 1`` and ``1 - f`` to ``tbin`` (``tbin + 1 < n_time`` wherever f > 0).
    chunk : int
        Sticks per chunk (numpy backend).
    backend : {"auto", "numba", "numpy"}
        ``"auto"`` uses numba when installed, else numpy.
    n_threads : int, optional
        Threads of the numba backend (default: the usable cores, at most 8, and one
        per ``MIN_STICKS_PER_THREAD`` sticks); each has its own accumulator.

    Returns
    -------
    ndarray, shape (order, n_comp, n_time, n_fine)
        With the numba backend a transposed view of a (n_comp, n_time, n_fine, order)
        array (the moments of one bin adjacent); use it through its shape.

    Raises
    ------
    ValueError
        (numba backend) a stick outside the grid (the numpy backend checks less).

    Notes
    -----
    The numba backend takes its accumulators from a pool of freed ones and keeps at
    most ``SCRATCH_BYTES`` (128 MB) of them between calls; the returned array's memory
    re-enters the pool once nothing refers to it any more.
    """
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {BACKENDS}; got {backend!r}.")
    if backend != "numpy":
        kernel = _numba_kernel()
        if kernel is None and backend == "numba":
            from ...errors import MissingDependencyError

            raise MissingDependencyError(
                "numba is required for the compiled TRPES deposit kernel; install with pip "
                "install 'ensemblelab[fast]' (or use backend='auto' / 'numpy').")
        if kernel is not None:
            return _deposit_numba(kernel, tbin, energy, weight, comp, tfrac, n_time=n_time,
                                  e_lo=e_lo, h=h, n_fine=n_fine, order=order, n_comp=n_comp,
                                  n_threads=n_threads)
    size = n_comp * n_time * n_fine
    out = np.zeros((order, size))
    inv_h = 1.0 / h
    shift = 0.5 - e_lo * inv_h
    n = energy.shape[0]
    m = min(chunk, max(n, 1))
    p = np.empty(m)
    flat = np.empty(m, dtype=np.int64)
    bins = np.empty(m, dtype=np.int64)
    acc = np.empty(m)
    for s in range(0, n, chunk):
        e = min(n, s + chunk)
        k_n = e - s
        pv, fv, bv, av = p[:k_n], flat[:k_n], bins[:k_n], acc[:k_n]
        np.multiply(energy[s:e], inv_h, out=pv)
        pv += shift  # (x - e_lo)/h + 1/2 > 0
        np.copyto(bv, pv, casting="unsafe")  # truncation = floor here: nearest bin centre
        pv -= bv
        pv -= 0.5  # delta / h in [-1/2, 1/2)
        if comp is not None:
            np.multiply(comp[s:e], n_time, out=fv)
            fv += tbin[s:e]
            fv *= n_fine
        else:
            np.multiply(tbin[s:e], n_fine, out=fv)
        fv += bv
        np.copyto(av, weight[s:e])
        if tfrac is None:
            for k in range(order):
                out[k] += np.bincount(fv, av, minlength=size)
                if k + 1 < order:
                    av *= pv
        else:
            f = tfrac[s:e]
            later = f > 0
            fv2 = fv[later] + n_fine
            for k in range(order):
                out[k] += np.bincount(fv, av * (1.0 - f), minlength=size)
                out[k] += np.bincount(fv2, av[later] * f[later], minlength=size)
                if k + 1 < order:
                    av *= pv
    return out.reshape(order, n_comp, n_time, n_fine)


def deposit_counts(tbin: np.ndarray, weight: np.ndarray, *, n_time: int,
                   tfrac: np.ndarray | None = None) -> np.ndarray:
    """Sum `weight` per time bin (with optional linear split), shape (n_time,)."""
    if tfrac is None:
        return np.bincount(tbin, weight, minlength=n_time)[:n_time]
    later = tfrac > 0
    out = np.bincount(tbin, weight * (1.0 - tfrac), minlength=n_time)
    out += np.bincount(tbin[later] + 1, weight[later] * tfrac[later], minlength=n_time)
    return out[:n_time]
