"""Array-level kernels for TRPES map assembly (private; callers validate their input).

Idea. Every stick (one snapshot and one open ionisation channel) is a Gaussian
``w G(E - x; Gamma)`` in kinetic energy, all with the same FWHM ``Gamma`` for a
given probe and resolution, sitting at the snapshot's time bin. Instead of
evaluating ``n_sticks x n_energies`` Gaussians we

1. deposit the sticks into a fine uniform energy grid (spacing ``h`` a small
   fraction of ``Gamma``), keeping ``order`` Taylor moments per bin
   ``M_k[b] = sum w (delta / h)^k`` with ``delta = x - c_b`` the offset from the bin
   centre (one ``np.bincount`` per moment, chunked so memory stays bounded);
2. broaden exactly with the Gaussian's Taylor series about the bin centre,
   ``G(u - delta) = sum_k delta^k a^(k/2) H_k(sqrt(a) u) G(u) / k!``
   (``a = 4 ln2 / Gamma^2``, ``H_k`` physicists' Hermite polynomials), one dense
   matrix per moment evaluated at the requested output energies;
3. convolve along time with a matrix of the normalised cross-correlation.

The truncation error of step 2 is bounded by the first omitted term,
about ``(sqrt(2a) h/2)^order / sqrt(order!)`` relative to the peak height (for
``h = Gamma/8``: order 2 -> 1e-2, order 4 -> 5e-5, order 6 -> 1e-7, order 8 ->
3e-10). Cached moments can be re-broadened for any ``Gamma`` that keeps
``h / Gamma`` small, which is what makes re-broadening fast.
"""

from __future__ import annotations

import math

import numpy as np

from ..units import FOUR_LN2

__all__ = [
    "DEFAULT_CHUNK",
    "deposit_moments",
    "deposit_counts",
    "energy_matrices",
    "time_matrix",
    "assemble",
]

#: sticks per chunk in :func:`deposit_moments` (~2 MB per float64 buffer)
DEFAULT_CHUNK = 1 << 18


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
        Sticks per chunk.

    Returns
    -------
    ndarray, shape (order, n_comp, n_time, n_fine)
    """
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
    h_prev = np.ones_like(y)
    out[0] = g
    if order > 1:
        h_cur = 2.0 * y
        scale = h * sa
        out[1] = scale * h_cur * g
        for k in range(2, order):
            h_next = 2.0 * y * h_cur - 2.0 * (k - 1) * h_prev
            h_prev, h_cur = h_cur, h_next
            out[k] = (scale**k / math.factorial(k)) * h_cur * g
    return out


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


def assemble(hist: np.ndarray, bmat: np.ndarray, cmat: np.ndarray) -> np.ndarray:
    """Combine normalised moment histograms into maps.

    Parameters
    ----------
    hist : ndarray, shape (order, n_comp, n_time, n_fine)
        Moment histograms already divided by the alive weight per time bin.
    bmat : ndarray, shape (order, n_fine, n_energies)
    cmat : ndarray, shape (n_delays, n_time), or None
        None means the identity (maps on the internal time grid).

    Returns
    -------
    ndarray, shape (n_comp, n_delays, n_energies)
    """
    order, n_comp, n_time, n_fine = hist.shape
    n_e = bmat.shape[2]
    b2 = bmat.reshape(order * n_fine, n_e)
    out = np.empty((n_comp, n_time if cmat is None else cmat.shape[0], n_e))
    for c in range(n_comp):
        h2 = np.moveaxis(hist[:, c], 0, 1).reshape(n_time, order * n_fine)
        if cmat is None:
            out[c] = h2 @ b2
            continue
        # choose the cheaper association of C @ H @ B
        cost_a = cmat.shape[0] * n_time * order * n_fine + cmat.shape[0] * order * n_fine * n_e
        cost_b = n_time * order * n_fine * n_e + cmat.shape[0] * n_time * n_e
        if cost_a < cost_b:
            out[c] = (cmat @ h2) @ b2
        else:
            out[c] = cmat @ (h2 @ b2)
    return out
