"""Array-level kernels broadening Taylor-moment histograms into TRPES maps (private).

The histograms of :mod:`._kernels_deposit` are broadened exactly with the Gaussian's
Taylor series about each fine-bin centre,
``G(u - delta) = sum_k delta^k a^(k/2) H_k(sqrt(a) u) G(u) / k!``
(``a = 4 ln2 / Gamma^2``, ``H_k`` physicists' Hermite polynomials), one matrix per
moment evaluated at the requested output energies (banded, in blocks), then
convolved along time with a matrix of the normalised cross-correlation.

The truncation error is bounded by the first omitted term, about
``(sqrt(2a) h/2)^order / sqrt(order!)`` relative to the peak height
(:func:`truncation_bound`; for ``h = Gamma/8``: order 2 -> 1e-2, order 4 -> 1e-4,
order 6 -> 4e-7; for ``h = Gamma/4``, the default, order 8 -> 2.8e-7). Cached moments
can be re-broadened for any ``Gamma`` that keeps this bound small, which is what makes
re-broadening fast.
"""

from __future__ import annotations

import contextlib
import math
from concurrent.futures import ThreadPoolExecutor
from typing import Any, NamedTuple

import numpy as np

from ...units import FOUR_LN2
from ._kernels_deposit import usable_cores

__all__ = [
    "truncation_bound",
    "energy_matrices",
    "broadening_blocks",
    "BroadeningBlocks",
    "time_matrix",
    "assemble",
    "single_thread_blas",
    "sparse_rows",
    "SparseTime",
    "interpolation_rows",
]


def truncation_bound(h: float, fwhm: float, order: int) -> float:
    """Bound on the moment expansion's error relative to the peak height.

    ``(sqrt(2a) h/2)^order / sqrt(order!)`` with ``a = 4 ln2 / fwhm^2``: the first
    omitted Taylor term for a stick half a bin ``h`` from its bin centre.
    """
    x = math.sqrt(2.0 * FOUR_LN2) * h / (2.0 * fwhm)
    return x**order / math.sqrt(math.factorial(order))


def energy_matrices(energies: np.ndarray, *, e_lo: float, h: float, n_fine: int, fwhm: float,
                    order: int, truncate_below: float | None = 0.0) -> np.ndarray:
    """Broadening matrices from moments to output energies.

    Parameters
    ----------
    energies : ndarray, shape (n_energies,)
        Output kinetic energies (eV).
    e_lo, h, n_fine : float, float, int
        Fine grid (see :func:`deposit_moments`).
    fwhm : float
        Gaussian FWHM (eV).
    order : int
        Number of moments.
    truncate_below : float or None
        Output energies below this get 0 (no tails below zero kinetic energy).

    Returns
    -------
    ndarray, shape (order, n_fine, n_energies)
        ``B[k, b, j] = h^k a^(k/2) H_k(y) G(y) / k!`` with ``y = sqrt(a) (E_j - c_b)``.
    """
    a = FOUR_LN2 / fwhm**2
    sa = math.sqrt(a)
    centres = e_lo + h * np.arange(n_fine)
    y = sa * (energies[None, :] - centres[:, None])
    g = (sa / math.sqrt(math.pi)) * np.exp(-y * y)
    if truncate_below is not None:
        g[:, energies < truncate_below] = 0.0
    out = np.empty((order, n_fine, energies.size))
    for k, term in enumerate(_taylor_terms(y, h * sa, order)):
        out[k] = term * g
    return out


def _taylor_terms(y: np.ndarray, scale: Any, order: int):
    """Yield ``scale^k H_k(y) / k!`` for k = 0 .. order-1 (physicists' Hermite polynomials
    by their three-term recurrence); times ``G(y)`` these are the broadening terms."""
    h_prev = np.ones_like(y)
    yield h_prev
    h_cur = 2.0 * y
    for k in range(1, order):
        if k > 1:
            h_prev, h_cur = h_cur, 2.0 * y * h_cur - 2.0 * (k - 1) * h_prev
        yield (scale**k / math.factorial(k)) * h_cur


