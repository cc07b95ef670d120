"""Naive reference twins of :mod:`._kernels_populations` (slow, obvious; for tests only)."""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import least_squares

__all__ = [
    "wilson_interval_loop",
    "sample_on_grid_loop",
    "bootstrap_populations_loop",
    "irf_exp_quad",
    "sequential_loop",
    "refit_loop",
]


def wilson_interval_loop(k: float, n: float, z: float) -> tuple[float, float]:
    """Wilson interval (7.1) for one proportion, written out term by term."""
    if n <= 0:
        return math.nan, math.nan
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def sample_on_grid_loop(
    traj_row: np.ndarray, time: np.ndarray, n_traj: int, grid: np.ndarray,
    hold: np.ndarray | None = None, hold_until: float = -np.inf,
) -> np.ndarray:
    """Per-trajectory, per-grid-time loop of nearest-previous-step sampling.

    A trajectory with ``hold[r]`` stays at its last snapshot until `hold_until`.
    """
    out = np.full((n_traj, grid.size), -1, dtype=np.int64)
    for r in range(n_traj):
        rows = np.flatnonzero(traj_row == r)
        if rows.size == 0:
            continue
        t = time[rows]
        end = t[-1]
        if hold is not None and hold[r]:
            end = max(end, hold_until)
        for j, g in enumerate(grid):
            tol = 1e-9 * max(1.0, abs(g))
            if g < t[0] - tol or g > end + tol:
                continue
            k = -1
            for i, ti in enumerate(t):
                if ti <= g + 1e-9 * max(1.0, abs(ti)):
                    k = i
            out[r, j] = rows[k]
    return out


def bootstrap_populations_loop(
    values: np.ndarray, alive: np.ndarray, weights: np.ndarray, indices: np.ndarray
) -> np.ndarray:
    """One resample at a time: average the drawn trajectories (indices (n_boot, n_traj))."""
    n_boot = indices.shape[0]
    _, n_times, n_states = values.shape
    out = np.empty((n_boot, n_times, n_states))
    for b in range(n_boot):
        num = np.zeros((n_times, n_states))
        den = np.zeros(n_times)
        for i in indices[b]:
            num += weights[i] * values[i]
            den += weights[i] * alive[i]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[b] = num / den[:, None]
    return out


def irf_exp_quad(t: float, tau: float, sigma: float) -> float:
    """(exp(-s/tau) Theta(s)) convolved with N(0, sigma) at t, by numerical quadrature."""
    from scipy.integrate import quad

    def integrand(s: float) -> float:
        return math.exp(-s / tau) * math.exp(-0.5 * ((t - s) / sigma) ** 2) / (
            sigma * math.sqrt(2 * math.pi))

    hi = max(t + 12 * sigma, 0.0) + 40 * tau
    val, _ = quad(integrand, 0.0, hi, points=[max(t, 0.0)], limit=400,
                  epsabs=1e-14, epsrel=1e-12)
    return val


def sequential_loop(t: np.ndarray, tau1: float, tau2: float, dt: float = 1e-3) -> np.ndarray:
    """A -> B -> C integrated with explicit small Euler steps (columns A, B, C)."""
    n = int(math.ceil(t.max() / dt)) + 1
    k1, k2 = 1 / tau1, 1 / tau2
    a, b, c = 1.0, 0.0, 0.0
    grid = np.arange(n) * dt
    out = np.empty((n, 3))
    for i in range(n):
        out[i] = (a, b, c)
        # midpoint (RK2) step
        da, db = -k1 * a, k1 * a - k2 * b
        am, bm = a + 0.5 * dt * da, b + 0.5 * dt * db
        da, db = -k1 * am, k1 * am - k2 * bm
        a, b = a + dt * da, b + dt * db
        c = 1.0 - a - b
    return np.column_stack([np.interp(t, grid, out[:, j]) for j in range(3)])


def refit_loop(fun, x0: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Fit every row of `y` separately with scipy.optimize.least_squares (x0 (n_batch, n_par))."""
    out = np.empty_like(np.asarray(x0, dtype=float))
    for b in range(y.shape[0]):
        ok = np.isfinite(y[b])

        def res(x: np.ndarray, b: int = b, ok: np.ndarray = ok) -> np.ndarray:
            return (fun(x[None, :])[0] - y[b])[ok]

        out[b] = least_squares(res, x0[b], xtol=1e-14, ftol=1e-14, gtol=1e-14).x
    return out
