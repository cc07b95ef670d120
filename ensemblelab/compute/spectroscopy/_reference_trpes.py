"""Naive reference twins of :mod:`~ensemblelab.compute.spectroscopy._kernels_deposit` and
:mod:`~ensemblelab.compute.spectroscopy._kernels_broadening`
(slow; for tests).

Every contribution is evaluated as its own Gaussian at every output energy, and
the temporal convolution is an explicit loop over delays.
"""

from __future__ import annotations

import math

import numpy as np

from ...units import FOUR_LN2

__all__ = ["pure_map_naive", "convolve_naive", "trpes_naive"]


def _gauss(x: np.ndarray, x0: float, fwhm: float) -> np.ndarray:
    return (2.0 * math.sqrt(math.log(2.0) / math.pi) / fwhm) * np.exp(
        -FOUR_LN2 * (x - x0) ** 2 / fwhm**2)


def pure_map_naive(tbin, tfrac, energy, weight, *, n_time, energies, fwhm):
    """Sum of per-stick Gaussians on (time bin, output energy), truncated below 0 eV.

    ``fwhm`` is a number or a function of the stick energy (energy-dependent resolution:
    each stick gets the width at its own energy).

    Returns
    -------
    ndarray, shape (n_time, n_energies)
    """
    out = np.zeros((n_time, energies.size))
    for i in range(energy.size):
        width = fwhm(energy[i]) if callable(fwhm) else fwhm
        g = weight[i] * _gauss(energies, energy[i], float(width))
        g[energies < 0] = 0.0
        f = 0.0 if tfrac is None else tfrac[i]
        out[tbin[i]] += (1.0 - f) * g
        if f > 0:
            out[tbin[i] + 1] += f * g
    return out


def convolve_naive(pure, times, delays, *, sigma, t_known, cutoff=8.0, launch_half=True):
    """Convolve the pure signal (zero for u < 0) with N(0, sigma) at each delay.

    The kernel is sampled on the uniform grid extended below ``times[0]`` (where
    the signal is zero) and renormalised over the points with u <= t_known.
    """
    dt = times[1] - times[0]
    out = np.zeros((delays.size, pure.shape[1]))
    for d, tau in enumerate(delays):
        j_lo = int(math.floor((tau - cutoff * sigma - times[0]) / dt)) - 1
        j_hi = int(math.ceil((tau + cutoff * sigma - times[0]) / dt)) + 1
        num = np.zeros(pure.shape[1])
        den = 0.0
        for j in range(j_lo, j_hi + 1):
            u = times[0] + j * dt
            if abs(tau - u) > cutoff * sigma or u > t_known + 1e-9 * dt:
                continue
            k = math.exp(-0.5 * ((tau - u) / sigma) ** 2)
            if abs(u - t_known) < 1e-9 * dt:
                k *= 0.5  # trapezoid end
            den += k
            if launch_half and abs(u) < 1e-9 * dt:
                k *= 0.5  # trapezoid start: the signal jumps at launch
            if 0 <= j < pure.shape[0]:
                num += k * pure[j]
        out[d] = num / den if den > 0 else 0.0
    return out


def trpes_naive(model, *, energies, delays, fwhm, sigma, normalise="alive"):
    """A whole map from a :class:`~ensemblelab.compute.spectroscopy.model.TRPESModel`, naively."""
    s = model.sticks
    pure = pure_map_naive(model.tbin, model.tfrac, s.energy, s.weight, n_time=model.n_time,
                          energies=np.asarray(energies, float), fwhm=fwhm)
    if normalise == "alive":
        a = model.alive
        pure = np.where(a[:, None] > 0, pure / np.where(a > 0, a, 1.0)[:, None], 0.0)
    else:
        pure = pure / model.total_weight
    if sigma is None:
        times = model.times
        out = np.zeros((len(delays), pure.shape[1]))
        for d, tau in enumerate(delays):
            if tau < times[0] or tau > model.t_known:
                continue
            out[d] = [np.interp(tau, times, pure[:, j]) for j in range(pure.shape[1])]
        return out
    return convolve_naive(pure, model.times, np.asarray(delays, float), sigma=sigma,
                          t_known=model.t_known, launch_half=model.grid_start == 0.0)