def time_matrix(delays: np.ndarray, times: np.ndarray, *, sigma: float | None,
                t_known: float, cutoff: float = 8.0, t_launch: float | None = None) -> np.ndarray:
    """Matrix that takes the pure signal on the uniform time grid to the delays.

    Parameters
    ----------
    delays : ndarray, shape (n_delays,)
        Output delays (fs).
    times : ndarray, shape (n_time,)
        Uniform internal grid u_j (fs), starting at or below 0.
    sigma : float or None
        Cross-correlation standard deviation (fs); None means no convolution:
        linear interpolation of the pure signal (zero before the first grid point
        and after `t_known`).
    t_known : float
        Last time with a known pure signal (the end of the longest trajectory).
        For u > t_known the pure signal is unknown; the kernel is renormalised over
        ``u <= t_known`` (for u < 0 the signal is known to be zero and stays in).
    cutoff : float
        Kernel half-width in units of sigma.
    t_launch : float, optional
        Launch time (normally 0) when it is a grid point and the pure signal is zero
        before it: the convolution integral is then a trapezoid rule on
        [t_launch, t_known] (half weight at both ends), which is second-order
        accurate across the jump of the signal at launch.

    Returns
    -------
    ndarray, shape (n_delays, n_time)
        ``C[d, j] = N(tau_d - u_j) dt / sum_{u_i <= t_known} N(tau_d - u_i) dt``.
    """
    dt = times[1] - times[0] if times.size > 1 else 1.0
    if sigma is None:
        c = np.zeros((delays.size, times.size))
        x = (delays - times[0]) / dt
        j = np.floor(x).astype(np.int64)
        f = x - j
        for d in range(delays.size):
            if delays[d] < times[0] - 1e-9 * dt or delays[d] > t_known + 1e-9 * dt:
                continue
            jd = min(max(j[d], 0), times.size - 1)
            if jd + 1 < times.size and f[d] > 1e-12:
                c[d, jd] += 1.0 - f[d]
                c[d, jd + 1] += f[d]
            else:
                c[d, min(jd + int(round(f[d])), times.size - 1)] += 1.0
        return c
    z = (delays[:, None] - times[None, :]) / sigma
    c = np.exp(-0.5 * z * z)
    c[np.abs(z) > cutoff] = 0.0
    # the grid must cover [min(delays) - cutoff sigma, ...]; points with u < 0 are
    # known zeros of the pure signal and stay in the normalisation, points beyond
    # t_known are unknown and are left out of it
    c[:, times > t_known + 1e-9 * dt] = 0.0
    end = np.abs(times - t_known) < 1e-9 * dt
    c[:, end] *= 0.5
    norm = c.sum(axis=1)
    if t_launch is not None:
        c[:, np.abs(times - t_launch) < 1e-9 * dt] *= 0.5
    with np.errstate(invalid="ignore", divide="ignore"):
        c = c / norm[:, None]
    c[~np.isfinite(c)] = 0.0
    return c


class SparseTime(NamedTuple):
    """A time matrix (n_delays, n_time) by rows: the nonzeros of row ``d`` are
    ``vals[q]`` at columns ``cols[q]``, ``q in indptr[d]:indptr[d + 1]`` (columns
    ascending), as ``np.nonzero`` lists those of the dense matrix."""

    indptr: np.ndarray
    cols: np.ndarray
    vals: np.ndarray
    n_time: int

    def dense(self) -> np.ndarray:
        """The dense matrix, shape (n_delays, n_time)."""
        out = np.zeros((self.indptr.size - 1, self.n_time))
        rows = np.repeat(np.arange(self.indptr.size - 1), np.diff(self.indptr))
        out[rows, self.cols] = self.vals
        return out


