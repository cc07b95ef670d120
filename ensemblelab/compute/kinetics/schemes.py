"""Kinetic schemes for populations: model functions and the registry of schemes.

Schemes (times in fs, u = t - t0):

* ``"single"``: one decaying state with optional latency d and offset P_inf,
  ``A(u) = 1`` for ``0 <= u < d`` and ``P_inf + (1 - P_inf) exp(-(u - d)/tau)`` after.
* ``"sequential"``: A -> B -> C with time constants tau1, tau2:
  ``A = e^{-k1 u}``, ``B = k1/(k2 - k1) (e^{-k1 u} - e^{-k2 u})``, ``C = 1 - A - B``
  (first-order consecutive reactions, textbook chemical kinetics).
* ``"parallel"``: A decays with total time constant tau into B (fraction
  ``branching``) and C (the rest): ``B = branching (1 - A)``.

Each can be convolved with a Gaussian instrument response of FWHM `irf_fwhm`
(closed form with ``erfcx``, overflow-free for any u/sigma and tiny tau); every
scheme is zero before t0 in that case, i.e. the convolved function is
``scheme(u) Theta(u)``, which is what a pump-probe experiment sees.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from . import _kernels_populations as _k

__all__ = [
    "KINETIC_SCHEMES",
    "exp_decay",
    "single_exponential",
    "sequential",
    "parallel",
    "sequential_maximum",
    "fwhm_to_sigma",
]

#: FWHM / sigma of a Gaussian, 2 sqrt(2 ln 2)
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def fwhm_to_sigma(fwhm: float | None) -> float:
    """Standard deviation of a Gaussian of the given FWHM (0 for None)."""
    return 0.0 if fwhm is None else float(fwhm) / _FWHM_PER_SIGMA


# ---------------------------------------------------------------- population functions
def exp_decay(t: npt.ArrayLike, *, tau: float, t0: float = 0.0,
              irf_fwhm: float | None = None) -> np.ndarray:
    """``exp(-(t - t0)/tau) Theta(t - t0)``, optionally convolved with a Gaussian IRF.

    Parameters
    ----------
    t : array_like
        Times in fs.
    tau : float
        Time constant in fs (> 0).
    t0 : float
        Time zero in fs.
    irf_fwhm : float, optional
        FWHM of the Gaussian instrument response in fs.

    Returns
    -------
    ndarray, same shape as `t`

    Examples
    --------
    >>> round(float(exp_decay(0.0, tau=100.0, irf_fwhm=50.0)), 6)
    0.425407
    """
    u = np.asarray(t, dtype=np.float64) - t0
    return _k.irf_exp(u, tau, fwhm_to_sigma(irf_fwhm))


def single_exponential(t: npt.ArrayLike, *, tau: float, latency: float = 0.0,
                       p_inf: float = 0.0, t0: float = 0.0,
                       irf_fwhm: float | None = None) -> np.ndarray:
    """Population of a state decaying once (after a latency) to an offset.

    ``A(u) = Theta(u) - (1 - p_inf) [Theta(u - d) - e^{-(u - d)/tau} Theta(u - d)]``
    with u = t - t0, d = latency; convolved term by term with the IRF.

    Returns
    -------
    ndarray, same shape as `t`
    """
    s = fwhm_to_sigma(irf_fwhm)
    u = np.asarray(t, dtype=np.float64) - t0
    return _single(u, tau, latency, p_inf, s)


def _single(u, tau, latency, p_inf, s):
    ud = u - latency
    return _k.irf_step(u, s) - (1.0 - p_inf) * (_k.irf_step(ud, s) - _k.irf_exp(ud, tau, s))


def sequential(t: npt.ArrayLike, *, tau1: float, tau2: float, t0: float = 0.0,
               irf_fwhm: float | None = None) -> np.ndarray:
    """Populations of A -> B -> C (all in A at t0), shape (n_times, 3).

    Exact also for tau1 == tau2 (then ``B = k u e^{-k u}``).

    Examples
    --------
    >>> abc = sequential([100.0], tau1=50.0, tau2=200.0)
    >>> [round(float(v), 7) for v in abc[0]]
    [0.1353353, 0.6282605, 0.2364042]
    """
    u = np.asarray(t, dtype=np.float64).ravel() - t0
    return np.column_stack(_k.sequential_profiles(u, tau1, tau2, fwhm_to_sigma(irf_fwhm)))


def parallel(t: npt.ArrayLike, *, tau: float, branching: float, t0: float = 0.0,
             irf_fwhm: float | None = None) -> np.ndarray:
    """Populations of A -> B (fraction `branching`) and A -> C, shape (n_times, 3).

    ``A = e^{-u/tau}``, ``B = branching (1 - A)``, ``C = (1 - branching)(1 - A)``;
    partial time constants are ``tau/branching`` and ``tau/(1 - branching)``.
    """
    s = fwhm_to_sigma(irf_fwhm)
    u = np.asarray(t, dtype=np.float64).ravel() - t0
    a = _k.irf_exp(u, tau, s)
    rest = _k.irf_step(u, s) - a
    return np.column_stack([a, branching * rest, (1.0 - branching) * rest])


def sequential_maximum(tau1: float, tau2: float) -> tuple[float, float]:
    """Time and height of the maximum of the intermediate B of A -> B -> C.

    ``t* = ln(k1/k2)/(k1 - k2)``, ``B(t*) = (k1/k2)^(k2/(k2 - k1))``; for k1 = k2:
    ``t* = tau``, ``B = 1/e`` (the textbook consecutive first-order reactions).

    Examples
    --------
    >>> [round(v, 7) for v in sequential_maximum(50.0, 200.0)]
    [92.4196241, 0.6299605]
    """
    k1, k2 = 1.0 / tau1, 1.0 / tau2
    if abs(k1 - k2) <= 1e-12 * max(k1, k2):
        return float(tau1), math.exp(-1.0)
    return math.log(k1 / k2) / (k1 - k2), (k1 / k2) ** (k2 / (k2 - k1))


# ---------------------------------------------------------------- scheme registry
@dataclass(frozen=True)
class Scheme:
    name: str
    params: tuple[str, ...]
    n_roles: tuple[int, ...]  # allowed numbers of fitted states
    roles: tuple[str, ...]


KINETIC_SCHEMES: dict[str, Scheme] = {
    "single": Scheme("single", ("tau", "latency", "p_inf"), (1,), ("A",)),
    "sequential": Scheme("sequential", ("tau1", "tau2"), (2, 3), ("A", "B", "C")),
    "parallel": Scheme("parallel", ("tau", "branching"), (2, 3), ("A", "B", "C")),
}
POSITIVE = {"tau", "tau1", "tau2"}
UNIT = {"tau": "fs", "tau1": "fs", "tau2": "fs", "latency": "fs", "p_inf": "1",
         "branching": "1", "tau_B": "fs", "tau_C": "fs", "t_max_B": "fs", "B_max": "1"}


class Problem:
    """Maps free parameters (transformed) to stacked predictions of the fitted states."""

    def __init__(self, scheme: str, free: list[str], fixed: dict[str, float], times: np.ndarray,
                 n_roles: int, sigma: float, t0: float) -> None:
        self.scheme, self.free, self.fixed = scheme, free, fixed
        self.u = times - t0
        self.n_roles, self.sigma = n_roles, sigma

    def to_natural(self, x: np.ndarray) -> dict[str, np.ndarray]:
        out: dict[str, Any] = dict(self.fixed)
        for j, name in enumerate(self.free):
            v = x[..., j]
            if name in POSITIVE:
                v = np.exp(np.clip(v, -30.0, 60.0))  # 1e-13 .. 1e26 fs
            elif name == "branching":
                v = 1.0 / (1.0 + np.exp(-np.clip(v, -40.0, 40.0)))
            out[name] = v
        return out

    def to_free(self, natural: dict[str, float]) -> np.ndarray:
        x = []
        for name in self.free:
            v = float(natural[name])
            if name in POSITIVE:
                v = math.log(v)
            elif name == "branching":
                v = min(max(v, 1e-6), 1 - 1e-6)
                v = math.log(v / (1 - v))
            x.append(v)
        return np.asarray(x)

    def curves(self, x: np.ndarray) -> np.ndarray:
        """x (n_b, n_free) -> (n_b, n_roles, n_times)."""
        p = self.to_natural(x)
        col = {k: (np.asarray(v, dtype=float)[:, None] if np.ndim(v) else float(v))
               for k, v in p.items()}
        u, s = self.u[None, :], self.sigma
        if self.scheme == "single":
            a = _single(u, col["tau"], col["latency"], col["p_inf"], s)
            out = a[:, None, :]
        elif self.scheme == "sequential":
            a, b, c = _k.sequential_profiles(u, col["tau1"], col["tau2"], s)
            out = np.stack(np.broadcast_arrays(a, b, c), axis=1)
        else:
            a = _k.irf_exp(u, col["tau"], s)
            rest = _k.irf_step(u, s) - a
            out = np.stack(np.broadcast_arrays(a, col["branching"] * rest,
                                               (1.0 - col["branching"]) * rest), axis=1)
        return out[:, : self.n_roles, :]

    def __call__(self, x: np.ndarray) -> np.ndarray:
        c = self.curves(x)
        return c.reshape(c.shape[0], -1)


