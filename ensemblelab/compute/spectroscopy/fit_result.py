"""The result of :func:`~.fit_measured.fit_measured_map`: values, intervals, maps, scores."""

from __future__ import annotations

import html
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ...data.spectrum import TRPESMap

__all__ = ["MeasuredFitResult", "parameter_table"]

_COLUMNS = ["parameter", "value", "unit", "lower", "upper", "cov_lower", "cov_upper",
            "boot_lower", "boot_upper", "fixed"]


def parameter_table(p: np.ndarray, cov: np.ndarray, boot: np.ndarray | None,
                    free: np.ndarray, labels: list[str], *, z: float
                    ) -> pd.DataFrame:
    """One row per parameter: value, covariance and bootstrap intervals, headline interval.

    Parameters
    ----------
    p : ndarray, shape (n_channels + 4,)
        Shifts (eV), time zero (fs), cross-correlation FWHM (fs), scale, background.
    cov : ndarray, shape (n, n)
        Covariance (NaN where not computed or fixed).
    boot : ndarray, shape (n_boot, n), or None
        Bootstrap refits (their standard deviation gives ``value +- z sd``).
    free : ndarray of bool, shape (n,)
    labels : list of str
        Cation channel labels.
    z : float
        Two-sided normal quantile of the interval level.

    Returns
    -------
    DataFrame
        Columns ``parameter, value, unit, lower, upper, cov_lower, cov_upper,
        boot_lower, boot_upper, fixed``; the headline ``lower``/``upper`` is the
        covariance interval, or the envelope of both when a bootstrap was run.
    """
    names = [f"shift_{lab}" for lab in labels] + ["time_zero", "xcorr_fwhm", "scale",
                                                  "background"]
    units = ["eV"] * len(labels) + ["fs", "fs", "1", "1"]
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    c_lo, c_hi = p - z * se, p + z * se
    if boot is not None:
        sd = np.std(boot, axis=0, ddof=1)
        b_lo, b_hi = p - z * sd, p + z * sd
    else:
        b_lo = b_hi = np.full(p.size, math.nan)
    rows = []
    for i, name in enumerate(names):
        if not free[i]:
            rows.append((name, float(p[i]), units[i], *([math.nan] * 6), True))
            continue
        lo, hi = c_lo[i], c_hi[i]
        if boot is not None:
            lo, hi = np.nanmin([lo, b_lo[i]]), np.nanmax([hi, b_hi[i]])
        rows.append((name, float(p[i]), units[i], float(lo), float(hi), float(c_lo[i]),
                     float(c_hi[i]), float(b_lo[i]), float(b_hi[i]), False))
    return pd.DataFrame(rows, columns=_COLUMNS)


