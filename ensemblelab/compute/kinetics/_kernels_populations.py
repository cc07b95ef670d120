"""Array-level kernels for populations, kinetic models and their fits (private).

Kernels assume valid input; the public wrappers in :mod:`.populations`,
:mod:`.kinetics` and :mod:`.global_fit` validate. Each kernel has a naive twin
in :mod:`._reference_populations`, and the tests make them agree.

Conventions
-----------
* Per-trajectory values live in ``values`` of shape (n_traj, n_times, n_states)
  and an ``alive`` mask of shape (n_traj, n_times); dead entries of ``values``
  are zero.
* Gaussian instrument response: normalised Gaussian of standard deviation
  ``sigma`` (fs); ``sigma = 0`` means no convolution.
"""

from __future__ import annotations

import numpy as np
from scipy.special import erfc, erfcx

__all__ = [
    "wilson_interval",
    "sample_on_grid",
    "weighted_populations",
    "bootstrap_counts",
    "bootstrap_populations",
    "irf_exp",
    "irf_step",
    "irf_texp",
    "sequential_profiles",
    "batched_lm",
]

_SQRT2 = np.sqrt(2.0)
_SQRT2PI = np.sqrt(2.0 * np.pi)


# ---------------------------------------------------------------- intervals
def wilson_interval(p: np.ndarray, n: np.ndarray, z: float) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for proportion(s) `p` out of `n` trials (vectorised).

    Wilson's score interval (J. Amer. Stat. Assoc. 22, 209 (1927), "Probable inference, the
    law of succession, and statistical inference"); ``n`` may be a non-integer effective size.
    Entries with ``n <= 0`` give NaN.
    """
    p = np.asarray(p, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        z2n = z * z / n
        denom = 1.0 + z2n
        centre = (p + 0.5 * z2n) / denom
        half = z / denom * np.sqrt(np.clip(p * (1.0 - p), 0.0, None) / n + z2n / (4.0 * n))
        lo = np.where(n > 0, np.clip(centre - half, 0.0, 1.0), np.nan)
        hi = np.where(n > 0, np.clip(centre + half, 0.0, 1.0), np.nan)
    return lo, hi


# ---------------------------------------------------------------- sampling
def sample_on_grid(
    traj_row: np.ndarray, time: np.ndarray, n_traj: int, grid: np.ndarray,
    hold: np.ndarray | None = None, hold_until: float = -np.inf,
) -> np.ndarray:
    """Snapshot row sampled for every (trajectory, grid time); -1 where not alive.

    Nearest-previous-step sampling: trajectory r at grid time t takes its last
    snapshot with ``time <= t``; it is alive when ``t_start <= t <= t_end``
    (its first and last snapshot times). A tolerance of 1e-9 fs (relative to
    max(1, |t|)) absorbs rounding in user grids.

    Parameters
    ----------
    traj_row : ndarray of int, shape (n_snapshots,)
        Row of the trajectory table of each snapshot, non-decreasing.
    time : ndarray, shape (n_snapshots,)
        Snapshot times, increasing within each trajectory.
    n_traj : int
        Number of trajectories.
    grid : ndarray, shape (n_times,)
        Increasing time grid.
    hold : ndarray of bool, shape (n_traj,), optional
        Trajectories that stay at their last snapshot after it, up to `hold_until`
        (those stopped in an absorbing state).
    hold_until : float
        Time (fs) up to which held trajectories stay alive (the ensemble's end).

    Returns
    -------
    ndarray of int64, shape (n_traj, n_times)
    """
    n = time.size
    n_times = grid.size
    out = np.full((n_traj, n_times), -1, dtype=np.int64)
    if n == 0 or n_times == 0:
        return out
    eps = 1e-9 * np.maximum(1.0, np.abs(time))
    start = np.searchsorted(grid, time - eps, side="left")
    last = np.r_[traj_row[1:] != traj_row[:-1], True]
    nxt = np.empty(n, dtype=np.int64)
    nxt[:-1] = start[1:]
    end = time[last]
    if hold is not None:
        end = np.where(hold[traj_row[last]], np.maximum(end, hold_until), end)
    nxt[last] = np.searchsorted(grid, end + 1e-9 * np.maximum(1.0, np.abs(end)), side="right")
    length = np.clip(nxt - start, 0, None)
    rows = np.repeat(np.arange(n, dtype=np.int64), length)
    offs = np.arange(rows.size, dtype=np.int64) - np.repeat(np.cumsum(length) - length, length)
    cols = start[rows] + offs
    out[traj_row[rows], cols] = rows
    return out


def weighted_populations(
    values: np.ndarray, alive: np.ndarray, weights: np.ndarray
) -> dict[str, np.ndarray]:
    """Weighted mean populations over alive trajectories, with effective sizes.

    Parameters
    ----------
    values : ndarray, shape (n_traj, n_times, n_states)
        Per-trajectory state values (0 where not alive).
    alive : ndarray of bool, shape (n_traj, n_times)
    weights : ndarray, shape (n_traj,)

    Returns
    -------
    dict
        ``population`` (n_times, n_states), ``n_alive`` (n_times,) int,
        ``w_alive`` (n_times,) summed weight, ``n_eff`` (n_times,) Kish size.
    """
    a = alive.astype(np.float64)
    w_alive = weights @ a
    w2 = (weights * weights) @ a
    num = np.tensordot(weights, values, axes=(0, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        pop = num / w_alive[:, None]
        n_eff = np.where(w2 > 0, w_alive * w_alive / w2, 0.0)
    return {
        "population": pop,
        "n_alive": alive.sum(axis=0).astype(np.int64),
        "w_alive": w_alive,
        "n_eff": n_eff,
    }


def bootstrap_counts(n_traj: int, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """How often each trajectory is drawn in each resample, shape (n_boot, n_traj).

    Drawing `n_traj` trajectories with replacement is a multinomial draw with
    equal probabilities; row b equals ``np.bincount(indices_b, minlength=n_traj)``.
    """
    return rng.multinomial(n_traj, np.full(n_traj, 1.0 / n_traj), size=n_boot).astype(np.float64)


def bootstrap_populations(
    values: np.ndarray,
    alive: np.ndarray,
    weights: np.ndarray,
    counts: np.ndarray,
    *,
    chunk: int = 250,
) -> np.ndarray:
    """Populations of every bootstrap resample by matrix products (no loop per resample).

    ``P_b(t, i) = sum_n c_bn w_n v_n(t, i) / sum_n c_bn w_n alive_n(t)``.

    Parameters
    ----------
    values : ndarray, shape (n_traj, n_times, n_states)
    alive : ndarray of bool, shape (n_traj, n_times)
    weights : ndarray, shape (n_traj,)
    counts : ndarray, shape (n_boot, n_traj)
        Resample counts (see :func:`bootstrap_counts`).
    chunk : int
        Resamples per matrix product (bounds the memory).

    Returns
    -------
    ndarray, shape (n_boot, n_times, n_states)
        NaN where a resample has no alive weight.
    """
    n_traj, n_times, n_states = values.shape
    flat = values.reshape(n_traj, n_times * n_states)
    a = alive.astype(np.float64)
    out = np.empty((counts.shape[0], n_times, n_states))
    for s in range(0, counts.shape[0], chunk):
        cw = counts[s:s + chunk] * weights[None, :]
        num = (cw @ flat).reshape(-1, n_times, n_states)
        den = cw @ a
        with np.errstate(divide="ignore", invalid="ignore"):
            out[s:s + chunk] = num / den[:, :, None]
    return out


# ---------------------------------------------------------------- IRF-convolved shapes
def irf_exp(u: np.ndarray, tau: np.ndarray | float, sigma: float) -> np.ndarray:
    """exp(-u/tau) Theta(u) convolved with a normalised Gaussian (7.2), overflow-free.

    ``(1/2) exp(-u^2/(2 sigma^2)) erfcx((sigma^2/tau - u)/(sqrt(2) sigma))``; for
    ``sigma == 0`` the bare exponential with Theta(0) = 1. Broadcasts `u` and `tau`.
    """
    u = np.asarray(u, dtype=np.float64)
    tau = np.asarray(tau, dtype=np.float64)
    if sigma <= 0:
        with np.errstate(over="ignore"):
            return np.where(u >= 0, np.exp(-np.clip(u, 0.0, None) / tau), 0.0)
    x = (sigma * sigma / tau - u) / (_SQRT2 * sigma)
    # where the argument is very negative erfcx overflows; there the erfc form is safe
    # (both are evaluated, the unused one may overflow harmlessly)
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        g = np.exp(-0.5 * (u / sigma) ** 2)
        direct = 0.5 * g * erfcx(x)
        neg = 0.5 * np.exp(0.5 * (sigma / tau) ** 2 - u / tau) * erfc(x)
    return np.where(x > -20.0, direct, neg)


def irf_step(u: np.ndarray, sigma: float) -> np.ndarray:
    """Unit step Theta(u) convolved with a normalised Gaussian: erfc(-u/(sqrt(2) sigma))/2."""
    u = np.asarray(u, dtype=np.float64)
    if sigma <= 0:
        return (u >= 0).astype(np.float64)
    return 0.5 * erfc(-u / (_SQRT2 * sigma))


def irf_texp(u: np.ndarray, tau: np.ndarray | float, sigma: float) -> np.ndarray:
    """u exp(-u/tau) Theta(u) convolved with a normalised Gaussian (closed form).

    ``-d/dk`` of (7.2) with k = 1/tau gives
    ``(u - sigma^2/tau) y(u) + sigma/sqrt(2 pi) exp(-u^2/(2 sigma^2))`` [derived].
    """
    u = np.asarray(u, dtype=np.float64)
    tau = np.asarray(tau, dtype=np.float64)
    if sigma <= 0:
        return np.where(u >= 0, u * np.exp(-np.clip(u, 0.0, None) / tau), 0.0)
    y = irf_exp(u, tau, sigma)
    return (u - sigma * sigma / tau) * y + sigma / _SQRT2PI * np.exp(-0.5 * (u / sigma) ** 2)


def sequential_coefficients(rates: np.ndarray) -> np.ndarray:
    """Coefficients B with species_j(t) = sum_m B[j, m] exp(-k_m t) for a sequential chain.

    Species 1 -> 2 -> ... with rates k_1..k_n (distinct; a final k = 0 gives a
    non-decaying last species, whose "exponential" is the step).
    ``c_j = (prod_{i<j} k_i) sum_{m<=j} e^{-k_m t} / prod_{i<=j, i != m} (k_i - k_m)``
    [derived by Laplace transform].

    Parameters
    ----------
    rates : ndarray, shape (n,)

    Returns
    -------
    ndarray, shape (n, n), lower triangular
    """
    k = np.asarray(rates, dtype=np.float64)
    n = k.size
    b = np.zeros((n, n))
    for j in range(n):
        pref = np.prod(k[:j])
        for m in range(j + 1):
            others = [k[i] - k[m] for i in range(j + 1) if i != m]
            b[j, m] = pref / np.prod(others) if others else pref
    return b


def sequential_profiles(
    u: np.ndarray, tau1: np.ndarray | float, tau2: np.ndarray | float, sigma: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A, B, C of A -> B -> C (all population in A at u = 0), IRF-convolved.

    ``A = y(tau1)``, ``B = k1/(k2 - k1) (y(tau1) - y(tau2))`` (``k t e^{-kt}``
    form when k1 = k2 to 1e-9 relative), ``C = step - A - B``. Broadcasts.
    """
    tau1 = np.asarray(tau1, dtype=np.float64)
    tau2 = np.asarray(tau2, dtype=np.float64)
    k1, k2 = 1.0 / tau1, 1.0 / tau2
    a = irf_exp(u, tau1, sigma)
    y2 = irf_exp(u, tau2, sigma)
    close = np.abs(k2 - k1) <= 1e-9 * np.maximum(k1, k2)
    with np.errstate(divide="ignore", invalid="ignore"):
        b_gen = k1 / (k2 - k1) * (a - y2)
    if np.any(close):
        b_eq = k1 * irf_texp(u, tau1, sigma)
        b = np.where(close, b_eq, b_gen)
    else:
        b = b_gen
    c = irf_step(u, sigma) - a - b
    return a, b, c


# ---------------------------------------------------------------- batched least squares
def batched_lm(
    fun,
    x0: np.ndarray,
    y: np.ndarray,
    *,
    max_iter: int = 100,
    tol: float = 1e-10,
    step: float = 1e-7,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Levenberg-Marquardt on many independent problems at once (vectorised).

    Minimises ``sum_j (fun(x_b)_j - y_bj)^2`` for every row b. ``fun`` maps a
    parameter batch (n_batch, n_par) to predictions (n_batch, n_obs); NaN
    observations are ignored. The Jacobian is a forward difference with
    relative step `step`. Parameters are unbounded (use a log transform for
    positive quantities).

    Parameters
    ----------
    fun : callable
    x0 : ndarray, shape (n_batch, n_par)
        Starting points.
    y : ndarray, shape (n_batch, n_obs)
        Observations.
    max_iter, tol, step
        Iteration cap, relative cost-change tolerance, difference step.

    Returns
    -------
    x : ndarray, shape (n_batch, n_par)
    cost : ndarray, shape (n_batch,)
        Half the sum of squared residuals.
    converged : ndarray of bool, shape (n_batch,)
    """
    x = np.array(x0, dtype=np.float64, copy=True)
    n_b, n_p = x.shape
    ok = np.isfinite(y)
    yy = np.where(ok, y, 0.0)

    def resid(xb: np.ndarray, rows: np.ndarray) -> np.ndarray:
        return np.where(ok[rows], fun(xb) - yy[rows], 0.0)

    rows = np.arange(n_b)
    r = resid(x, rows)
    cost = 0.5 * np.einsum("bj,bj->b", r, r)
    lam = np.full(n_b, 1e-3)
    active = np.ones(n_b, dtype=bool)
    converged = np.zeros(n_b, dtype=bool)
    eye = np.eye(n_p)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        xa, ra = x[idx], r[idx]
        h = step * np.maximum(np.abs(xa), 1.0)
        jac = np.empty((idx.size, ra.shape[1], n_p))
        for p in range(n_p):
            xp = xa.copy()
            xp[:, p] += h[:, p]
            jac[:, :, p] = (resid(xp, idx) - ra) / h[:, p:p + 1]
        jtj = np.einsum("bjp,bjq->bpq", jac, jac)
        jtr = np.einsum("bjp,bj->bp", jac, ra)
        diag = np.einsum("bpp->bp", jtj)
        damp = jtj + lam[idx, None, None] * (eye * np.maximum(diag, 1e-12)[:, None, :])
        try:
            dx = -np.linalg.solve(damp, jtr[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            dx = -np.einsum("bpq,bq->bp", np.linalg.pinv(damp), jtr)
        xn = xa + dx
        rn = resid(xn, idx)
        cn = 0.5 * np.einsum("bj,bj->b", rn, rn)
        better = np.isfinite(cn) & (cn <= cost[idx])
        rel = np.abs(cost[idx] - cn) <= tol * np.maximum(cost[idx], 1e-300)
        small = np.all(np.abs(dx) <= 1e-10 * np.maximum(np.abs(xa), 1.0), axis=1)
        good = idx[better]
        x[good], r[good], cost[good] = xn[better], rn[better], cn[better]
        lam[good] = np.maximum(lam[good] / 3.0, 1e-12)
        bad = idx[~better]
        lam[bad] = lam[bad] * 4.0
        done = (better & (rel | small)) | (lam[idx] > 1e12)
        converged[idx[done & better]] = True
        converged[idx[done & ~better & (lam[idx] > 1e12)]] = True  # at a minimum to precision
        active[idx[done]] = False
    return x, cost, converged
