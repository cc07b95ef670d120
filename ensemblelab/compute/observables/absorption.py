"""Transient absorption of an ensemble in the classical doorway-window picture.

Signal. The differential absorption (pump on minus pump off) per pumped molecule,
expressed as an absorption cross section in Angstrom^2 (positive = more absorption,
like delta-OD), times the excitation fraction ``f_exc``:

    dA(E, u) = f_exc [ - A_0(E) + A_now(E, u) ],   u >= 0 (zero before launch)

* ground-state bleach ``GSB = - f_exc A_0(E)``: the absorption of the molecules the
  pump removed from the ground state, i.e. the steady-state absorption of the initial
  conditions (trajectory weights; for unit weights the ensemble's steady-state
  spectrum): ``A_0(E) = K sum_j f_0j g(E - (E_j - E_0))`` averaged over trajectories.
  Taken from ``excitation_energies`` and ``oscillator_strengths`` when the ensemble has
  them, otherwise from the first snapshot's ``transition_strengths`` and energies.
* stimulated emission ``SE`` (<= 0): from the active state a to every lower state j at
  ``E_a - E_j`` with strength ``f_aj`` (same cross section as absorption for the same
  pair of states), alive-normalised ensemble average;
* excited-state absorption ``ESA`` (>= 0): from a to every higher state j at
  ``E_j - E_a``. A trajectory back on S0 absorbs from S0 at its (hot) geometry: that
  term is in ``ESA`` too and refills the bleach (``by="state"`` separates it as
  ``ESA:S0``).

``K = pi e^2 hbar / (2 eps0 m_e c) = 1.0976099 Angstrom^2 eV`` (scipy.constants) turns an
oscillator strength and an area-normalised line shape ``g`` (1/eV) into a cross
section. The line shape is the probe's window as for the photoelectron map: a Gaussian
of FWHM ``sqrt(Gamma_probe^2 + resolution^2)`` with ``Gamma_probe = 4 ln2 hbar / T``.
Snapshots whose needed strengths are NaN (not computed) are left out of numerator and
alive weight alike. Time handling (grid, alive normalisation, cross-correlation) is that
of the photoelectron and scattering maps.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import constants

from ...data.observables import AbsorptionMap
from ...errors import EnsembleWarning, SchemaError
from ..engine import BlockSpan, add, as_source, is_chunked, reduce
from ..spectroscopy._checks import check_grid, check_nonneg, check_pulse
from ..spectroscopy.maps import time_grid
from ..spectroscopy.pulses import GaussianPulse, gaussian
from ..spectroscopy.weights import resolve_weights, trajectory_weights, weights_word
from ._timegrid import (
    EDGE_SIGMAS,
    alive_on_delays,
    cc_sigma,
    check_boot,
    delay_matrix,
    deposit_matrix,
    first_rows,
    percentile_band,
    poisson_counts,
    replicate_deposit,
    unknown_delays,
)

__all__ = ["compute_transient_absorption", "absorption_spectrum", "CROSS_SECTION_CONSTANT",
           "strength_rows", "snapshot_spectra",
           "absorption_partial"]

#: pi e^2 hbar / (2 eps0 m_e c) in Angstrom^2 eV (CODATA via scipy.constants)
CROSS_SECTION_CONSTANT = (math.pi * constants.e**2 * constants.hbar
                          / (2 * constants.epsilon_0 * constants.m_e * constants.c)
                          / constants.e * 1e20)

#: snapshots per broadening chunk inside a block
CHUNK = 4096


def absorption_spectrum(gaps: npt.ArrayLike, strengths: npt.ArrayLike,
                        photon_energies: npt.ArrayLike, fwhm: float) -> np.ndarray:
    """Absorption cross section of sticks, in Angstrom^2.

    Parameters
    ----------
    gaps : array_like, shape (n_sticks,)
        Transition energies in eV.
    strengths : array_like, shape (n_sticks,)
        Oscillator strengths (dimensionless), or strengths times weights.
    photon_energies : array_like, shape (n_energies,)
        eV.
    fwhm : float
        Gaussian FWHM of the line shape in eV.

    Returns
    -------
    ndarray, shape (n_energies,)
        ``K sum_s f_s G(E; gap_s, fwhm)`` with ``K`` = :data:`CROSS_SECTION_CONSTANT`.

    Examples
    --------
    >>> import numpy as np
    >>> e = np.linspace(2.0, 6.0, 4001)
    >>> s = absorption_spectrum([4.0], [0.5], e, 0.1)
    >>> round(float(np.trapezoid(s, e)), 6)  # area K f (Angstrom^2 eV)
    0.548805
    """
    e = np.asarray(photon_energies, dtype=float)
    g = np.asarray(gaps, dtype=float).ravel()
    f = np.asarray(strengths, dtype=float).ravel()
    out = np.zeros(e.size)
    for s0 in range(0, g.size, 2048):
        sl = slice(s0, s0 + 2048)
        out += f[sl] @ gaussian(e[None, :], g[sl, None], fwhm)
    return CROSS_SECTION_CONSTANT * out


def strength_rows(ts: np.ndarray, active: np.ndarray) -> np.ndarray:
    """f_aj for each snapshot's active state a, symmetrised (NaN taken from f_ja)."""
    idx = np.arange(ts.shape[0])
    row, col = ts[idx, active, :], ts[idx, :, active]
    return np.where(np.isnan(row), col, row)


