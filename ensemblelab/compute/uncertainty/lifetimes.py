"""Lifetimes with trajectory-level uncertainty: kinetic fits of populations and global
fits of simulated maps, each checked against a covariance.

* :func:`kinetic_lifetime_uncertainty`: the bootstrap of
  :func:`~ensemblelab.compute.kinetics.fit_kinetics` (every resample of trajectories
  refitted), beside two covariances: the Wald covariance of the fit (treats the
  population at every time as an independent measurement -- too narrow, since one
  trajectory feeds every time) and the *trajectory-clustered* delta-method covariance
  ``(J^T J)^-1 J^T S J (J^T J)^-1`` with ``S = sum_j d_j d_j^T`` built from the influence
  ``d_j(t) = w_j (v_j(t) - P(t) a_j(t)) / W(t)`` of each trajectory on the populations
  (the linearised bootstrap; J the Jacobian of the fitted curves). The bootstrap and the
  clustered covariance estimate the same thing and should agree.
* :func:`global_fit_bootstrap`: a simulated map is recomputed for every resample of
  trajectories (trajectory weights times the resample counts: exactly the map of the
  resampled ensemble) and refitted; the Wald covariance of the map fit is reported beside.
"""

from __future__ import annotations

import dataclasses
import html
import math
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy.stats import norm

from ...errors import SchemaError
from ._kernels_resample import percentile_interval
from .shares import bootstrap_counts_for, check_interval_args

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble
    from ...data.spectrum import TRPESMap
    from ..kinetics.rates import KineticsResult

__all__ = ["LifetimeUncertainty", "kinetic_lifetime_uncertainty", "global_fit_bootstrap",
           "bca_interval"]

_BOOT_COLUMN = "bootstrap_weight"


@dataclasses.dataclass(frozen=True, eq=False)
class LifetimeUncertainty:
    """Lifetimes with bootstrap intervals and covariance standard errors (immutable).

    Attributes
    ----------
    summary : DataFrame
        One row per fitted time constant: ``parameter``, ``value`` (fs), ``lower``,
        ``upper`` (percentile bootstrap over trajectories at level `ci`), ``se_bootstrap``
        (standard deviation of the refits), ``se_covariance`` (Wald, from the fit's
        Jacobian), ``se_clustered`` (trajectory-clustered delta method; NaN where not
        available), ``ratio`` (``se_bootstrap / se_covariance``).
    replicates : DataFrame
        The refitted values, one row per resample (NaN: the refit failed).
    n_boot, n_failed : int
    ci : float
    method : str
        What was resampled and refitted.
    """

    summary: pd.DataFrame
    replicates: pd.DataFrame
    n_boot: int
    n_failed: int
    ci: float
    method: str

    def interval(self, name: str) -> tuple[float, float]:
        """(lower, upper) of time constant `name` (fs)."""
        row = self.summary.loc[self.summary["parameter"] == name]
        if row.empty:
            raise KeyError(f"no parameter {name!r}; have {self.summary['parameter'].tolist()}")
        return float(row["lower"].iloc[0]), float(row["upper"].iloc[0])

    def __str__(self) -> str:
        lines = [f"{int(round(100 * self.ci))}% intervals: {self.method}"]
        r: Any
        for r in self.summary.itertuples():
            lines.append(f"  {r.parameter:<8} {r.value:.4g} fs [{r.lower:.4g}, {r.upper:.4g}]; "
                         f"SE bootstrap {r.se_bootstrap:.3g}, covariance {r.se_covariance:.3g}"
                         f" (ratio {r.ratio:.2g})"
                         + (f", clustered {r.se_clustered:.3g}"
                            if np.isfinite(r.se_clustered) else ""))
        if self.n_failed:
            lines.append(f"{self.n_failed} of {self.n_boot} refits failed (left out)")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return (f"<div><strong>{html.escape(self.method)}</strong>"
                f"{self.summary.to_html(index=False)}</div>")