def interpolation_rows(delays: np.ndarray, times: np.ndarray, *, t_known: float,
                       col_scale: np.ndarray | None = None) -> SparseTime:
    """``time_matrix(delays, times, sigma=None, t_known=t_known)`` times
    ``col_scale[None, :]``, by rows (at most two nonzeros each), without the dense
    (n_delays, n_time) matrix: the same values, zeros left out."""
    n = times.size
    dt = times[1] - times[0] if n > 1 else 1.0
    x = (delays - times[0]) / dt
    j = np.floor(x).astype(np.int64)
    f = x - j
    ok = ~((delays < times[0] - 1e-9 * dt) | (delays > t_known + 1e-9 * dt))
    jd = np.clip(j, 0, n - 1)
    two = ok & (jd + 1 < n) & (f > 1e-12)
    one = ok & ~two
    c1 = np.where(two, jd, np.minimum(jd + np.round(f).astype(np.int64), n - 1))
    v1 = np.where(two, 1.0 - f, 1.0)
    cols = np.stack([c1, jd + 1], axis=1)
    vals = np.stack([v1, f], axis=1)
    if col_scale is not None:
        vals = vals * col_scale[np.minimum(cols, n - 1)]
    keep = np.stack([two | one, two], axis=1) & (vals != 0.0)
    counts = keep.sum(axis=1)
    indptr = np.r_[0, np.cumsum(counts)].astype(np.int64)
    return SparseTime(indptr, cols[keep].astype(np.int64), vals[keep], n)


#: output energies per block of the banded broadening (see :func:`broadening_blocks`)
ENERGY_BLOCK = 32

#: broadening-matrix entries below this fraction of the largest are left out (banded)
BAND_CUTOFF = 1e-13

#: fewest (time bin x output energy) cells per thread before :func:`assemble` threads
MIN_CELLS_PER_THREAD = 1 << 15


class BroadeningBlocks(list):
    """Banded energy broadening: a list of ``(j0, j1, lo, hi, mat)`` blocks.

    Output energies ``j0:j1`` take fine bins ``lo:hi`` only; ``mat`` has shape
    ``((hi - lo) * order, j1 - j0)``, rows ordered bin-major, moment-minor (the layout
    of the compiled deposit's histograms), ``mat[(b - lo) * order + k, j - j0] =
    B[k, b, j]`` of :func:`energy_matrices`. Attributes ``order``, ``n_fine`` and
    ``n_energies`` describe the full matrix.
    """

    order: int
    n_fine: int
    n_energies: int


def _reach_bins(h: float, sa: float, order: int, cutoff: float = BAND_CUTOFF) -> int:
    """Fine bins beyond which every broadening term is below ``cutoff`` of the peak.

    Evaluates ``max_k |h^k a^(k/2) H_k(y) G(y) / k!|`` on the bin offsets (it is even
    in y) and returns the last offset above the cutoff, plus one bin of margin.
    """
    step = h * sa  # y per fine bin
    m = np.arange(0, int(math.ceil(12.0 / step)) + 2)
    y = step * m
    g = np.exp(-y * y)
    mag = np.max([np.abs(term * g) for term in _taylor_terms(y, step, order)], axis=0)
    big = np.flatnonzero(mag > cutoff * mag.max())
    return int(big[-1]) + 1


