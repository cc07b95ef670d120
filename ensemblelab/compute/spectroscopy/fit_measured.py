"""Fit the simulated photoelectron map of an ensemble to a measured map.

Model of the measurement (delay ``tau`` in fs, kinetic energy ``E`` in eV)::

    M(E, tau) = scale * sum_k [C(t0, w) P_k(s_k)](E, tau) + background

* ``P_k(s_k)`` is the pure (unconvolved) doorway-window signal of cation channel ``k``
  on the simulation's internal time grid, with ``s_k`` (eV) added to that channel's
  ionisation energies *before* the sticks are made: the threshold test, the
  cross-section and the stick energies all see the shifted ionisation energy (the map
  is recomputed, not its pixels moved). One simulation per trial shift vector gives
  every channel's map at once.
* ``C(t0, w)`` convolves on the internal time grid with a Gaussian cross-correlation
  of FWHM ``w`` (fs) and places simulated delay 0 at measured delay ``t0`` (fs): the
  same kernel as :func:`~.maps.compute_trpes` (renormalised over the simulated span),
  applied without recomputing sticks.
* ``scale`` and ``background`` (a constant) are linear.

The weighted residual ``(measured - M) / sigma`` (``sigma`` the measured map's
uncertainty, or 1) is minimised by bounded nonlinear least squares (trust-region
reflective) from the best point of a coarse scan over a common shift and ``t0``.
Channel-shift derivatives come from two extra simulations (all channels shifted by
``+-h`` at once: channel ``k``'s map depends on ``s_k`` only).

Intervals (level ``ci``):

* ``covariance``: Wald intervals ``value +- z se`` from ``s^2 (J^T J)^-1`` at the
  optimum, with ``s^2`` the reduced chi-square when no uncertainty is given and
  ``max(1, reduced chi-square)`` when it is (a model that misses the data beyond its
  noise widens the intervals, never narrows them). They see the measurement's noise
  only.
* ``bootstrap``: the trajectories of the simulation are resampled with replacement
  and the fit repeated from the optimum; normal intervals ``value +- z sd`` with
  ``sd`` the standard deviation of the refits (percentile intervals are biased for the
  cross-correlation width: a resampled ensemble is grainier, and the fit smooths it
  with a wider kernel). They see the simulation's finite sampling, which the
  covariance cannot.

With ``interval="bootstrap"`` both are reported and the headline interval is the
envelope of the two. Scores: ``R^2 = 1 - SS_res / SS_tot`` (unweighted, about the
measured mean) and the reduced chi-square ``sum(r^2 / sigma^2) / dof`` when an
uncertainty is given.
"""

from __future__ import annotations

import inspect
import math
import warnings
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.optimize import least_squares
from scipy.stats import norm

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import NumericalWarning, SchemaError
from .fit_result import MeasuredFitResult, parameter_table
from .maps import compute_trpes
from .pulses import GaussianPulse, cross_correlation_fwhm
from .weights import trajectory_weights

__all__ = ["fit_measured_map", "MeasuredFitResult", "ChannelMaps"]

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: finite-difference steps: shifts (eV), time zero and width (fs, times the grid step)
_H_SHIFT = 2e-3
_H_TIME = 0.05
_BOOT_COLUMN = "fit_bootstrap_weight"


def _simulate_channels(ens: Ensemble, shifts: np.ndarray, opts: dict[str, Any]) -> Any:
    """The one place ionisation shifts reach the simulation; returns the stick model.

    Uses ``compute_trpes(..., ionisation_shifts=...)`` when the installed version
    takes that keyword; otherwise simulates a copy of the ensemble whose cation
    energies are shifted channel by channel (the caller's ensemble is not changed).
    """
    kw = dict(opts)
    if "ionisation_shifts" in inspect.signature(compute_trpes).parameters:
        kw["ionisation_shifts"] = np.asarray(shifts, float)
        target = ens
    elif np.any(shifts != 0.0):
        target = ens.replace(cation_energies=ens.cation_energies + shifts[None, :])
    else:
        target = ens
    _, model = compute_trpes(target, delays=np.zeros(1), convolve=False, decompose="cation",
                             return_model=True, progress=False, **kw)
    return model


