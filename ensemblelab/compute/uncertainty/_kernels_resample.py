"""Array-level kernels of the trajectory bootstrap (private module; inputs are trusted).

Every statistic here is a ratio of sums over independent units (trajectories):
``theta = sum_j c_j a_j / sum_j c_j b_j``. A bootstrap resample only changes the
multiplicities ``c_j`` (multinomial counts, or independent Poisson(1) counts for the
"Poisson bootstrap"), so all resamples are one matrix product of a counts matrix
(n_boot, n_units) with the per-unit partial sums (n_units, k), instead of a Python loop
over resamples. The naive twin is :mod:`._reference_resample`.
"""

from __future__ import annotations

import numpy as np

__all__ = ["resample_counts", "ratio_replicates", "percentile_interval", "RESAMPLING"]

#: the ways of drawing resample multiplicities
RESAMPLING = ("multinomial", "poisson")

_CHUNK = 256  # resamples per matrix product (bounds the memory)


def resample_counts(n_units: int, n_boot: int, rng: np.random.Generator, *,
                    method: str = "multinomial") -> np.ndarray:
    """How often each unit is drawn in each resample, shape (n_boot, n_units), float64.

    ``"multinomial"``: `n_units` draws with replacement and equal probabilities (row b
    equals ``np.bincount(indices_b, minlength=n_units)``). ``"poisson"``: independent
    Poisson(1) counts per unit (asymptotically equivalent; the resample size varies).
    """
    if method == "poisson":
        return rng.poisson(1.0, size=(n_boot, n_units)).astype(np.float64)
    return rng.multinomial(n_units, np.full(n_units, 1.0 / n_units),
                           size=n_boot).astype(np.float64)


def ratio_replicates(numer: np.ndarray, denom: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Ratios of resampled sums, ``(counts @ numer) / (counts @ denom)``.

    Parameters
    ----------
    numer : ndarray, shape (n_units, k)
        Per-unit partial sums of the numerators (weights already applied).
    denom : ndarray, shape (n_units,) or (n_units, k)
        Per-unit partial sums of the denominator(s).
    counts : ndarray, shape (n_boot, n_units)

    Returns
    -------
    ndarray, shape (n_boot, k)
        NaN where a resample's denominator is 0.
    """
    n_boot = counts.shape[0]
    k = numer.shape[1]
    # numerators and denominators side by side: one pass over the counts (memory bound)
    both = np.hstack([numer, denom[:, None] if denom.ndim == 1 else denom])
    out = np.empty((n_boot, k))
    for s in range(0, n_boot, _CHUNK):
        prod = counts[s:s + _CHUNK] @ both
        num, den = prod[:, :k], prod[:, k:]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[s:s + _CHUNK] = np.where(den != 0, num / np.where(den != 0, den, 1.0), np.nan)
    return out


def percentile_interval(replicates: np.ndarray, ci: float) -> tuple[np.ndarray, np.ndarray]:
    """Percentile interval at level `ci` along axis 0, NaN replicates left out.

    Parameters
    ----------
    replicates : ndarray, shape (n_boot, ...)
    ci : float in (0, 1)

    Returns
    -------
    lower, upper : ndarray, shape (...)
    """
    alpha = 0.5 * (1.0 - ci)
    if not np.isnan(replicates).any():
        lo, hi = np.quantile(replicates, [alpha, 1.0 - alpha], axis=0)
        return lo, hi
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        lo, hi = np.nanquantile(replicates, [alpha, 1.0 - alpha], axis=0)
    return lo, hi