def bca_interval(replicates: np.ndarray, estimate: float, influence: np.ndarray, ci: float
                 ) -> tuple[float, float]:
    """Bias-corrected and accelerated bootstrap interval of one statistic.

    ``z0 = Phi^-1(fraction of replicates below the estimate)`` (ties count half) and the
    acceleration ``a = sum U^3 / (6 (sum U^2)^1.5)`` from the empirical influence values
    U of the units; the bounds are the replicate quantiles at
    ``Phi(z0 + (z0 + z) / (1 - a (z0 + z)))`` for ``z = Phi^-1(alpha), Phi^-1(1 - alpha)``
    (J. Amer. Stat. Assoc. 1987, "Better bootstrap confidence intervals").

    Parameters
    ----------
    replicates : ndarray, shape (n_boot,)
        NaN (failed) replicates are left out.
    estimate : float
        The full-data value.
    influence : ndarray, shape (n_units,)
        Empirical influence of every unit on the statistic.
    ci : float in (0, 1)

    Returns
    -------
    (float, float)
    """
    r = np.asarray(replicates, dtype=np.float64)
    r = r[np.isfinite(r)]
    if r.size < 2:
        return math.nan, math.nan
    frac = (np.sum(r < estimate) + 0.5 * np.sum(r == estimate)) / r.size
    frac = min(max(frac, 0.5 / r.size), 1.0 - 0.5 / r.size)
    z0 = float(norm.ppf(frac))
    u = np.asarray(influence, dtype=np.float64)
    u = u[np.isfinite(u)]
    u = u - u.mean() if u.size else u
    den = 6.0 * float(np.sum(u * u)) ** 1.5
    a = float(np.sum(u**3)) / den if den > 0 else 0.0
    alpha = 0.5 * (1.0 - ci)
    qs = []
    for z in (norm.ppf(alpha), norm.ppf(1.0 - alpha)):
        qs.append(float(norm.cdf(z0 + (z0 + z) / (1.0 - a * (z0 + z)))))
    lo, hi = np.quantile(r, qs)
    return float(lo), float(hi)