class ChannelMaps:
    """Per-channel pure maps of an ensemble on its time grid, cached by shift vector.

    Parameters
    ----------
    ens : Ensemble
    energies : ndarray, shape (n_energies,)
        Kinetic energies (eV) at which the maps are wanted.
    opts : dict
        ``probe``, ``pump``, ``weights``, ``resolution``, ``cross_section``,
        ``time_step`` for :func:`~.maps.compute_trpes`.
    """

    def __init__(self, ens: Ensemble, energies: np.ndarray, opts: dict[str, Any]) -> None:
        self.ens, self.energies = ens, energies
        self.opts = {**opts, "kinetic_energies": energies}
        self._cache: dict[tuple[float, ...], np.ndarray] = {}
        self.model: Any = None
        self.calls = 0

    def __call__(self, shifts: np.ndarray) -> np.ndarray:
        """Pure maps, shape (n_channels, n_time, n_energies), eV^-1."""
        key = tuple(float(s) for s in shifts)
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        with warnings.catch_warnings():
            if self.calls:  # the first simulation's warnings reach the user, once
                warnings.simplefilter("ignore")
            model = _simulate_channels(self.ens, np.asarray(key), self.opts)
        self.calls += 1
        if self.model is None:
            self.model = model
        pm = model.broaden(kinetic_energies=self.energies, delays=model.times, convolve=False,
                           pump=self.opts.get("pump"), resolution=self.opts["resolution"])
        maps = np.stack([pm.components[lab] for lab in model.labels])
        if len(self._cache) > 16:
            self._cache.clear()
        self._cache[key] = maps
        return maps

    @property
    def labels(self) -> list[str]:
        return list(self.model.labels)

    def time_matrix(self, delays: np.ndarray, t0: float, fwhm: float) -> np.ndarray:
        """(n_delays, n_time): the measured delays from the pure signal (see the module).

        Rows of delays wholly after the simulated span (no known signal) are zero.
        """
        c = np.asarray(self.model.time_weights(delays - t0, sigma=fwhm / _FWHM_PER_SIGMA))
        return np.nan_to_num(c, nan=0.0, posinf=0.0, neginf=0.0)