def broadening_blocks(energies: np.ndarray, *, e_lo: float, h: float, n_fine: int,
                      fwhm: float, order: int, truncate_below: float | None = 0.0,
                      block: int = ENERGY_BLOCK, fwhm_of: Any = None,
                      cutoff: float = BAND_CUTOFF) -> BroadeningBlocks:
    """The broadening matrices of :func:`energy_matrices`, banded and in blocks.

    Only the entries within reach of each block of output energies are evaluated
    (entries further out are below ``cutoff`` of the largest, so leaving them out
    changes a map by less than about ``order * n_fine * cutoff`` of its peak).

    Parameters
    ----------
    energies : ndarray, shape (n_energies,)
        Output kinetic energies (eV), any order.
    e_lo, h, n_fine, fwhm, order, truncate_below
        As in :func:`energy_matrices`.
    block : int
        Output energies per block.
    fwhm_of : callable, optional
        FWHM (eV) of the broadening at given fine-bin centres (a resolution
        proportional to the kinetic energy); None: ``fwhm`` everywhere.
    cutoff : float
        Relative size below which entries are left out (default :data:`BAND_CUTOFF`;
        float32 replicates use a larger one, below their rounding).

    Returns
    -------
    BroadeningBlocks
        The blocks (see :class:`BroadeningBlocks`).
    """
    energies = np.asarray(energies, dtype=float)
    a = FOUR_LN2 / fwhm**2
    sa = math.sqrt(a)
    if fwhm_of is not None:  # the widest bin sets the reach
        widest = float(np.max(fwhm_of(e_lo + h * np.arange(n_fine)))) if n_fine else fwhm
        reach = _reach_bins(h, math.sqrt(FOUR_LN2) / max(widest, fwhm), order, cutoff)
    else:
        reach = _reach_bins(h, sa, order, cutoff)
    out = BroadeningBlocks()
    out.order, out.n_fine, out.n_energies = order, n_fine, energies.size
    spans = []
    for j0 in range(0, energies.size, block):
        j1 = min(energies.size, j0 + block)
        e = energies[j0:j1]
        lo = max(0, int(math.floor((float(e.min()) - e_lo) / h)) - reach)
        hi = min(n_fine, int(math.ceil((float(e.max()) - e_lo) / h)) + reach + 1)
        if hi > lo:
            spans.append((j0, j1, lo, hi))
    if not spans:
        return out
    # all blocks at once, padded to the widest band and the full block width
    width = max(hi - lo for _, _, lo, hi in spans)
    n_blk = len(spans)
    e_pad = np.zeros((n_blk, block))
    keep = np.zeros((n_blk, block), dtype=bool)
    c_pad = np.zeros((n_blk, width))
    for i, (j0, j1, lo, _hi) in enumerate(spans):
        e_pad[i, :j1 - j0] = energies[j0:j1]
        keep[i, :j1 - j0] = True
        c_pad[i] = e_lo + h * (lo + np.arange(width))
    if truncate_below is not None:
        keep &= e_pad >= truncate_below
    sa_c: Any = sa
    if fwhm_of is not None:
        sa_c = (math.sqrt(FOUR_LN2) / np.asarray(fwhm_of(c_pad), dtype=float))[:, :, None]
    y = sa_c * (e_pad[:, None, :] - c_pad[:, :, None])  # (n_blk, width, block)
    g = np.where(keep[:, None, :], (sa_c / math.sqrt(math.pi)) * np.exp(-y * y), 0.0)
    mats = np.empty((n_blk, width, order, block))
    for k, term in enumerate(_taylor_terms(y, h * sa_c, order)):
        mats[:, :, k] = term * g
    for i, (j0, j1, lo, hi) in enumerate(spans):
        m = mats[i, :hi - lo, :, :j1 - j0]
        out.append((j0, j1, lo, hi, np.ascontiguousarray(m).reshape((hi - lo) * order,
                                                                     j1 - j0)))
    return out


def _blocks_from_dense(bmat: np.ndarray, block: int) -> BroadeningBlocks:
    """:class:`BroadeningBlocks` of a dense (order, n_fine, n_energies) matrix."""
    order, n_fine, n_e = bmat.shape
    mag = np.abs(bmat).max(axis=0)  # (n_fine, n_e)
    big = mag > BAND_CUTOFF * (mag.max() if mag.size else 0.0)
    out = BroadeningBlocks()
    out.order, out.n_fine, out.n_energies = order, n_fine, n_e
    for j0 in range(0, n_e, block):
        j1 = min(n_e, j0 + block)
        rows = np.flatnonzero(big[:, j0:j1].any(axis=1))
        if rows.size:
            lo, hi = int(rows[0]), int(rows[-1]) + 1
            mat = np.ascontiguousarray(bmat[:, lo:hi, j0:j1].transpose(1, 0, 2))
            out.append((j0, j1, lo, hi, mat.reshape((hi - lo) * order, j1 - j0)))
    return out