@dataclass(frozen=True, eq=False)
class MeasuredFitResult:
    """Outcome of :func:`~.fit_measured.fit_measured_map` (immutable).

    Attributes
    ----------
    ionisation_shifts : ndarray, shape (n_cation,)
        eV added to each cation channel's ionisation energies in the simulation
        (positive: the channel's band moves to lower kinetic energy).
    time_zero : float
        Measured delay (fs) at which the simulated delay 0 falls.
    xcorr_fwhm : float
        Pump-probe cross-correlation FWHM (fs).
    scale, background : float
        ``measured ~ scale * simulated + background`` (measured units; scale per eV^-1).
    channels : tuple of str
        Cation channel labels, in the order of `ionisation_shifts`.
    parameters : DataFrame
        One row per parameter (see :func:`parameter_table`).
    ci : float
        Interval level.
    interval_method : str
        How the intervals were made.
    r2 : float
        ``1 - SS_res / SS_tot`` on the fitted pixels (unweighted).
    chi2_red : float
        Reduced chi-square with the measured uncertainty (NaN without one).
    rmse : float
        Root-mean-square residual (measured units).
    n_points, dof : int
        Fitted pixels and residual degrees of freedom.
    covariance : ndarray, shape (n_cation + 4, n_cation + 4)
        Parameter covariance (NaN rows/columns for fixed parameters).
    bootstrap_samples : ndarray, shape (n_boot, n_cation + 4), or None
        Bootstrap refits (trajectories resampled).
    measured, model, residual : TRPESMap
        On the measured grid (fitted window): the measurement (NaN where left out,
        with its uncertainty), the fitted model (components per cation channel) and
        ``measured - model``.
    notes : tuple of str
        Caveats found during the fit.
    n_simulations : int
        Map simulations run by the main fit.
    """

    ionisation_shifts: np.ndarray
    time_zero: float
    xcorr_fwhm: float
    scale: float
    background: float
    channels: tuple[str, ...]
    parameters: pd.DataFrame
    ci: float
    interval_method: str
    r2: float
    chi2_red: float
    rmse: float
    n_points: int
    dof: int
    covariance: np.ndarray
    bootstrap_samples: np.ndarray | None
    measured: TRPESMap
    model: TRPESMap
    residual: TRPESMap
    notes: tuple[str, ...] = ()
    n_simulations: int = 0

    def interval(self, name: str) -> tuple[float, float]:
        """Headline ``(lower, upper)`` of a parameter (e.g. ``"shift_D0"``, ``"time_zero"``)."""
        rows = self.parameters[self.parameters["parameter"] == name]
        if rows.empty:
            raise KeyError(f"no parameter {name!r}; have {list(self.parameters['parameter'])}")
        r = rows.iloc[0]
        return float(r["lower"]), float(r["upper"])

    def as_dict(self) -> dict[str, Any]:
        """JSON-safe numbers for a display: parameters with intervals, scores, notes."""
        def num(x: Any) -> float | None:
            x = float(x)
            return x if math.isfinite(x) else None

        return {
            "parameters": [
                {"name": r.parameter, "value": num(r.value), "unit": r.unit,
                 "lower": num(r.lower), "upper": num(r.upper), "fixed": bool(r.fixed),
                 "covariance_interval": [num(r.cov_lower), num(r.cov_upper)],
                 "bootstrap_interval": [num(r.boot_lower), num(r.boot_upper)]}
                for r in self.parameters.itertuples()],
            "ci": self.ci, "interval_method": self.interval_method,
            "r2": num(self.r2), "chi2_red": num(self.chi2_red), "rmse": num(self.rmse),
            "n_points": self.n_points, "dof": self.dof, "notes": list(self.notes),
        }

    def summary(self) -> str:
        """Plain-text table of the fitted numbers with their intervals and the scores."""
        pct = int(round(self.ci * 100))
        lines = [f"Fit of the simulated map to the measurement ({self.n_points} pixels)",
                 f"{pct}% intervals: {self.interval_method}"]
        r: Any
        for r in self.parameters.itertuples():
            if r.fixed:
                iv = "fixed"
            elif not (math.isfinite(r.lower) and math.isfinite(r.upper)):
                iv = "no interval (not computed)"
            else:
                iv = f"[{r.lower:.4g}, {r.upper:.4g}]"
                if math.isfinite(r.boot_lower):
                    iv += (f"  (covariance [{r.cov_lower:.4g}, {r.cov_upper:.4g}], bootstrap "
                           f"[{r.boot_lower:.4g}, {r.boot_upper:.4g}])")
            lines.append(f"  {r.parameter:<14} {r.value:>10.4g} {r.unit:<2} {iv}")
        chi = ("n/a (no uncertainty given)" if not math.isfinite(self.chi2_red)
               else f"{self.chi2_red:.3g}")
        lines.append(f"R^2 {self.r2:.4f} (a score, no interval); reduced chi^2 {chi}; "
                     f"rms residual {self.rmse:.3g}")
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def _repr_html_(self) -> str:
        return f"<pre>{html.escape(self.summary())}</pre>"