def _check_measured(measured: Any, uncertainty: npt.ArrayLike | None
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    for attr in ("kinetic_energies", "delays", "intensity"):
        if not hasattr(measured, attr):
            raise SchemaError(
                f"fit_measured_map needs a measured map with kinetic_energies, delays and "
                f"intensity (a TRPESMap); {type(measured).__name__} lacks {attr!r}. Hint: "
                "load it with ensemblelab.load_measured_map(path).")
    e = np.asarray(measured.kinetic_energies, float)
    d = np.asarray(measured.delays, float)
    y = np.asarray(measured.intensity, float)
    unc = uncertainty if uncertainty is not None else getattr(measured, "uncertainty", None)
    sig = None
    if unc is not None:
        sig = np.broadcast_to(np.asarray(unc, float), y.shape).copy()
        if np.any(sig < 0):
            raise SchemaError("the measured map's uncertainty must be >= 0 (one standard "
                              "deviation per pixel; NaN or 0 leaves a pixel out).")
    return e, d, y, sig


def _check_bounds(name: str, b: tuple[float, float]) -> tuple[float, float]:
    lo, hi = (float(v) for v in b)
    if not lo < hi:
        raise SchemaError(f"The {name!r} parameter of fit_measured_map must be (low, high) "
                          f"with low < high; got {b!r}.")
    return lo, hi


class _Problem:
    """Residuals and Jacobian of the weighted fit for one ensemble weighting."""

    def __init__(self, cm: ChannelMaps, delays: np.ndarray, y: np.ndarray, w: np.ndarray,
                 free: np.ndarray, fixed_values: np.ndarray) -> None:
        self.cm, self.delays, self.y, self.w = cm, delays, y, w
        self.free, self.p_fixed = free, fixed_values
        self.n_ch = fixed_values.size - 4

    def full(self, x: np.ndarray) -> np.ndarray:
        p = self.p_fixed.copy()
        p[self.free] = x
        return p

    def parts(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Convolved per-channel maps (n_ch, n_delays, n_energies) and the model."""
        pure = self.cm(p[: self.n_ch])
        c = self.cm.time_matrix(self.delays, p[self.n_ch], p[self.n_ch + 1])
        conv = np.einsum("dt,kte->kde", c, pure)
        return conv, p[self.n_ch + 2] * conv.sum(axis=0) + p[self.n_ch + 3]

    def resid(self, x: np.ndarray) -> np.ndarray:
        return ((self.y - self.parts(self.full(x))[1]) * self.w).ravel()

    def jac(self, x: np.ndarray) -> np.ndarray:
        p = self.full(x)
        k, scale = self.n_ch, p[self.n_ch + 2]
        conv, _ = self.parts(p)
        cols = np.empty((p.size, *self.y.shape))
        if np.any(self.free[:k]):
            hs = np.full(k, _H_SHIFT)
            c = self.cm.time_matrix(self.delays, p[k], p[k + 1])
            up = np.einsum("dt,kte->kde", c, self.cm(p[:k] + hs))
            dn = np.einsum("dt,kte->kde", c, self.cm(p[:k] - hs))
            cols[:k] = scale * (up - dn) / (2 * _H_SHIFT)
        else:
            cols[:k] = 0.0
        total = self.cm(p[:k]).sum(axis=0)
        step = _H_TIME * float(self.cm.model.time_step)
        for j in (k, k + 1):
            pp, pm = p.copy(), p.copy()
            pp[j] += step
            pm[j] -= step
            cp = self.cm.time_matrix(self.delays, pp[k], pp[k + 1])
            cn = self.cm.time_matrix(self.delays, pm[k], pm[k + 1])
            cols[j] = scale * ((cp - cn) @ total) / (2 * step)
        cols[k + 2] = conv.sum(axis=0)
        cols[k + 3] = 1.0
        # d(resid)/dp = -w * d(model)/dp
        jac = -(cols[self.free] * self.w[None]).reshape(int(self.free.sum()), -1).T
        return np.asarray(jac)


def _solve(prob: _Problem, x0: np.ndarray, lo: np.ndarray, hi: np.ndarray, *,
           tol: float = 1e-10, max_nfev: int = 200) -> np.ndarray:
    fin = np.isfinite(lo) & np.isfinite(hi)
    pad = 1e-9 * np.where(fin, hi - lo, 0.0)
    x0 = np.clip(x0, np.where(fin, lo + pad, lo), np.where(fin, hi - pad, hi))
    sol = least_squares(prob.resid, x0, jac=prob.jac, bounds=(lo, hi), method="trf",
                        x_scale="jac", xtol=tol, ftol=tol, gtol=tol, max_nfev=max_nfev)
    return np.asarray(sol.x)


def fit_measured_map(
    ens: Ensemble,
    measured: TRPESMap | Any,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    weights: str | None = None,
    resolution: float = 0.0,
    cross_section: Any = "dyson",
    uncertainty: npt.ArrayLike | None = None,
    fit_shifts: bool | npt.ArrayLike = True,
    fit_xcorr: bool = True,
    fit_background: bool = True,
    xcorr_fwhm: float | None = None,
    shift_bounds: tuple[float, float] = (-0.5, 0.5),
    time_zero_bounds: tuple[float, float] = (-100.0, 100.0),
    energy_range: tuple[float, float] | None = None,
    delay_range: tuple[float, float] | None = None,
    interval: str | None = "covariance",
    ci: float = 0.95,
    n_boot: int = 50,
    random_state: int | np.random.Generator | None = 0,
    time_step: float | None = None,
    progress: bool = True,
) -> MeasuredFitResult:
    """Fit the ensemble's simulated map to a measured one (see the module docstring).

    Parameters
    ----------
    ens : Ensemble
        In memory, with ``energies``, ``cation_energies`` and ``dyson``.
    measured : TRPESMap
        The measured map: ``kinetic_energies`` (n_energies,) eV, ``delays``
        (n_delays,) fs, ``intensity`` (n_delays, n_energies) and optionally
        ``uncertainty`` (same shape, one standard deviation).
    probe, pump : GaussianPulse
        As for :func:`~.maps.compute_trpes`; the pump also gives the starting
        cross-correlation width.
    weights : str, optional
        Trajectory weights, as for :func:`~.maps.compute_trpes` (default: its default).
    resolution : float
        Instrument energy resolution FWHM in eV (fixed).
    cross_section : str, CrossSection or callable
        As for :func:`~.maps.compute_trpes`.
    uncertainty : array_like, shape (n_delays, n_energies), optional
        Overrides ``measured.uncertainty``. Pixels with NaN, 0 or non-finite
        intensity are left out.
    fit_shifts : bool or array_like of bool, shape (n_cation,)
        Fit every channel's ionisation shift, none, or those marked. Channels with no
        signal in the fitted window are kept at 0 (noted in the result).
    fit_xcorr, fit_background : bool
        Fit the cross-correlation FWHM and a constant background (else fixed at the
        pump-probe value and 0).
    xcorr_fwhm : float, optional
        Starting (or fixed) cross-correlation FWHM in fs; default from the pulses.
    shift_bounds, time_zero_bounds : (float, float)
        Search ranges (eV, fs).
    energy_range, delay_range : (float, float), optional
        Fit only this part of the measured map (eV, fs).
    interval : {"covariance", "bootstrap", None}
        Wald intervals; or those plus a bootstrap over trajectories (both reported);
        or none.
    ci : float
        Interval level in (0, 1).
    n_boot : int
        Bootstrap refits.
    random_state : int, Generator or None
        Seed of the bootstrap.
    time_step : float, optional
        Internal time grid step in fs (default the trajectories' median step).
    progress : bool
        Progress bar over the bootstrap refits.

    Returns
    -------
    MeasuredFitResult
        ``ionisation_shifts`` (eV, per cation channel), ``time_zero`` (fs),
        ``xcorr_fwhm`` (fs), ``background``, ``scale``, the parameter table with
        intervals, the measured/model/residual maps and the scores.

    Examples
    --------
    >>> res = fit_measured_map(ens, meas, probe=probe, pump=pump)  # doctest: +SKIP
    >>> print(res.summary())  # doctest: +SKIP
    """
    if not isinstance(ens, Ensemble):
        raise SchemaError(f"fit_measured_map needs an in-memory Ensemble; got "
                          f"{type(ens).__name__}. Hint: ens.load() a chunked store first.")
    if ens.cation_energies is None or ens.dyson is None:
        raise SchemaError("fit_measured_map needs ens.cation_energies and ens.dyson. Hint: "
                          "load an ensemble whose snapshots carry cation energies and Dyson "
                          "norms.")
    if interval not in ("covariance", "bootstrap", None):
        raise SchemaError(f"The 'interval' parameter of fit_measured_map must be 'covariance',"
                          f" 'bootstrap' or None; got {interval!r}.")
    if not 0.0 < float(ci) < 1.0:
        raise SchemaError(f"The 'ci' parameter of fit_measured_map must be in (0, 1); got "
                          f"{ci!r}.")
    if interval == "bootstrap" and (isinstance(n_boot, bool) or int(n_boot) != n_boot
                                     or n_boot < 2):
        raise SchemaError(f"The 'n_boot' parameter of fit_measured_map must be an int >= 2; "
                          f"got {n_boot!r}.")
    s_lo, s_hi = _check_bounds("shift_bounds", shift_bounds)
    t_lo, t_hi = _check_bounds("time_zero_bounds", time_zero_bounds)
    e, d, y, sig = _check_measured(measured, uncertainty)
    esel = np.ones(e.size, bool) if energy_range is None else (
        (e >= energy_range[0]) & (e <= energy_range[1]))
    dsel = np.ones(d.size, bool) if delay_range is None else (
        (d >= delay_range[0]) & (d <= delay_range[1]))
    e, d, y = e[esel], d[dsel], y[np.ix_(dsel, esel)]
    mask = np.isfinite(y)
    if sig is not None:
        sig = sig[np.ix_(dsel, esel)]
        mask &= np.isfinite(sig) & (sig > 0)
        w = np.where(mask, 1.0 / np.where(mask, sig, 1.0), 0.0)
    else:
        w = mask.astype(float)
    y = np.where(mask, y, 0.0)
    n_ch = ens.n_cation
    n_free_max = n_ch + 4
    if int(mask.sum()) <= n_free_max + 1 or e.size < 2 or d.size < 2:
        raise SchemaError(f"fit_measured_map needs more than {n_free_max + 1} usable pixels on at "
                          f"least 2 energies x 2 delays; got {int(mask.sum())} on {d.size} x "
                          f"{e.size}. Hint: widen energy_range / delay_range.")
    if weights is None:
        weights = inspect.signature(compute_trpes).parameters["weights"].default
    opts = {"probe": probe, "pump": pump, "weights": weights, "resolution": float(resolution),
            "cross_section": cross_section, "time_step": time_step}
    cm = ChannelMaps(ens, e, opts)
    pure0 = cm(np.zeros(n_ch))
    if xcorr_fwhm is None:
        xcorr_fwhm = (cross_correlation_fwhm(pump, probe) if pump is not None
                      else probe.effective_fwhm)
    dt = float(cm.model.time_step)
    w_lo, w_hi = max(dt, 1e-3), max(10.0 * float(xcorr_fwhm), 20.0 * dt)
    if not w_lo < float(xcorr_fwhm) < w_hi:
        raise SchemaError(f"xcorr_fwhm must be between {w_lo:.3g} and {w_hi:.3g} fs (the "
                          f"internal time step and 10x the pulses' value); got {xcorr_fwhm!r}.")
    notes: list[str] = []
    fs = np.broadcast_to(np.asarray(fit_shifts, bool), (n_ch,)).copy()
    peak = np.abs(pure0).max(axis=(1, 2))
    for k in range(n_ch):
        if fs[k] and not peak[k] > 1e-6 * max(float(peak.max()), 1e-300):
            fs[k] = False
            notes.append(f"channel {cm.labels[k]}: no signal in the fitted window; its shift is "
                         "kept at 0 (not identifiable).")
    free = np.r_[fs, True, bool(fit_xcorr), True, bool(fit_background)]
    p_start = np.r_[np.zeros(n_ch), 0.0, float(xcorr_fwhm), 1.0, 0.0]
    prob = _Problem(cm, d, y, w, free, p_start)
    p_start = _coarse_start(prob, fs, (s_lo, s_hi), (t_lo, t_hi), fit_background)
    late = d - p_start[n_ch] > float(cm.model.t_known)
    if np.any(late):  # measured delays after the simulated span: nothing to compare with
        mask[late] = False
        w[late] = 0.0
        y[late] = 0.0
        notes.append(f"{int(late.sum())} measured delays after the end of the simulation "
                     f"({float(cm.model.t_known):.4g} fs simulated, from "
                     f"{float(d[late][0]):.4g} fs measured) are left out of the fit.")
    if int(mask.sum()) <= int(free.sum()) + 1:
        raise SchemaError(f"fit_measured_map: only {int(mask.sum())} usable pixels inside the "
                          "simulated span. Hint: simulate longer trajectories or pass "
                          "delay_range= inside the simulated span.")
    lo = np.r_[np.full(n_ch, s_lo), t_lo, w_lo, -np.inf, -np.inf][free]
    hi = np.r_[np.full(n_ch, s_hi), t_hi, w_hi, np.inf, np.inf][free]
    prob.p_fixed = p_start
    p_hat = prob.full(_solve(prob, p_start[free], lo, hi))
    conv, model = prob.parts(p_hat)
    names = [f"shift_{lab}" for lab in cm.labels] + ["time_zero", "xcorr_fwhm"]
    lo_full = np.r_[np.full(n_ch, s_lo), t_lo, w_lo]
    hi_full = np.r_[np.full(n_ch, s_hi), t_hi, w_hi]
    for j in np.flatnonzero(free[: n_ch + 2]):
        v, b_lo, b_hi = p_hat[j], lo_full[j], hi_full[j]
        if min(v - b_lo, b_hi - v) <= 1e-6 * (b_hi - b_lo):
            notes.append(f"{names[j]} = {v:.4g} is at its search bound [{b_lo:.4g}, "
                         f"{b_hi:.4g}]: its interval is not meaningful; widen the bounds.")
            warnings.warn("fit_measured_map: " + notes[-1], NumericalWarning, stacklevel=2)
    r_w = (y - model) * w
    n_obs, n_par = int(mask.sum()), int(free.sum())
    dof = n_obs - n_par
    chi2 = float(np.sum(r_w**2))
    chi2_red = chi2 / dof if sig is not None else math.nan
    s2 = (max(1.0, chi2_red) if sig is not None else chi2 / dof)
    jac = prob.jac(p_hat[free])
    jtj = jac.T @ jac
    cond = float(np.linalg.cond(jtj))
    if not np.isfinite(cond) or cond > 1e12:
        notes.append(f"the Jacobian is ill-conditioned (condition number {cond:.3g}): some "
                     "parameters are not identifiable from this map; their intervals are wide.")
        warnings.warn("fit_measured_map: " + notes[-1], NumericalWarning, stacklevel=2)
    cov = np.full((p_hat.size, p_hat.size), math.nan)
    if interval is not None:
        cov[np.ix_(free, free)] = s2 * np.linalg.pinv(jtj)
    boot = None
    if interval == "covariance":
        notes.append("covariance intervals see the measurement's noise only; "
                     "interval='bootstrap' adds the simulation's finite trajectory sampling.")
    if interval == "bootstrap":
        boot = _bootstrap(ens, prob, opts, p_hat, lo, hi, int(n_boot), random_state, progress)
    resid_full = np.where(mask, y - model, np.nan)
    ss_tot = float(np.sum((y[mask] - y[mask].mean()) ** 2))
    r2 = 1.0 - float(np.sum((y - model)[mask] ** 2)) / ss_tot if ss_tot > 0 else math.nan
    labels = cm.labels
    table = parameter_table(p_hat, cov, boot, free, labels,
                            z=float(norm.ppf(0.5 + 0.5 * float(ci))))
    method = {None: "none", "covariance": (
        "covariance (Wald, s^2 (J^T J)^-1; s^2 = " + (
            "max(1, reduced chi-square) with the measured uncertainty)" if sig is not None
            else "residual variance, no uncertainty given)")),
              "bootstrap": (f"covariance and bootstrap over trajectories ({int(n_boot)} "
                            "refits, value +- z sd); headline = envelope of the two")}[interval]
    params = {"role": "", "fit": "fit_measured_map", "shifts": p_hat[:n_ch].tolist(),
              "time_zero": float(p_hat[n_ch]), "xcorr_fwhm": float(p_hat[n_ch + 1]),
              "scale": float(p_hat[n_ch + 2]), "background": float(p_hat[n_ch + 3]),
              "r2": r2}
    comps = {lab: p_hat[n_ch + 2] * conv[i] for i, lab in enumerate(labels)}

    def as_map(arr: np.ndarray, role: str, **kw: Any) -> TRPESMap:
        return TRPESMap(kinetic_energies=e, delays=d, intensity=arr,
                        params={**params, "role": role}, **kw)

    return MeasuredFitResult(
        ionisation_shifts=p_hat[:n_ch].copy(), time_zero=float(p_hat[n_ch]),
        xcorr_fwhm=float(p_hat[n_ch + 1]), scale=float(p_hat[n_ch + 2]),
        background=float(p_hat[n_ch + 3]), channels=tuple(labels), parameters=table,
        ci=float(ci), interval_method=method, r2=r2, chi2_red=chi2_red,
        rmse=float(math.sqrt(np.mean((y - model)[mask] ** 2))), n_points=n_obs, dof=dof,
        covariance=cov, bootstrap_samples=boot,
        measured=as_map(np.where(mask, y, np.nan), "measured",
                        uncertainty=None if sig is None else np.where(mask, sig, np.nan)),
        model=as_map(model, "model", components=comps),
        residual=as_map(resid_full, "residual (measured - model)"),
        notes=tuple(notes), n_simulations=cm.calls,
    )


def _coarse_start(prob: _Problem, fs: np.ndarray, sb: tuple[float, float],
                  tb: tuple[float, float], fit_background: bool) -> np.ndarray:
    """Best (common shift, t0) on a coarse grid, with the best scale and background.

    For each t0 only the measured delays inside the simulated span count, and the cost
    is the mean weighted squared residual over them (comparable across t0).
    """
    n_ch = prob.n_ch
    shifts = np.linspace(sb[0], sb[1], 11) if np.any(fs) else np.zeros(1)
    if np.any(fs) and not np.any(shifts == 0.0):
        shifts = np.sort(np.r_[shifts, 0.0])
    t0s = np.linspace(tb[0], tb[1], 41)
    fwhm = prob.p_fixed[n_ch + 1]
    t_known = float(prob.cm.model.t_known)
    cmats = [prob.cm.time_matrix(prob.delays, t0, fwhm) for t0 in t0s]
    best = (math.inf, prob.p_fixed.copy())
    for s in shifts:
        total = prob.cm(np.where(fs, s, 0.0)).sum(axis=0)
        for t0, c in zip(t0s, cmats, strict=True):
            rows = prob.delays - t0 <= t_known
            w = prob.w[rows].ravel()
            n = int(np.count_nonzero(w))
            if n <= 3:
                continue
            yw = prob.y[rows].ravel() * w
            a = np.column_stack([(c[rows] @ total).ravel() * w]
                                + ([w] if fit_background else []))
            coef, *_ = np.linalg.lstsq(a, yw, rcond=None)
            cost = float(np.sum((yw - a @ coef) ** 2)) / n
            if cost < best[0]:
                p = prob.p_fixed.copy()
                p[:n_ch] = np.where(fs, s, 0.0)
                p[n_ch] = t0
                p[n_ch + 2] = coef[0]
                p[n_ch + 3] = coef[1] if fit_background else 0.0
                best = (cost, p)
    return best[1]


def _bootstrap(ens: Ensemble, prob: _Problem, opts: dict[str, Any], p_hat: np.ndarray,
               lo: np.ndarray, hi: np.ndarray, n_boot: int,
               random_state: int | np.random.Generator | None, progress: bool) -> np.ndarray:
    """Refits with the trajectories resampled (as integer weights); (n_boot, n_params)."""
    from tqdm.auto import tqdm

    base = trajectory_weights(ens, weights=opts["weights"], pump=opts["pump"])
    w0 = np.asarray(base[0] if isinstance(base, tuple) else base, float)
    rng = np.random.default_rng(random_state)
    n = ens.n_trajectories
    out = np.empty((n_boot, p_hat.size))
    trajs = ens.trajectories.drop(columns=["n_steps", "t_end"], errors="ignore")
    for b in tqdm(range(n_boot), desc="bootstrap refits", disable=not progress):
        counts = np.bincount(rng.integers(0, n, size=n), minlength=n)
        t = trajs.copy()
        t[_BOOT_COLUMN] = w0 * counts
        eb = ens.replace(trajectories=t)
        cm = ChannelMaps(eb, prob.cm.energies, {**opts, "weights": _BOOT_COLUMN})
        cm.calls = 1  # warnings were shown by the main fit
        pb = _Problem(cm, prob.delays, prob.y, prob.w, prob.free, p_hat.copy())
        out[b] = pb.full(_solve(pb, p_hat[prob.free], lo, hi, tol=1e-7, max_nfev=40))
    return out