def assemble(hist: np.ndarray, bmat: np.ndarray | BroadeningBlocks,
             cmat: np.ndarray | SparseTime | None, *, n_threads: int | None = None
             ) -> np.ndarray:
    """Combine normalised moment histograms into maps.

    The energy broadening is banded (see :func:`broadening_blocks`); the time matrix is
    applied afterwards. The products run in threads (each with single-threaded BLAS:
    many small products, where BLAS threads only cost), split over output energies.

    Parameters
    ----------
    hist : ndarray, shape (order, n_comp, n_time, n_fine)
        Moment histograms already divided by the alive weight per time bin.
    bmat : ndarray, shape (order, n_fine, n_energies), or BroadeningBlocks
        Dense matrices (:func:`energy_matrices`) or their blocks.
    cmat : ndarray, shape (n_delays, n_time), SparseTime, or None
        None means the identity (maps on the internal time grid).
    n_threads : int, optional
        Threads (default: the usable cores, at most 8, fewer for small maps).

    Returns
    -------
    ndarray, shape (n_comp, n_delays, n_energies)
    """
    blocks = bmat if isinstance(bmat, BroadeningBlocks) else _blocks_from_dense(bmat,
                                                                                ENERGY_BLOCK)
    with single_thread_blas():
        return _assemble(hist, blocks, cmat, n_threads)


_BLAS: dict[str, Any] = {}


def single_thread_blas() -> Any:
    """Context limiting BLAS to one thread (many small products: threads only cost).

    Uses threadpoolctl (installed with scikit-learn) when present, else does nothing.
    """
    if "ctl" not in _BLAS:
        try:
            import threadpoolctl

            _BLAS["ctl"] = threadpoolctl.ThreadpoolController()
        except Exception:  # pragma: no cover - threadpoolctl missing or failing
            _BLAS["ctl"] = None
    ctl = _BLAS["ctl"]
    return contextlib.nullcontext() if ctl is None else ctl.limit(limits=1, user_api="blas")


#: time matrices with at most this many nonzeros per output row (on average) are applied
#: before the energy broadening, as sparse products (linear interpolation has 2)
SPARSE_TIME_NNZ = 4


def _combine_rows(indptr, cols, vals, m, out, r_lo, r_hi):  # pragma: no cover - numba
    """``out[r] = sum_q vals[q] m[cols[q]]`` over ``q in indptr[r]:indptr[r + 1]``, for
    rows ``r_lo:r_hi`` (in the order of the nonzeros, as :func:`_sparse_rows` adds)."""
    n = m.shape[1]
    for r in range(r_lo, r_hi):
        for e in range(n):
            out[r, e] = 0.0
        for q in range(indptr[r], indptr[r + 1]):
            c = vals[q]
            src = cols[q]
            for e in range(n):
                out[r, e] += c * m[src, e]


_COMBINE: dict[str, Any] = {}


def _combine_kernel() -> Any:
    """The compiled :func:`_combine_rows`, or None without numba."""
    if "k" not in _COMBINE:
        try:
            import numba
        except ImportError:
            _COMBINE["k"] = None
        else:
            _COMBINE["k"] = numba.njit(cache=True, nogil=True, boundscheck=False)(_combine_rows)
    return _COMBINE["k"]