def snapshot_spectra(energies: np.ndarray, active: np.ndarray, f_row: np.ndarray,
                      e_grid: np.ndarray, fwhm: float) -> tuple[np.ndarray, np.ndarray]:
    """SE (<= 0) and ESA (>= 0) cross sections of each snapshot, each (n, n_energies)."""
    n, n_states = energies.shape
    se = np.zeros((n, e_grid.size))
    esa = np.zeros((n, e_grid.size))
    ea = energies[np.arange(n), active]
    for j in range(n_states):
        gap = energies[:, j] - ea
        f = np.nan_to_num(f_row[:, j])
        up = (j > active) & (f > 0)
        down = (j < active) & (f > 0)
        for mask, out, sign in ((up, esa, 1.0), (down, se, -1.0)):
            if np.any(mask):
                rows = np.flatnonzero(mask)
                out[rows] += sign * CROSS_SECTION_CONSTANT * f[rows, None] * gaussian(
                    e_grid[None, :], np.abs(gap[rows])[:, None], fwhm)
    return se, esa


def absorption_partial(block: Any, span: BlockSpan, settings: dict[str, Any]) -> dict[str, Any]:
    """Partial sums of one block of trajectories (see :mod:`ensemblelab.compute.engine`).

    Returns
    -------
    dict
        ``se``, ``esa`` (n_states * n_time, n_energies) weighted cross sections on the
        (active state, time) grid, ``alive`` (n_states * n_time,), ``count`` (n_time,),
        ``gsb`` (n_energies,) and ``gsb_w`` (weighted initial absorption and weight),
        ``missing`` (snapshots without the strengths they need).
    """
    grid, e_grid, fwhm = settings["grid"], settings["photon_energies"], settings["fwhm"]
    n_states, n_time = block.n_states, int(grid["n_time"])
    ts = block.transition_strengths
    if ts is None:
        raise SchemaError("compute_transient_absorption needs per-snapshot "
                          "transition_strengths (n_snapshots, n_states, n_states). Hint: "
                          "add them with Ensemble.from_arrays(transition_strengths=...) or the "
                          "'transition_strengths' key of the extended XYZ format.")
    w_traj, _ = trajectory_weights(block, weights=settings["weights"], pump=settings["pump"])
    snaps = block.snapshots
    w = w_traj[block.traj_index] if block.n_snapshots else np.zeros(0)
    active = snaps["active"].to_numpy().astype(np.int64)
    time = snaps["time"].to_numpy()
    energies = np.asarray(block.energies, dtype=float)
    out: dict[str, Any] = {"se": np.zeros((n_states * n_time, e_grid.size)),
           "esa": np.zeros((n_states * n_time, e_grid.size)),
           "alive": np.zeros(n_states * n_time), "count": np.zeros(n_time),
           "gsb": np.zeros(e_grid.size), "gsb_w": 0.0, "missing": 0.0}
    boot = settings.get("boot")
    if boot is not None:  # Poisson-bootstrap counts of this block's trajectories
        counts_t = boot[:, span.traj_start:span.traj_start + block.n_trajectories]
        counts = counts_t[:, block.traj_index]
        n_boot = counts.shape[0]
        out.update(b_num=np.zeros((n_boot * n_time, e_grid.size)),
                   b_alive=np.zeros(n_boot * n_time))
    for s0 in range(0, block.n_snapshots, CHUNK):
        sl = slice(s0, min(s0 + CHUNK, block.n_snapshots))
        f_row = strength_rows(np.asarray(ts[sl], dtype=float), active[sl])
        e = energies[sl]
        needed = np.arange(n_states)[None, :] != active[sl, None]
        ok = ~np.any(np.isnan(f_row) & needed, axis=1) & np.all(np.isfinite(e), axis=1)
        out["missing"] += float(np.count_nonzero(~ok))
        ws = np.where(ok, w[sl], 0.0)
        se, esa = snapshot_spectra(np.where(ok[:, None], e, 0.0), active[sl],
                                    np.where(ok[:, None], f_row, 0.0), e_grid, fwhm)
        mat = deposit_matrix(time[sl], active[sl], ws, grid, n_states)
        out["se"] += mat @ se
        out["esa"] += mat @ esa
        out["alive"] += np.asarray(mat.sum(axis=1)).ravel()
        cnt = deposit_matrix(time[sl], np.zeros(sl.stop - s0, dtype=np.int64),
                             ok.astype(float), grid, 1)
        out["count"] += np.asarray(cnt.sum(axis=1)).ravel()
        if boot is not None:
            bmat = replicate_deposit(time[sl], counts[:, sl] * ws[None, :], grid)
            out["b_num"] += bmat @ (se + esa)
            out["b_alive"] += np.asarray(bmat.sum(axis=1)).ravel()
    # bleach: absorption from S0 of the initial conditions
    first = first_rows(snaps["traj"].to_numpy())
    exc, osc = block.excitation_energies, block.oscillator_strengths
    if exc is not None and osc is not None:
        gaps, fs = np.asarray(exc, dtype=float), np.asarray(osc, dtype=float)
        wt = w_traj
    else:
        gaps = energies[first] - energies[first, :1]
        f0 = np.asarray(ts[first], dtype=float)
        fs = np.where(np.isnan(f0[:, 0, :]), f0[:, :, 0], f0[:, 0, :])
        wt = w_traj[block.traj_index[first]] if first.size else np.zeros(0)
    fs = fs.copy()
    fs[:, 0] = 0.0
    good = np.all(np.isfinite(fs), axis=1) & np.all(np.isfinite(gaps), axis=1)
    wt = np.where(good, wt, 0.0)
    fs = np.nan_to_num(fs)
    gaps = np.nan_to_num(gaps)
    per_traj = np.zeros((fs.shape[0], e_grid.size))  # initial absorption of each trajectory
    for j in range(1, fs.shape[1]):
        per_traj += CROSS_SECTION_CONSTANT * fs[:, j, None] * gaussian(
            e_grid[None, :], gaps[:, j, None], fwhm)
    out["gsb"] = wt @ per_traj
    out["gsb_w"] = float(wt.sum())
    if boot is not None:
        out["b_gsb"] = (counts_t * wt[None, :]) @ per_traj
        out["b_gsb_w"] = counts_t @ wt
    return out