def _summary(names: list[str], values: np.ndarray, reps: np.ndarray, se_cov: np.ndarray,
             se_cl: np.ndarray, ci: float) -> pd.DataFrame:
    good = reps[np.all(np.isfinite(reps), axis=1)]
    if good.shape[0] >= 2:
        lo, hi = percentile_interval(good, ci)
        se_b = good.std(axis=0, ddof=1)
    else:
        lo = hi = se_b = np.full(len(names), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = se_b / se_cov
    return pd.DataFrame({"parameter": names, "value": values, "lower": lo, "upper": hi,
                         "se_bootstrap": se_b, "se_covariance": se_cov,
                         "se_clustered": se_cl, "ratio": ratio})


def _clustered_se(ens: Ensemble, res: KineticsResult, names: list[str], kind: str | None,
                  weights: Any) -> tuple[np.ndarray, np.ndarray]:
    """Trajectory-clustered delta-method standard errors of the named parameters, and the
    empirical influence of every trajectory on them, shape (n_traj, n_par)."""
    from ..kinetics.populations import population_arrays

    curves = res.curves
    times = np.unique(curves["time"].to_numpy())
    arrays = population_arrays(ens, kind=kind or "active", weights=weights)
    pos = np.searchsorted(arrays.times, times)
    if np.any(pos >= arrays.times.size) or not np.allclose(arrays.times[pos], times):
        return np.full(len(names), np.nan), np.full((ens.n_trajectories, len(names)), np.nan)
    w = arrays.weights
    vals = arrays.values[:, pos][:, :, list(res.states)]  # (n_traj, n_t, n_roles)
    alive = arrays.alive[:, pos].astype(np.float64)
    big_w = w @ alive  # (n_t,)
    pop = np.tensordot(w, vals, axes=(0, 0)) / big_w[:, None]
    infl = w[:, None, None] * (vals - pop[None] * alive[:, :, None]) / big_w[None, :, None]
    infl = np.transpose(infl, (0, 2, 1)).reshape(w.size, -1)  # rows: role-major, time
    # Jacobian of the fitted curves by central differences in the natural parameters
    base = res.params
    cols = []
    for name in names:
        h = 1e-4 * max(abs(base[name]), 1e-3)
        up = dataclasses.replace(res, params={**base, name: base[name] + h})
        dn = dataclasses.replace(res, params={**base, name: base[name] - h})
        cols.append((up.predict(times)["fitted"].to_numpy()
                     - dn.predict(times)["fitted"].to_numpy()) / (2 * h))
    jac = np.column_stack(cols)
    ok = np.all(np.isfinite(infl), axis=0) & np.isfinite(jac).all(axis=1)
    jac, infl = jac[ok], infl[:, ok]
    a = np.linalg.pinv(jac.T @ jac) @ jac.T  # (n_par, n_obs)
    theta_infl = infl @ a.T  # (n_traj, n_par)
    n = np.count_nonzero(w > 0)
    cov = theta_infl.T @ theta_infl * (n / max(n - 1, 1))
    return np.sqrt(np.clip(np.diag(cov), 0, None)), theta_infl


def kinetic_lifetime_uncertainty(
    ens: Ensemble,
    *,
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    method: str = "percentile",
    **fit_kwargs: Any,
) -> LifetimeUncertainty:
    """Time constants of a kinetic fit with bootstrap intervals, checked against covariances.

    Parameters
    ----------
    ens : Ensemble
    ci, n_boot, random_state
        Level, resamples of trajectories and seed of the bootstrap.
    method : {"percentile", "bca"}
        The percentile interval of the refits (default; the one ``fit_kinetics``
        reports, coverage-checked at N = 60), or the bias-corrected and accelerated
        interval (acceleration from the trajectories' empirical influence), which adapts
        to a skewed lifetime distribution.
    **fit_kwargs
        Passed to :func:`~ensemblelab.compute.kinetics.fit_kinetics` (``scheme``,
        ``states``, ``kind``, ``weights``, ``time_range``, ``time_grid``...).

    Returns
    -------
    LifetimeUncertainty
        ``se_clustered`` is the trajectory-clustered delta-method standard error (the
        analytic twin of the bootstrap); ``se_covariance`` the Wald one, which treats
        times as independent and is too narrow for populations.

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> u = kinetic_lifetime_uncertainty(make_toy_ensemble(100, seed=3, dt=5.0), n_boot=200)
    >>> row = u.summary.iloc[0]
    >>> bool(row["lower"] < row["value"] < row["upper"])
    True
    """
    from ..kinetics import KINETIC_SCHEMES, fit_kinetics

    check_interval_args("kinetic_lifetime_uncertainty", interval="bootstrap", ci=ci,
                        n_boot=n_boot)
    if method not in ("percentile", "bca"):
        raise SchemaError(f"The 'method' parameter of kinetic_lifetime_uncertainty must be "
                          f"'percentile' or 'bca'; got {method!r}.")
    for bad in ("interval", "ci", "n_boot", "random_state", "ens"):
        if bad in fit_kwargs:
            raise SchemaError(f"kinetic_lifetime_uncertainty sets {bad!r} itself; pass ci=, "
                              "n_boot=, random_state= only.")
    boot = fit_kinetics(ens, interval="bootstrap", ci=ci, n_boot=n_boot,
                        random_state=random_state, **fit_kwargs)
    cov = fit_kinetics(ens, interval="covariance", ci=ci, **fit_kwargs)
    scheme = KINETIC_SCHEMES[boot.scheme]
    free = boot.summary.loc[~boot.summary["fixed"].astype(bool), "parameter"].tolist()
    names = [p for p in scheme.params if p in free and p.startswith("tau")]
    z = float(norm.ppf(0.5 + 0.5 * ci))
    se_cov = np.array([(cov.interval(p)[1] - cov.interval(p)[0]) / (2 * z) for p in names])
    se_cl, infl = _clustered_se(ens, boot, [p for p in scheme.params if p in free],
                                fit_kwargs.get("kind"), fit_kwargs.get("weights"))
    pick = [i for i, p in enumerate(p for p in scheme.params if p in free) if p in names]
    se_cl, infl = se_cl[pick], infl[:, pick]
    assert boot.boot_params is not None
    reps = boot.boot_params[names].to_numpy(np.float64)
    values = np.array([boot.params[p] for p in names])
    summary = _summary(names, values, reps, se_cov, se_cl, ci)
    if method == "bca":
        for k in range(len(names)):
            summary.loc[k, ["lower", "upper"]] = bca_interval(reps[:, k], values[k],
                                                              infl[:, k], ci)
    return LifetimeUncertainty(summary=summary, replicates=pd.DataFrame(reps, columns=names),
                               n_boot=int(n_boot), n_failed=int(boot.n_failed), ci=float(ci),
                               method=f"bootstrap of {boot.scheme!r} kinetic fits "
                                      f"({int(n_boot)} resamples of trajectories, refitted; "
                                      f"{'BCa' if method == 'bca' else 'percentile'})")


def global_fit_bootstrap(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    n_components: int = 1,
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    resampling: str = "multinomial",
    progress: bool = False,
    **fit_kwargs: Any,
) -> LifetimeUncertainty:
    """Global-fit lifetimes of a simulated map with a bootstrap over trajectories.

    Every resample recomputes the map with each trajectory's weight multiplied by how
    often it was drawn (the map of the resampled ensemble, on the same grids, with the
    settings in ``trpes_map.params``) and refits it, started from the full-data lifetimes.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    trpes_map : TRPESMap
        From :func:`~ensemblelab.compute.spectroscopy.compute_trpes`.
    n_components : int
        Number of finite lifetimes.
    ci, n_boot, random_state, resampling
        Level, resamples, seed, multinomial or Poisson counts.
    progress : bool
        Progress bar over the resamples.
    **fit_kwargs
        Passed to :func:`~ensemblelab.compute.kinetics.fit_global` (``irf_fwhm``,
        ``include_infinite``, ``energy_range``, ``delay_range``...). For a map convolved
        with the cross-correlation, pass its ``irf_fwhm``.

    Returns
    -------
    LifetimeUncertainty
        ``se_covariance``: the Wald error of the full-data fit (map residuals taken as
        independent); ``se_clustered`` is NaN.
    """
    from ..kinetics import fit_global
    from ..spectroscopy import compute_trpes, trajectory_weights
    from ..spectroscopy._checks import settings_from_params

    check_interval_args("global_fit_bootstrap", interval="bootstrap", ci=ci, n_boot=n_boot,
                        resampling=resampling)
    for bad in ("interval", "ci", "n_boot", "random_state", "n_components", "lifetimes"):
        if bad in fit_kwargs:
            raise SchemaError(f"global_fit_bootstrap sets {bad!r} itself.")
    p = trpes_map.params
    probe, pump, cs, weights = settings_from_params(p)
    w, _ = trajectory_weights(ens, weights=weights, pump=pump)
    full = fit_global(trpes_map, n_components=n_components, interval="covariance", ci=ci,
                      **fit_kwargs)
    names = [f"tau_{i + 1}" for i in range(n_components)]
    z = float(norm.ppf(0.5 + 0.5 * ci))
    se_cov = (full.lifetime_upper - full.lifetime_lower) / (2 * z)
    counts = bootstrap_counts_for(ens.n_trajectories, n_boot, random_state,
                                  resampling=resampling)
    map_kw = {"probe": probe, "pump": pump, "kinetic_energies": trpes_map.kinetic_energies,
              "delays": trpes_map.delays, "resolution": float(p.get("resolution", 0.0)),
              "convolve": bool(p.get("convolve", True)), "cross_section": cs,
              "normalise": p.get("normalise", "alive"), "time_step": p.get("time_step"),
              "progress": False}
    reps = np.full((int(n_boot), n_components), np.nan)
    rows = range(int(n_boot))
    if progress:
        from tqdm.auto import tqdm

        rows = tqdm(rows, desc="bootstrap refits", unit="resample")
    import warnings

    for b in rows:
        trajs = ens.trajectories.drop(columns=["n_steps", "t_end"], errors="ignore").copy()
        trajs[_BOOT_COLUMN] = w * counts[b]
        ens_b = ens.replace(trajectories=trajs)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m_b = compute_trpes(ens_b, weights=_BOOT_COLUMN, **map_kw)
            try:
                fit_b = fit_global(m_b, n_components=n_components, interval=None,
                                   lifetimes=full.lifetimes if n_components else None,
                                   **fit_kwargs)
            except (SchemaError, np.linalg.LinAlgError, ValueError):
                continue
        reps[b] = np.sort(fit_b.lifetimes)
    n_failed = int(np.sum(~np.all(np.isfinite(reps), axis=1)))
    summary = _summary(names, np.asarray(full.lifetimes, float), reps, se_cov,
                       np.full(n_components, math.nan), ci)
    return LifetimeUncertainty(
        summary=summary, replicates=pd.DataFrame(reps, columns=names), n_boot=int(n_boot),
        n_failed=n_failed, ci=float(ci),
        method=f"bootstrap of global fits ({int(n_boot)} resamples of trajectories; map "
               "recomputed and refitted per resample, percentile)")
