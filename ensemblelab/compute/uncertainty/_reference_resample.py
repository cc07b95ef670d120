"""Naive twins of :mod:`._kernels_resample`: one explicit resample at a time (for tests)."""

from __future__ import annotations

import numpy as np

__all__ = ["ratio_replicates_loop"]


def ratio_replicates_loop(numer: np.ndarray, denom: np.ndarray,
                          counts: np.ndarray) -> np.ndarray:
    """Ratios of sums over the drawn units, built resample by resample.

    Each row of `counts` is turned into the list of drawn unit indices (unit j repeated
    ``counts[b, j]`` times) and the sums are taken over that list, as a textbook
    bootstrap does; shapes as in :func:`._kernels_resample.ratio_replicates`.
    """
    n_boot = counts.shape[0]
    den_all = denom if denom.ndim == 2 else denom[:, None]
    out = np.empty((n_boot, numer.shape[1]))
    for b in range(n_boot):
        drawn = np.repeat(np.arange(counts.shape[1]), counts[b].astype(np.int64))
        num = numer[drawn].sum(axis=0)
        den = den_all[drawn].sum(axis=0)
        for k in range(numer.shape[1]):
            d = den[k] if den.size > 1 else den[0]
            out[b, k] = num[k] / d if d != 0 else np.nan
    return out