def _replicate_total(total: dict[str, Any], *, n_time: int, launched: np.ndarray,
                     cmat: np.ndarray, unknown: np.ndarray, fraction: float, ci: float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Percentile band of the total signal over the bootstrap replicates."""
    n_boot = total["b_gsb_w"].size
    b_num = total["b_num"].reshape(n_boot, n_time, -1)
    b_alive = total["b_alive"].reshape(n_boot, n_time)
    reps = np.full((n_boot, cmat.shape[0], b_num.shape[2]), np.nan)
    step = cmat @ launched
    for b in range(n_boot):
        if total["b_gsb_w"][b] <= 0:
            continue
        a = b_alive[b]
        inv = np.where(a > 0, 1.0 / np.where(a > 0, a, 1.0), 0.0)
        now = cmat @ (b_num[b] * (inv * launched)[:, None])
        reps[b] = fraction * (now - np.outer(step, total["b_gsb"][b] / total["b_gsb_w"][b]))
        reps[b][unknown] = np.nan
    return percentile_band(reps, ci)


def compute_transient_absorption(
    ens: Any,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    photon_energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    excitation_fraction: float | None = None,
    by: str | None = None,
    weights: str = "auto",
    time_step: float | None = None,
    n_boot: int = 0,
    ci: float = 0.95,
    random_state: Any = 0,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
) -> AbsorptionMap:
    """Transient absorption map: bleach, stimulated emission and excited-state absorption.

    Parameters
    ----------
    ens : Ensemble or lazy (chunked) ensemble
        Needs ``transition_strengths`` (per snapshot) and neutral ``energies``.
    probe : GaussianPulse
        The probe: its duration sets the window's spectral FWHM ``4 ln2 hbar / T`` and,
        with the pump, the cross-correlation (its photon energy is not used: the map is
        resolved in probe photon energy).
    pump : GaussianPulse, optional
        Cross-correlation, and doorway weights when ``weights`` resolves to them.
    photon_energies : array_like, shape (n_energies,)
        Probe photon energies in eV, increasing.
    delays : array_like, shape (n_delays,)
        Delays in fs, increasing.
    resolution : float
        Spectrometer FWHM in eV, added in quadrature.
    convolve : bool, default True
        Convolve with the cross-correlation (else the pure signal).
    excitation_fraction : float in (0, 1], optional
        Fraction of molecules excited (default 1); the whole signal scales with it.
    by : None or "state"
        Also give the SE and ESA components by active state (``"SE:S1"``, ``"ESA:S0"``).
    weights : {"auto", "doorway", "uniform", "ensemble"} or str
        Default "auto": sampling-aware, never applies the pump twice (as for
        :func:`ensemblelab.compute_trpes`).
    time_step : float, optional
    n_boot : int, default 0
        Poisson-bootstrap replicates over trajectories for an interval of the total
        (``lower``, ``upper``); 0: none (``params["interval"]`` says so).
    ci : float, default 0.95
        Level of the percentile interval.
    random_state : int or Generator, optional
        Seed of the replicate counts.
    client, scheduler, progress
        As for the other reductions.

    Returns
    -------
    AbsorptionMap
        ``intensity`` in Angstrom^2 per molecule (times the excitation fraction);
        components ``GSB`` (<= 0), ``SE`` (<= 0), ``ESA`` (>= 0) summing to it.
    """
    probe_p = check_pulse(probe, "probe")
    assert probe_p is not None
    pump = check_pulse(pump, "pump", optional=True)
    e_grid = check_grid(photon_energies, "photon_energies")
    delays_a = check_grid(delays, "delays")
    resolution = check_nonneg(resolution, "resolution")
    if by not in (None, "state"):
        raise SchemaError(f"The 'by' parameter must be None or 'state'. Got {by!r} instead.")
    fraction = 1.0 if excitation_fraction is None else float(excitation_fraction)
    if not (math.isfinite(fraction) and 0.0 < fraction <= 1.0):
        raise SchemaError(f"The 'excitation_fraction' parameter must be a float in (0, 1]. "
                          f"Got {excitation_fraction!r} instead.")
    source = as_source(ens)
    weights, note = resolve_weights(source, weights=weights, pump=pump)
    if note:  # the same sampling-aware default as compute_trpes: never the pump twice
        warnings.warn(f"compute_transient_absorption: {note}", EnsembleWarning, stacklevel=2)
    if not source.has("transition_strengths"):
        raise SchemaError("compute_transient_absorption needs per-snapshot "
                          "transition_strengths (n_snapshots, n_states, n_states). Hint: "
                          "add them with Ensemble.from_arrays(transition_strengths=...) or the "
                          "'transition_strengths' key of the extended XYZ format.")
    fwhm = math.hypot(probe_p.spectral_fwhm, resolution)
    grid = time_grid(source, time_step, client=client, scheduler=scheduler)
    n_boot, ci = check_boot(n_boot, ci)
    settings = {"grid": grid, "photon_energies": e_grid, "fwhm": fwhm, "weights": weights,
                "pump": pump, "boot": poisson_counts(n_boot, source.n_trajectories,
                                                     random_state) if n_boot else None}
    total = reduce(source, absorption_partial, add, args=(settings,),
                   fields=["energies", "transition_strengths", "excitation_energies",
                           "oscillator_strengths", "transition_dipoles"],
                   client=client, scheduler=scheduler, progress=progress,
                   desc="transient absorption")
    n_states, n_time = source.n_states, int(grid["n_time"])
    alive_g = total["alive"].reshape(n_states, n_time)
    alive = alive_g.sum(axis=0)
    inv = np.where(alive > 0, 1.0 / np.where(alive > 0, alive, 1.0), 0.0)
    times = grid["start"] + grid["dt"] * np.arange(n_time)
    launched = (times >= 0).astype(float)
    if total["gsb_w"] <= 0:
        raise SchemaError("No initial condition with finite strengths and positive weight; "
                          "cannot form the ground-state bleach.")
    a0 = total["gsb"] / total["gsb_w"]
    sigma = cc_sigma(pump, probe_p, convolve)
    cmat = delay_matrix(delays_a, grid, sigma)
    comps: dict[str, np.ndarray] = {"GSB": -fraction * np.outer(cmat @ launched, a0)}
    for name in ("SE", "ESA"):
        per = total[name.lower()].reshape(n_states, n_time, e_grid.size)
        per = per * (inv * launched)[None, :, None]
        conv = fraction * np.einsum("dt,gtq->gdq", cmat, per)
        comps[name] = conv.sum(axis=0)
        if by == "state":
            for i, lab in enumerate(source.state_labels):
                if np.any(conv[i]):
                    comps[f"{name}:{lab}"] = conv[i]
    unknown = unknown_delays(delays_a, grid, cmat)
    for arr in comps.values():
        arr[unknown] = np.nan  # after every trajectory ended: unknown, not zero
    intensity = comps["GSB"] + comps["SE"] + comps["ESA"]
    band: tuple[np.ndarray | None, np.ndarray | None] = (None, None)
    if n_boot:
        band = _replicate_total(total, n_time=n_time, launched=launched, cmat=cmat,
                                unknown=unknown, fraction=fraction, ci=ci)
    t_known = grid["t_known"]
    params = {
        "observable": "transient absorption", "units": "Angstrom^2 per molecule",
        "cross_section_constant": CROSS_SECTION_CONSTANT,
        "probe": {"photon_energy": probe_p.photon_energy, "fwhm": probe_p.fwhm,
                  "n_photons": probe_p.n_photons},
        "pump": None if pump is None else {"photon_energy": pump.photon_energy,
                                           "fwhm": pump.fwhm, "n_photons": pump.n_photons},
        "resolution": resolution, "fwhm_energy": fwhm, "convolve": bool(convolve),
        "sigma_cc": sigma, "excitation_fraction": fraction,
        "weights": weights_word(source, weights=weights, pump=pump),
        "time_step": grid["dt"], "t_end": t_known,
        "edge_delay": (t_known - EDGE_SIGMAS * sigma) if sigma else t_known,
        "snapshots_without_strengths": total["missing"], "by": by,
        "signs": "GSB <= 0, SE <= 0, ESA >= 0; positive = more absorption (delta-OD-like)",
        "chunked": is_chunked(ens),
        "interval": ({"method": "Poisson bootstrap over trajectories, percentile",
                      "n_boot": n_boot, "ci": ci} if n_boot else
                     "none (pass n_boot > 0 for a bootstrap interval of the total)"),
    }
    if total["missing"]:
        warnings.warn(f"{int(total['missing'])} snapshot(s) lack the transition strengths "
                      "(NaN) or energies they need and were left out of the average "
                      "(numerator and alive weight).", EnsembleWarning, stacklevel=2)
    return AbsorptionMap(photon_energies=e_grid, delays=delays_a, intensity=intensity,
                         components=comps, steady_state=a0, lower=band[0], upper=band[1],
                         alive=alive_on_delays(delays_a, grid, alive),
                         alive_count=alive_on_delays(delays_a, grid, total["count"]),
                         params=params)
