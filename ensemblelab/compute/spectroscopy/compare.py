"""Compare a simulated TRPES map with a measured one.

The measured map is resampled (bilinear) onto the part of the simulated grid that
it covers. The model for the measurement is

``measured(E, tau) ~ scale * simulated(E - energy_shift, tau - time_zero)``

``scale`` is solved in closed form (least squares); ``energy_shift`` and ``time_zero``
are optional and found by bounded minimisation of the residual sum of squares
(the shifted simulated map is obtained by bilinear interpolation, zero outside its
grid). Returned scores, on the overlap grid:

* ``cosine``: cosine similarity ``<m, s> / (|m| |s|)`` of the two maps (1 = same shape),
  independent of the scale;
* ``r2``: coefficient of determination ``1 - SS_res / SS_tot`` of the scaled fit
  (``SS_tot`` about the mean of the measured map).

Intervals (95 %) on the scale and on the fitted shift and time zero are Wald intervals
``value +- 1.96 se`` from ``s^2 (J^T J)^-1`` at the optimum, on the measured pixels
inside the overlap (``s^2`` the residual variance there, residuals taken as
independent): they see the measurement's scatter only, not
the simulation's finite sampling nor correlated misfit, so read them as lower bounds.
For per-channel ionisation shifts, a fitted cross-correlation, a background, noise
weighting and a bootstrap over trajectories use
:func:`~ensemblelab.compute.spectroscopy.fit_measured.fit_measured_map`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.interpolate import RegularGridInterpolator
from scipy.optimize import minimize

from ...data.spectrum import TRPESMap
from ...errors import SchemaError

__all__ = ["compare_maps", "MapComparison", "resample_map"]


def resample_map(m: TRPESMap, *, kinetic_energies: np.ndarray, delays: np.ndarray,
                 energy_shift: float = 0.0, time_zero: float = 0.0) -> np.ndarray:
    """Bilinear resampling of ``m`` at ``(delays - time_zero, kinetic_energies - energy_shift)``.

    Returns
    -------
    ndarray, shape (n_delays, n_energies)
        Zero outside the map's grid.
    """
    if m.n_delays < 2 or m.n_energies < 2:
        raise SchemaError("maps need at least 2 delays and 2 energies to be resampled.")
    f = RegularGridInterpolator((m.delays, m.kinetic_energies), m.intensity, method="linear",
                                bounds_error=False, fill_value=0.0)
    dd, ee = np.meshgrid(np.asarray(delays) - time_zero,
                         np.asarray(kinetic_energies) - energy_shift, indexing="ij")
    return f(np.stack([dd.ravel(), ee.ravel()], axis=1)).reshape(dd.shape)


@dataclass(frozen=True)
class MapComparison:
    """Result of :func:`compare_maps`.

    Attributes
    ----------
    scale, energy_shift, time_zero : float
        Fitted parameters (eV for the shift, fs for the time zero).
    cosine, r2 : float
        Similarity scores (see the module docstring).
    measured, model, residual : TRPESMap
        On the common grid: resampled measurement, scaled and shifted simulation,
        and ``measured - model``.
    intervals : dict of str to (float, float)
        95 % Wald interval of ``scale`` and of each fitted parameter (see the module
        docstring: a lower bound on the uncertainty); fixed parameters are absent.
    """

    scale: float
    energy_shift: float
    time_zero: float
    cosine: float
    r2: float
    measured: TRPESMap
    model: TRPESMap
    residual: TRPESMap
    intervals: dict[str, tuple[float, float]] = field(default_factory=dict)


def compare_maps(simulated: TRPESMap, measured: TRPESMap, *, fit_energy_shift: bool = False,
                 fit_time_zero: bool = False, shift_bounds: tuple[float, float] = (-0.5, 0.5),
                 time_zero_bounds: tuple[float, float] = (-100.0, 100.0)) -> MapComparison:
    """Fit a simulated map to a measured one and score the agreement.

    Parameters
    ----------
    simulated, measured : TRPESMap
    fit_energy_shift, fit_time_zero : bool
        Also fit a rigid kinetic-energy shift (eV) and a time zero (fs).
    shift_bounds, time_zero_bounds : (float, float)
        Search ranges.

    Returns
    -------
    MapComparison
    """
    e_sim, e_meas = simulated.kinetic_energies, measured.kinetic_energies
    se = (e_sim >= e_meas[0]) & (e_sim <= e_meas[-1])
    sd = (simulated.delays >= measured.delays[0]) & (simulated.delays <= measured.delays[-1])
    if se.sum() < 2 or sd.sum() < 2:
        raise SchemaError("the measured and simulated maps do not overlap on at least 2 x 2 "
                          "grid points; check units (eV, fs) and ranges.")
    energies, delays = simulated.kinetic_energies[se], simulated.delays[sd]
    meas = resample_map(measured, kinetic_energies=energies, delays=delays)

    def model_at(shift: float, t0: float) -> np.ndarray:
        if shift == 0.0 and t0 == 0.0:
            return simulated.intensity[np.ix_(sd, se)]
        return resample_map(simulated, kinetic_energies=energies, delays=delays, energy_shift=shift,
                            time_zero=t0)

    def best_scale(s: np.ndarray) -> float:
        den = float(np.sum(s * s))
        return float(np.sum(s * meas)) / den if den > 0 else 0.0

    def sse(x: np.ndarray) -> float:
        shift = float(x[0]) if fit_energy_shift else 0.0
        t0 = float(x[-1]) if fit_time_zero else 0.0
        s = model_at(shift, t0)
        return float(np.sum((meas - best_scale(s) * s) ** 2))

    shift = t0 = 0.0
    if fit_energy_shift or fit_time_zero:
        x0, bounds = [], []
        if fit_energy_shift:
            x0.append(0.0)
            bounds.append(tuple(shift_bounds))
        if fit_time_zero:
            x0.append(0.0)
            bounds.append(tuple(time_zero_bounds))
        # coarse scan first (the residual is not convex in the shifts), then polish
        grids = [np.linspace(b[0], b[1], 21) for b in bounds]
        mesh = np.stack([g.ravel() for g in np.meshgrid(*grids, indexing="ij")], axis=1)
        start = mesh[int(np.argmin([sse(p) for p in mesh]))]
        res = minimize(sse, start, method="Powell", bounds=bounds,
                       options={"xtol": 1e-6, "ftol": 1e-12})
        x = res.x
        shift = float(x[0]) if fit_energy_shift else 0.0
        t0 = float(x[-1]) if fit_time_zero else 0.0
    s = model_at(shift, t0)
    scale = best_scale(s)
    model = scale * s
    resid = meas - model
    norm = float(np.linalg.norm(meas) * np.linalg.norm(s))
    cosine = float(np.sum(meas * s)) / norm if norm > 0 else 0.0
    ss_tot = float(np.sum((meas - meas.mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid**2)) / ss_tot if ss_tot > 0 else 0.0
    # intervals on the measured pixels inside the overlap (independent, unlike the
    # measurement resampled onto the simulated grid)
    me = (e_meas >= energies[0]) & (e_meas <= energies[-1])
    md = (measured.delays >= delays[0]) & (measured.delays <= delays[-1])
    e_in, d_in = e_meas[me], measured.delays[md]

    def model_meas(sh: float, tz: float) -> np.ndarray:
        return resample_map(simulated, kinetic_energies=e_in, delays=d_in, energy_shift=sh,
                            time_zero=tz)

    intervals = _wald_intervals(model_meas, measured.intensity[np.ix_(md, me)], scale, shift, t0,
                                fit_energy_shift, fit_time_zero)
    params = {"scale": scale, "energy_shift": shift, "time_zero": t0, "cosine": cosine,
              "r2": r2, "intervals": {k: list(v) for k, v in intervals.items()}}
    return MapComparison(
        scale=scale, energy_shift=shift, time_zero=t0, cosine=cosine, r2=r2,
        measured=TRPESMap(kinetic_energies=energies, delays=delays, intensity=meas,
                          params={"role": "measured (resampled)", **params}),
        model=TRPESMap(kinetic_energies=energies, delays=delays, intensity=model,
                       params={"role": "model", **params}),
        residual=TRPESMap(kinetic_energies=energies, delays=delays, intensity=resid,
                          params={"role": "residual", **params}),
        intervals=intervals,
    )


def _wald_intervals(model_at: Any, meas: np.ndarray, scale: float, shift: float, t0: float,
                    fit_shift: bool, fit_t0: bool) -> dict[str, tuple[float, float]]:
    """95 % Wald intervals of the scale and the fitted shift / time zero (central differences).

    ``model_at(shift, t0)`` gives the unscaled simulation at the measured pixels `meas`.
    """
    s = model_at(shift, t0)
    cols, names = [s.ravel()], ["scale"]
    if fit_shift:
        h = 1e-3
        cols.append(scale * (model_at(shift + h, t0) - model_at(shift - h, t0)).ravel() / (2 * h))
        names.append("energy_shift")
    if fit_t0:
        h = 0.1
        cols.append(scale * (model_at(shift, t0 + h) - model_at(shift, t0 - h)).ravel() / (2 * h))
        names.append("time_zero")
    jac = np.column_stack(cols)
    dof = meas.size - len(names)
    if dof <= 0:
        return {}
    s2 = float(np.sum((meas - scale * s) ** 2)) / dof
    se = np.sqrt(np.clip(np.diag(s2 * np.linalg.pinv(jac.T @ jac)), 0.0, None))
    values = {"scale": scale, "energy_shift": shift, "time_zero": t0}
    z = 1.959963984540054  # two-sided 95 % normal quantile (common practice)
    return {n: (values[n] - z * e, values[n] + z * e) for n, e in zip(names, se, strict=True)}
