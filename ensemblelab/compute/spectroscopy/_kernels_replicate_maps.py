"""Array-level kernels turning replicate moment histograms into replicate maps (private).

The maps of many bootstrap resamples at once (:mod:`.bootstrap`): the histograms of
:func:`._kernels_bootstrap.deposit_replicates` keep the resamples innermost, so each
time bin's (fine bin x moment, resample) block is one matrix whose columns are the
resamples. :func:`broaden_energy` multiplies it by the banded energy-broadening blocks
of :func:`._kernels_broadening.broadening_blocks` (one BLAS product per time bin and
energy block); :func:`apply_time` applies each resample's normaliser and the time
matrix as one product over the time bins of a window. Together
(:func:`assemble_replicates`) they do what :func:`._kernels_broadening.assemble` does
for one resample, with the same banded blocks (so the same numbers up to summation
order); tests compare them with the one-resample path.
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from . import _kernels_broadening as KB
from . import _kernels_deposit as KD

__all__ = ["ReplicateBlocks", "replicate_blocks", "broaden_energy", "apply_time",
           "assemble_replicates"]


class ReplicateBlocks(list):
    """Banded broadening blocks ``(j0, j1, lo, hi, mat_t)`` for :func:`broaden_energy`:
    those of :class:`._kernels_broadening.BroadeningBlocks` with each matrix transposed
    and contiguous, shape (j1 - j0, (hi - lo) * order); ``n_energies`` as there."""

    n_energies: int


def replicate_blocks(blocks: Any) -> ReplicateBlocks:
    """:class:`ReplicateBlocks` of :func:`._kernels_broadening.broadening_blocks`."""
    out = ReplicateBlocks((j0, j1, lo, hi, np.ascontiguousarray(mat.T))
                          for j0, j1, lo, hi, mat in blocks)
    out.n_energies = blocks.n_energies
    return out


def broaden_energy(acc: np.ndarray, blocks: ReplicateBlocks, y: np.ndarray, *,
                   n_threads: int | None = None) -> None:
    """Energy broadening of a chunk of replicate histograms, all resamples at once.

    Each time bin's (fine bin x moment, resample) block is one matrix, the resamples
    its columns, multiplied by the banded broadening blocks (one single-threaded BLAS
    product per time bin and energy block; time bins, or energy blocks when there are
    fewer bins than threads, side by side in threads).

    Parameters
    ----------
    acc : ndarray, shape (n_comp, n_window, n_fine, order, n_rep)
        Histograms (:func:`deposit_replicates`).
    blocks : ReplicateBlocks
        :func:`replicate_blocks` of the broadening blocks.
    y : ndarray, shape (n_comp, n_window, n_energies, n_rep)
        Output (overwritten; eV^-1 before the normaliser); ``y[c, t]`` contiguous.
    n_threads : int, optional
        Threads (default: the usable cores).
    """
    n_c, n_win, _, order, n_rep = acc.shape
    n_threads = max(1, min(KD.usable_cores() if n_threads is None else n_threads,
                           max(n_win, len(blocks))))
    # threads take time bins (even shares) when there are enough, else energy blocks
    by_time = n_win >= n_threads
    y[...] = 0.0

    def run(t: int) -> None:
        times = range(t, n_win, n_threads) if by_time else range(n_win)
        mine = blocks if by_time else blocks[t::n_threads]
        for c in range(n_c):
            for j0, j1, lo, hi, mat_t in mine:
                for i in times:
                    np.dot(mat_t, acc[c, i, lo:hi].reshape((hi - lo) * order, n_rep),
                           out=y[c, i, j0:j1])

    with KB.single_thread_blas():  # many small products side by side
        if n_threads == 1:
            run(0)
        else:
            with ThreadPoolExecutor(n_threads) as pool:
                list(pool.map(run, range(n_threads)))


#: delays per product of :func:`apply_time` (the time matrix is banded: a block of
#: delays meets only the time bins within the cross-correlation's reach)
DELAY_CHUNK = 64

#: bytes of one energy block of normalised replicates in :func:`apply_time` (a thread's
#: scratch, read once per block of delays). With 601 time bins, 201 energies and 208
#: float32 resamples (42 fs cross-correlation, 151 delays), interleaved runs gave a best
#: of 0.057 s at 64 delays and 2 MB against 0.074 s at 32 and 0.078 s for the earlier
#: products over chunks of 128 time bins (scaling the replicates in place).
APPLY_BYTES = 2 << 20


def _delay_bands(cmat: np.ndarray, dtype: Any) -> list[tuple[int, int, int, int, np.ndarray]]:
    """``(d0, d1, a, b, cmat[d0:d1, a:b])`` for blocks of :data:`DELAY_CHUNK` delays: the
    time bins ``a:b`` hold every nonzero of those rows (rows without any left out)."""
    nz = cmat != 0
    has = nz.any(axis=1)
    first = np.argmax(nz, axis=1)
    stop = nz.shape[1] - np.argmax(nz[:, ::-1], axis=1)
    bands = []
    for d0 in range(0, cmat.shape[0], DELAY_CHUNK):
        rows = d0 + np.flatnonzero(has[d0:d0 + DELAY_CHUNK])
        if rows.size == 0:
            continue
        r0, r1 = int(rows[0]), int(rows[-1]) + 1
        a, b = int(first[rows].min()), int(stop[rows].max())
        bands.append((r0, r1, a, b, np.ascontiguousarray(cmat[r0:r1, a:b], dtype=dtype)))
    return bands


def apply_time(y: np.ndarray, cmat: np.ndarray, norm: np.ndarray, out: np.ndarray, *,
               n_threads: int | None = None) -> None:
    """Normalise energy-broadened replicates and add their time convolution to ``out``.

    Threads take blocks of energies (:data:`APPLY_BYTES`): each scales its block by the
    normalisers into a scratch array (``y`` is not modified), then multiplies it by the
    time matrix one block of delays at a time (:data:`DELAY_CHUNK`), over only the time
    bins those delays meet (single-threaded BLAS products side by side).

    Parameters
    ----------
    y : ndarray, shape (n_comp, n_window, n_energies, n_rep)
        :func:`broaden_energy` of time bins ``t0 .. t0 + n_window - 1``.
    cmat : ndarray, shape (n_delays, n_window)
        The time matrix's columns of the window.
    norm : ndarray, shape (n_rep, n_window)
        1 / normaliser of each resample and time bin.
    out : ndarray, shape (n_comp, n_delays, n_energies, n_rep)
        Replicate maps, added to (eV^-1); any strides.
    n_threads : int, optional
        Threads (default: the usable cores).
    """
    n_c, n_win, n_e, n_rep = y.shape
    bands = _delay_bands(np.asarray(cmat), y.dtype)
    if not bands or n_e == 0 or n_rep == 0:
        return
    norm_t = np.ascontiguousarray(np.asarray(norm).T, dtype=y.dtype)[:, None, :]
    per_e = max(n_win * n_rep * y.itemsize, 1)
    eb = int(max(1, min(n_e, APPLY_BYTES // per_e)))
    tasks = [(c, e0, min(e0 + eb, n_e)) for c in range(n_c) for e0 in range(0, n_e, eb)]
    n_threads = max(1, min(KD.usable_cores() if n_threads is None else n_threads,
                           len(tasks)))
    local = threading.local()

    def run(task: tuple[int, int, int]) -> None:
        c, e0, e1 = task
        buf = getattr(local, "buf", None)
        if buf is None or buf.shape[1] != e1 - e0:
            buf = local.buf = np.empty((n_win, e1 - e0, n_rep), dtype=y.dtype)
        np.multiply(y[c, :, e0:e1], norm_t, out=buf)
        flat = buf.reshape(n_win, (e1 - e0) * n_rep)
        for d0, d1, a, b, m in bands:
            out[c, d0:d1, e0:e1] += (m @ flat[a:b]).reshape(d1 - d0, e1 - e0, n_rep)

    with KB.single_thread_blas():  # many small products side by side
        if n_threads == 1:
            for task in tasks:
                run(task)
        else:
            with ThreadPoolExecutor(n_threads) as pool:
                list(pool.map(run, tasks))


def assemble_replicates(acc: np.ndarray, blocks: Any, cmat: np.ndarray, norm: np.ndarray,
                        out: np.ndarray) -> None:
    """Add the maps of a chunk of resamples, from their histograms, to ``out`` (in place):
    what :func:`._kernels_broadening.assemble` does for one resample (banded energy
    broadening, normaliser, time matrix), for all at once (:func:`broaden_energy`, then
    :func:`apply_time`; arguments as there)."""
    n_c, n_win, _, _, n_rep = acc.shape
    y = np.empty((n_c, n_win, blocks.n_energies, n_rep))
    broaden_energy(acc, blocks, y)
    apply_time(y, cmat, norm, out)