def sparse_rows(cmat: np.ndarray | SparseTime, m: np.ndarray,
                n_threads: int | None = None) -> np.ndarray:
    """``cmat @ m`` over the nonzeros of each row of `cmat` only: compiled, output rows
    split over the usable cores, when numba is installed; else :func:`_sparse_rows`
    (the numpy twin, tests compare both)."""
    kernel = _combine_kernel()
    m = np.ascontiguousarray(m)
    if kernel is None:
        return _sparse_rows(cmat.dense() if isinstance(cmat, SparseTime) else cmat, m)
    if isinstance(cmat, SparseTime):
        indptr, cols, vals = cmat.indptr, cmat.cols, cmat.vals
    else:
        rows, cols = np.nonzero(cmat)
        vals = np.ascontiguousarray(cmat[rows, cols])
        indptr = np.searchsorted(rows, np.arange(cmat.shape[0] + 1)).astype(np.int64)
        cols = cols.astype(np.int64)
    n_out = indptr.size - 1
    out = np.empty((n_out, m.shape[1]))
    if n_threads is None:
        n_threads = max(1, min(usable_cores(), (n_out * m.shape[1]) // MIN_CELLS_PER_THREAD))
    cuts = [t * n_out // n_threads for t in range(n_threads + 1)]
    if n_threads == 1:
        kernel(indptr, cols, vals, m, out, 0, n_out)
    else:
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(lambda t: kernel(indptr, cols, vals, m, out, cuts[t], cuts[t + 1]),
                          range(n_threads)))
    return out


def _sparse_rows(cmat: np.ndarray, m: np.ndarray) -> np.ndarray:
    """``cmat @ m`` summing over the nonzeros of each row of `cmat` only."""
    rows, cols = np.nonzero(cmat)
    out = np.zeros((cmat.shape[0], m.shape[1]))
    for r0 in range(int(np.bincount(rows).max()) if rows.size else 0):
        # the r0-th nonzero of every row that has one: one gather-multiply-add each
        first = np.r_[0, np.flatnonzero(np.diff(rows)) + 1]
        counts = np.diff(np.r_[first, rows.size])
        sel = first[counts > r0] + r0
        out[rows[sel]] += cmat[rows[sel], cols[sel], None] * m[cols[sel]]
    return out


def _assemble(hist: np.ndarray, blocks: BroadeningBlocks,
              cmat: np.ndarray | SparseTime | None, n_threads: int | None) -> np.ndarray:
    order, n_comp, n_time, n_fine = hist.shape
    if (order, n_fine) != (blocks.order, blocks.n_fine):
        raise ValueError(f"assemble: histograms (order {order}, {n_fine} fine bins) do not "
                         f"match the broadening ({blocks.order}, {blocks.n_fine}).")
    n_e = blocks.n_energies
    n_out = (n_time if cmat is None else
             cmat.indptr.size - 1 if isinstance(cmat, SparseTime) else cmat.shape[0])
    out = np.zeros((n_comp, n_out, n_e))
    # one (n_time, n_fine * order) matrix per component (a view for the compiled
    # deposit's layout, a copy for the numpy one)
    h2 = [np.moveaxis(hist[:, c], 0, -1).reshape(n_time, n_fine * order)
          for c in range(n_comp)]
    if isinstance(cmat, SparseTime) or (cmat is not None and
                                        np.count_nonzero(cmat) <= SPARSE_TIME_NNZ * n_out):
        # a sparse time matrix (linear interpolation, no convolution): apply it first,
        # on its nonzeros only, so the energy products run on n_delays rows, not n_time
        h2 = [sparse_rows(cmat, m) for m in h2]
        cmat = None
        n_time = n_out
    if n_threads is None:
        n_threads = max(1, min(usable_cores(), len(blocks),
                               (n_time * n_e * n_comp) // MIN_CELLS_PER_THREAD))
    parts = [blocks[t::n_threads] for t in range(n_threads)]

    def run(t: int) -> None:
        for c in range(n_comp):
            for j0, j1, lo, hi, mat in parts[t]:
                e_blk = h2[c][:, lo * order:hi * order] @ mat
                out[c, :, j0:j1] = e_blk if cmat is None else cmat @ e_blk

    if n_threads == 1:
        run(0)
    else:
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(run, range(n_threads)))
    return out
