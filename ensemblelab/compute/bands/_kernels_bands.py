"""Array-level kernels of the band analysis (private module; inputs are trusted).

Their naive twins are pandas ``groupby``, ``np.bincount`` and ``np.argsort(kind="stable")``;
the tests in ``tests/compute/test_bands.py`` make them agree.
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["integer_codes", "pair_counts", "top_k_indices", "cell_sums"]

_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}


def _cell_sums_kernel(codes, x, sums, counts):  # pragma: no cover - compiled by numba
    """Add each non-zero ``x[i]`` to ``sums[codes[i]]``, count the positive ones."""
    for i in range(x.shape[0]):
        v = x[i]
        if v != 0.0:
            c = codes[i]
            sums[c] += v
            if v > 0.0:
                counts[c] += 1


def cell_sums(codes: np.ndarray, x: np.ndarray, n_cells: int) -> tuple[np.ndarray, np.ndarray]:
    """Sum of `x` and number of positive `x` in every cell, in one pass.

    Equal to ``np.bincount(codes, x, minlength=n_cells)`` and
    ``np.bincount(codes[x > 0], minlength=n_cells)`` (the same additions in the same
    order: zeros add nothing); compiled when numba is installed.

    Parameters
    ----------
    codes : ndarray of int, shape (n,)
        Cell of each row (0 <= codes < n_cells).
    x : ndarray of float, shape (n,)
    n_cells : int

    Returns
    -------
    sums : ndarray of float, shape (n_cells,)
    counts : ndarray of int64, shape (n_cells,)
    """
    if "kernel" not in _COMPILED:
        with _LOCK:
            if "kernel" not in _COMPILED:
                try:
                    import numba
                except ImportError:
                    _COMPILED["kernel"] = None
                else:
                    _COMPILED["kernel"] = numba.njit(cache=True, nogil=True,
                                                     boundscheck=False)(_cell_sums_kernel)
    kernel = _COMPILED["kernel"]
    if kernel is None:
        return (np.bincount(codes, x, minlength=n_cells),
                np.bincount(codes[x > 0], minlength=n_cells).astype(np.int64))
    sums = np.zeros(n_cells)
    counts = np.zeros(n_cells, dtype=np.int64)
    kernel(codes, np.ascontiguousarray(x, dtype=np.float64), sums, counts)
    return sums, counts


def top_k_indices(values: np.ndarray, k: int) -> np.ndarray:
    """Indices of the `k` largest `values`, largest first (ties: lower index first).

    Equal to ``np.argsort(-values, kind="stable")[:k]`` without sorting everything.

    Parameters
    ----------
    values : ndarray of float, shape (n,)
    k : int
        How many indices (clipped to ``[0, n]``).

    Returns
    -------
    ndarray of int, shape (min(k, n),)
    """
    n = values.size
    k = min(int(k), n)
    if k <= 0:
        return np.zeros(0, dtype=np.int64)
    idx: np.ndarray = np.arange(n)
    if k < n and n > 64 * k and n > 200_000:
        # a threshold from a strided sample keeps ~2k candidates; every value above
        # the k-th largest is >= it whenever at least k values pass, else: no shortcut
        step = max(1, n // 50_000)
        sample = values[::step]
        r = min(sample.size, 2 * k * sample.size // n + 16)
        thr = np.partition(sample, sample.size - r)[sample.size - r]
        cand = np.flatnonzero(values >= thr)
        if k <= cand.size < n // 4:
            idx = cand
    if k < idx.size:
        vals = values[idx]
        kth = -np.partition(-vals, k - 1)[k - 1]  # the k-th largest value
        above = np.flatnonzero(vals > kth)
        # ties at the k-th value: the first ones in row order, as a stable sort takes
        tied = np.flatnonzero(vals == kth)[: k - above.size]
        idx = idx[np.sort(np.concatenate([above, tied]))]
    return idx[np.argsort(-values[idx], kind="stable")]


def integer_codes(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-negative integer codes of `keys` and the key of each code.

    Parameters
    ----------
    keys : ndarray, shape (n,)

    Returns
    -------
    codes : ndarray of intp, shape (n,)
        ``values[codes] == keys``.
    values : ndarray, shape (n_codes,)
        Sorted; for a small integer range every integer from min to max (unused
        codes have no rows).
    """
    keys = np.asarray(keys)
    if keys.size and np.issubdtype(keys.dtype, np.integer):
        lo, hi = int(keys.min()), int(keys.max())
        if hi - lo <= 4 * keys.size + 1024:  # small integer range: offset, no hashing
            return (keys - lo).astype(np.intp, copy=False), np.arange(lo, hi + 1)
    codes, uniques = pd.factorize(keys, sort=True)
    return codes.astype(np.intp, copy=False), np.asarray(uniques)


def pair_counts(groups: np.ndarray, trajs: np.ndarray, n_groups: int, n_trajs: int
                ) -> np.ndarray:
    """Number of distinct trajectories within each group.

    Parameters
    ----------
    groups, trajs : ndarray of int, shape (n,)
        Group code and trajectory code of each row.
    n_groups, n_trajs : int
        Number of codes of each.

    Returns
    -------
    ndarray of int, shape (n_groups,)
    """
    if groups.size == 0:
        return np.zeros(n_groups, dtype=np.int64)
    if n_groups * n_trajs <= 50_000_000:
        pairs = np.bincount(groups * n_trajs + trajs, minlength=n_groups * n_trajs)
        return np.count_nonzero(pairs.reshape(n_groups, n_trajs), axis=1)
    pairs = np.unique(groups.astype(np.int64) * n_trajs + trajs)
    return np.bincount(pairs // n_trajs, minlength=n_groups)
