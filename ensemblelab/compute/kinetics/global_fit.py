"""Global lifetime analysis of a time-resolved map by variable projection.

Model: ``S(E_j, t_m) ~ sum_l DAS_l(E_j) y_l(t_m) + DAS_inf(E_j) y_inf(t_m)``
with ``y_l`` the Gaussian-IRF-convolved exponential of lifetime tau_l and
``y_inf`` the convolved step, both starting at t0. For trial nonlinear
parameters (lifetimes, and optionally the IRF width and t0) the decay-associated
spectra (DAS) are the linear least-squares solution for every energy column at
once; the nonlinear parameters minimise the remaining (projected) residual with
bounded least squares (variable projection). For simulated maps the IRF is
known (the pump-probe cross-correlation) and should stay fixed (``fix_irf=True``).

Intervals on the lifetimes are Wald intervals from the marginal covariance
``s^2 [J^T (I - P) J]^{-1}`` (J the model's derivative with respect to the
nonlinear parameters at fixed spectra, P the projector on the kinetic basis,
s^2 = RSS / degrees of freedom; this treats the map's residuals as independent
with one common variance), or, with
``interval="bootstrap"``, percentile intervals from refits to the fitted map
plus resampled residual *rows* (whole delays, keeping the correlation along
energy).

Identifiability: after the fit, :func:`fit_diagnostics` looks for lifetimes that
coincide (relative difference below 1 %, or overlapping intervals), intervals that
reach zero, lifetimes beyond ten times the delay span (indistinguishable from the
non-decaying component) and a nearly collinear kinetic basis or Jacobian; each
finding is stored in ``diagnostics`` and raised as a
:class:`~ensemblelab.errors.DegenerateFitWarning` with advice. Two coinciding
lifetimes with large opposite spectra are the fit using ``t exp(-t / tau)``: the map
is then not a sum of that many exponentials (typically a band moving in energy).

A sequential target scheme (``scheme="sequential"``) interprets the same
exponentials as a chain A -> B -> ... (fastest lifetime first; with
``include_infinite`` ending in a non-decaying species) and returns the
species-associated spectra ``SAS = (B^T)^{-1} DAS`` with B the chain's
coefficient matrix (see
:func:`~ensemblelab.compute.kinetics._kernels_populations.sequential_coefficients`).
"""

from __future__ import annotations

import html
import itertools
import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.optimize import least_squares
from scipy.stats import norm

from ...errors import DegenerateFitWarning, NumericalWarning, SchemaError
from . import _kernels_populations as _k
from .schemes import fwhm_to_sigma

__all__ = ["fit_global", "GlobalFitResult", "decay_profiles", "fit_diagnostics"]

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def decay_profiles(
    delays: npt.ArrayLike, lifetimes: npt.ArrayLike, *, irf_fwhm: float | None = None,
    t0: float = 0.0, include_infinite: bool = True,
) -> np.ndarray:
    """Kinetic basis of the global model: columns y_1..y_L (and y_inf), shape (n_delays, p).

    Parameters
    ----------
    delays : array_like, shape (n_delays,)
        Delays in fs.
    lifetimes : array_like, shape (L,)
        Lifetimes in fs.
    irf_fwhm : float, optional
        FWHM of the Gaussian instrument response in fs.
    t0 : float
        Time zero in fs.
    include_infinite : bool
        Append the convolved step (a non-decaying component).

    Returns
    -------
    ndarray, shape (n_delays, L + include_infinite)
    """
    return _basis(np.asarray(delays, float) - t0, np.asarray(lifetimes, float).ravel(),
                  fwhm_to_sigma(irf_fwhm), include_infinite)


def _basis(u: np.ndarray, taus: np.ndarray, sigma: float, inf: bool,
           artefact: bool = False) -> np.ndarray:
    cols = [_k.irf_exp(u, tau, sigma) for tau in taus]
    if inf:
        cols.append(_k.irf_step(u, sigma))
    if artefact:  # the IRF (peak 1) and its derivative shape -(u / sigma) IRF at t0
        g = np.exp(-0.5 * (u / sigma) ** 2)
        cols += [g, -(u / sigma) * g]
    return np.column_stack(cols) if cols else np.zeros((u.size, 0))


@dataclass(frozen=True, eq=False)
class GlobalFitResult:
    """Outcome of :func:`fit_global` (immutable).

    Attributes
    ----------
    lifetimes : ndarray, shape (L,)
        Fitted lifetimes in fs, ascending.
    lifetime_lower, lifetime_upper : ndarray, shape (L,)
        Interval at level `ci` (NaN when the fit has no residual degrees of freedom).
    interval_method : str
        How the intervals were made.
    das : ndarray, shape (p, n_energies)
        Decay-associated spectra, rows in the order of :attr:`components`.
    das_se : ndarray, shape (p, n_energies)
        Standard errors of the DAS given the lifetimes (conditional, linear).
    components : tuple of str
        ``"tau_1"``, ..., ``"inf"`` and (coherent artefact) ``"artefact"``, ``"artefact_d"``.
    energies : ndarray, shape (n_energies,)
    delays : ndarray, shape (n_delays,)
        The fitted energies (eV) and delays (fs).
    data, fitted, residuals : ndarray, shape (n_delays, n_energies)
        The map, the model and their difference (data - model).
    profiles : ndarray, shape (n_delays, p)
        Kinetic basis at the optimum.
    irf_fwhm : float or None
        IRF FWHM in fs (fitted when ``fix_irf=False``).
    t0 : float
    scheme : str
        ``"parallel"`` (DAS) or ``"sequential"`` (also SAS).
    sas : ndarray or None, shape (p, n_energies)
        Species-associated spectra of the sequential target model.
    concentrations : ndarray or None, shape (n_delays, p)
        Species populations of the sequential model.
    species : tuple of str
        ``"A"``, ``"B"``, ... (sequential model).
    summary : DataFrame
        ``parameter, value, lower, upper, unit, fixed``.
    rmse : float
        Root-mean-square residual.
    ci : float
    diagnostics : tuple of str
        Identifiability problems found (see :func:`fit_diagnostics`); empty when none.
    """

    lifetimes: np.ndarray
    lifetime_lower: np.ndarray
    lifetime_upper: np.ndarray
    interval_method: str
    das: np.ndarray
    das_se: np.ndarray
    components: tuple[str, ...]
    energies: np.ndarray
    delays: np.ndarray
    data: np.ndarray
    fitted: np.ndarray
    residuals: np.ndarray
    profiles: np.ndarray
    irf_fwhm: float | None
    t0: float
    scheme: str
    sas: np.ndarray | None
    concentrations: np.ndarray | None
    species: tuple[str, ...]
    summary: pd.DataFrame
    rmse: float
    ci: float
    diagnostics: tuple[str, ...] = ()

    def das_frame(self) -> pd.DataFrame:
        """Tidy DAS: ``energy, component, lifetime, amplitude, se``."""
        life = list(self.lifetimes) + ([math.inf] if "inf" in self.components else [])
        life += [math.nan] * (len(self.components) - len(life))  # coherent-artefact terms
        n_e = self.energies.size
        return pd.DataFrame({
            "energy": np.tile(self.energies, len(self.components)),
            "component": np.repeat(self.components, n_e),
            "lifetime": np.repeat(life, n_e),
            "amplitude": self.das.ravel(),
            "se": self.das_se.ravel(),
        })

    def sas_frame(self) -> pd.DataFrame:
        """Tidy SAS of the sequential model: ``energy, species, amplitude``."""
        if self.sas is None:
            raise ValueError("species-associated spectra need fit_global(scheme='sequential').")
        n_e = self.energies.size
        return pd.DataFrame({"energy": np.tile(self.energies, len(self.species)),
                             "species": np.repeat(self.species, n_e),
                             "amplitude": self.sas.ravel()})

    def __str__(self) -> str:
        lines = [f"Global lifetime analysis ({self.scheme}), {len(self.lifetimes)} lifetime(s)"
                 f"{' + infinite' if 'inf' in self.components else ''}; IRF FWHM "
                 f"{'none' if self.irf_fwhm is None else f'{self.irf_fwhm:.4g} fs'}, "
                 f"t0 {self.t0:.4g} fs",
                 f"{int(round(self.ci * 100))}% intervals: {self.interval_method}",
                 f"rms residual {self.rmse:.3g} on {self.delays.size} delays x "
                 f"{self.energies.size} energies"]
        r: Any
        for r in self.summary.itertuples():
            iv = "fixed" if r.fixed else ("-" if not np.isfinite(r.lower)
                                          else f"[{r.lower:.4g}, {r.upper:.4g}]")
            lines.append(f"  {r.parameter:<10} {r.value:>10.4g} {r.unit:<3} {iv}")
        lines += [f"warning: {msg}" for msg in self.diagnostics]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        head = html.escape(str(self).splitlines()[0])
        return f"<div><strong>{head}</strong>{self.summary.to_html(index=False)}</div>"


def fit_diagnostics(lifetimes: np.ndarray, lower: np.ndarray, upper: np.ndarray, *,
                    span: float, basis: np.ndarray, jacobian: np.ndarray | None = None
                    ) -> list[str]:
    """Identifiability problems of a global fit (empty list: none found).

    Parameters
    ----------
    lifetimes, lower, upper : ndarray, shape (L,)
        Fitted lifetimes (ascending) and their interval bounds in fs (NaN: none).
    span : float
        Delay span after time zero (fs).
    basis : ndarray, shape (n_delays, p)
        Kinetic basis at the optimum.
    jacobian : ndarray, shape (n_obs, n_nonlinear), optional
        Projected Jacobian of the nonlinear parameters.

    Returns
    -------
    list of str
        One sentence per finding.
    """
    out: list[str] = []
    taus = np.asarray(lifetimes, float)
    for i in range(taus.size):
        for j in range(i + 1, taus.size):
            a, b = taus[i], taus[j]
            overlap = (np.isfinite(lower[j]) and np.isfinite(upper[i])
                       and lower[j] <= upper[i])
            if abs(b - a) <= 0.01 * max(a, b) or overlap:
                how = ("coincide" if abs(b - a) <= 0.01 * max(a, b)
                       else "overlap within their intervals")
                out.append(f"lifetimes tau_{i + 1} = {a:.4g} fs and tau_{j + 1} = {b:.4g} fs "
                           f"{how}: the map does not determine {taus.size} distinct "
                           "exponentials.")
    for i, lo in enumerate(np.asarray(lower, float)):
        if np.isfinite(lo) and lo <= 0:
            out.append(f"the interval of tau_{i + 1} reaches zero or below ([{lo:.4g}, "
                       f"{upper[i]:.4g}] fs): that lifetime is not determined.")
    for i, t in enumerate(taus):
        if span > 0 and t > 10.0 * span:
            out.append(f"tau_{i + 1} = {t:.4g} fs is beyond ten times the delay span "
                       f"({span:.4g} fs): indistinguishable from a non-decaying component.")
    if basis.size:
        norms = np.linalg.norm(basis, axis=0)
        if np.all(norms > 0):
            cond = float(np.linalg.cond(basis / norms))
            if not np.isfinite(cond) or cond > 1e4:
                out.append(f"the kinetic basis is nearly collinear (condition number "
                           f"{cond:.3g}): its spectra (DAS) are large, opposite and unreliable.")
    if jacobian is not None and jacobian.size:
        norms = np.linalg.norm(jacobian, axis=0)
        cond = float(np.linalg.cond(jacobian / np.where(norms > 0, norms, 1.0)))
        if not np.isfinite(cond) or cond > 1e8 or np.any(norms == 0):
            out.append(f"the Jacobian of the lifetimes is singular or ill-conditioned "
                       f"(condition number {cond:.3g}).")
    return out


_ADVICE = ("Hint: use fewer components (n_components), fit one band (energy_range=), start "
           "from other lifetimes (lifetimes=), or compare with fit_kinetics on the "
           "populations; a band that moves in energy is not a sum of exponentials.")


def _as_arrays(trpes_map: Any, energies, delays, intensity):
    if trpes_map is not None:
        missing = [a for a in ("kinetic_energies", "delays", "intensity")
                   if not hasattr(trpes_map, a)]
        if missing:
            raise SchemaError(
                f"fit_global needs a map with attributes kinetic_energies, delays, intensity (a "
                f"TRPESMap); {type(trpes_map).__name__} lacks {missing}. Hint: or pass "
                "energies=, delays=, intensity= arrays."
            )
        energies, delays = trpes_map.kinetic_energies, trpes_map.delays
        intensity = trpes_map.intensity
    if energies is None or delays is None or intensity is None:
        raise SchemaError("fit_global needs a map, or all of energies=, delays=, intensity=.")
    e = np.asarray(energies, dtype=np.float64).ravel()
    d = np.asarray(delays, dtype=np.float64).ravel()
    s = np.asarray(intensity, dtype=np.float64)
    if s.shape != (d.size, e.size):
        raise SchemaError(f"intensity must have shape (n_delays, n_energies) = {(d.size, e.size)};"
                          f" got {s.shape}.")
    return e, d, s


def fit_global(
    trpes_map: Any = None,
    *,
    n_components: int = 1,
    irf_fwhm: float | None = None,
    fix_irf: bool = True,
    t0: float = 0.0,
    fix_t0: bool = True,
    include_infinite: bool = True,
    lifetimes: npt.ArrayLike | None = None,
    scheme: str = "parallel",
    coherent_artefact: bool = False,
    energy_range: tuple[float, float] | None = None,
    delay_range: tuple[float, float] | None = None,
    interval: str | None = "covariance",
    ci: float = 0.95,
    n_boot: int = 200,
    random_state: int | np.random.Generator | None = 0,
    energies: npt.ArrayLike | None = None,
    delays: npt.ArrayLike | None = None,
    intensity: npt.ArrayLike | None = None,
) -> GlobalFitResult:
    """Global lifetime analysis of a map: lifetimes, decay-associated spectra, residuals.

    Parameters
    ----------
    trpes_map : TRPESMap or object with ``energies, delays, intensity``, optional
        A simulated or measured map: energies (n_energies,) eV, delays
        (n_delays,) fs, intensity (n_delays, n_energies). Or pass the three arrays
        as keywords.
    n_components : int
        Number of finite lifetimes L.
    irf_fwhm : float, optional
        FWHM in fs of the Gaussian instrument response (for simulated maps the
        pump-probe cross-correlation). None: no convolution (unless fitted).
    fix_irf : bool
        Keep `irf_fwhm` fixed (default) or fit it (starting from `irf_fwhm`, or
        twice the median delay step).
    t0, fix_t0 : float, bool
        Time zero in fs, fixed by default.
    include_infinite : bool
        Add a non-decaying component (DAS_inf).
    lifetimes : array_like, shape (L,), optional
        Starting lifetimes in fs (default: a search over a log grid of the delay span).
    scheme : {"parallel", "sequential"}
        Also return species-associated spectra of a sequential chain with
        ``"sequential"`` (fastest lifetime first).
    coherent_artefact : bool
        Add a coherent-artefact term at t0: the Gaussian IRF and its derivative shape,
        each with its own spectrum (components ``"artefact"``, ``"artefact_d"``, after
        the kinetic ones); needs an IRF width.
    energy_range, delay_range : (float, float), optional
        Fit only this part of the map (closed ranges, eV / fs).
    interval : {"covariance", "bootstrap", None}
        Wald intervals from the Jacobian, a residual-row bootstrap, or none (NaN
        bounds).
    ci : float
        Interval level in (0, 1).
    n_boot : int
        Number of bootstrap refits (``interval="bootstrap"``), >= 1.
    random_state : int, Generator or None
        Seed of the bootstrap.
    energies, delays, intensity : array_like, optional
        The map as plain arrays (instead of `trpes_map`).

    Returns
    -------
    GlobalFitResult

    Examples
    --------
    >>> import numpy as np
    >>> t = np.linspace(-50, 400, 91); e = np.linspace(0, 1, 11)
    >>> s = np.outer(decay_profiles(t, [80.0], irf_fwhm=40.0)[:, 0], np.ones(11))
    >>> res = fit_global(delays=t, energies=e, intensity=s, irf_fwhm=40.0,
    ...                  include_infinite=False)
    >>> round(float(res.lifetimes[0]), 6)
    80.0
    """
    e, d, s = _as_arrays(trpes_map, energies, delays, intensity)
    if scheme not in ("parallel", "sequential"):
        raise SchemaError(f"The 'scheme' parameter of fit_global must be 'parallel' or "
                          f"'sequential'; got {scheme!r}.")
    if interval not in ("covariance", "bootstrap", None):
        raise SchemaError(f"The 'interval' parameter of fit_global must be 'covariance', "
                          f"'bootstrap' or None; got {interval!r}.")
    if interval == "bootstrap" and (isinstance(n_boot, bool) or int(n_boot) != n_boot
                                     or n_boot < 1):
        raise SchemaError(f"The 'n_boot' parameter of fit_global must be an int >= 1 with "
                          f"interval='bootstrap'; got {n_boot!r}.")
    if not 0.0 < float(ci) < 1.0:
        raise SchemaError(f"The 'ci' parameter of fit_global must be in (0, 1); got {ci!r}.")
    L = int(n_components)
    if L < 0 or L != n_components or (L == 0 and not include_infinite):
        raise SchemaError(f"The 'n_components' parameter of fit_global must be an int >= 1 "
                          f"(or 0 with include_infinite); got {n_components!r}.")
    if irf_fwhm is not None and not (np.isfinite(irf_fwhm) and irf_fwhm > 0):
        raise SchemaError(f"The 'irf_fwhm' parameter of fit_global must be > 0 fs or None; "
                          f"got {irf_fwhm!r}.")
    esel = np.ones(e.size, bool) if energy_range is None else (
        (e >= energy_range[0]) & (e <= energy_range[1]))
    dsel = np.ones(d.size, bool) if delay_range is None else (
        (d >= delay_range[0]) & (d <= delay_range[1]))
    finite_rows = np.all(np.isfinite(s[:, esel]), axis=1)
    if np.any(dsel & ~finite_rows):
        warnings.warn(f"fit_global: leaving out {int(np.sum(dsel & ~finite_rows))} delays with "
                      "non-finite intensity.", NumericalWarning, stacklevel=2)
    dsel &= finite_rows
    e, d, s = e[esel], d[dsel], s[np.ix_(dsel, esel)]
    art = bool(coherent_artefact)
    if art and irf_fwhm is None and fix_irf:
        raise SchemaError("fit_global(coherent_artefact=True) needs irf_fwhm= (or fix_irf=False).")
    p_kin = L + int(include_infinite)
    p = p_kin + 2 * art
    if d.size <= p + 1 or e.size == 0:
        raise SchemaError(f"fit_global needs more than {p + 1} delays and at least one energy "
                          f"in range; got {d.size} delays x {e.size} energies.")
    fit_sigma = not fix_irf
    sigma0 = fwhm_to_sigma(irf_fwhm)
    span = float(d.max() - max(t0, d.min()))
    step = float(np.median(np.diff(d))) if d.size > 1 else 1.0
    if fit_sigma and sigma0 <= 0:
        sigma0 = 2.0 * step / _FWHM_PER_SIGMA

    def unpack(x: np.ndarray) -> tuple[np.ndarray, float, float]:
        taus = np.exp(np.clip(x[:L], -30, 60))
        j = L
        sig = sigma0
        if fit_sigma:
            sig = float(np.exp(np.clip(x[j], -30, 30)))
            j += 1
        tz = float(x[j]) if not fix_t0 else float(t0)
        return taus, sig, tz

    def project(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        taus, sig, tz = unpack(x)
        y = _basis(d - tz, taus, sig, include_infinite, art)
        das, *_ = np.linalg.lstsq(y, s, rcond=None)
        return y, das, s - y @ das

    def resid(x: np.ndarray) -> np.ndarray:
        return project(x)[2].ravel()

    extra = ([math.log(sigma0)] if fit_sigma else []) + ([float(t0)] if not fix_t0 else [])
    if lifetimes is not None:
        guess = np.asarray(lifetimes, float).ravel()
        if guess.size != L or np.any(guess <= 0):
            raise SchemaError(f"The 'lifetimes' parameter of fit_global must hold {L} positive "
                              f"starting lifetimes in fs; got {guess.tolist()}.")
        starts = [np.r_[np.log(guess), extra]]
    elif L == 0:
        starts = [np.asarray(extra, float)]
    else:
        grid = np.geomspace(max(step, span / 300.0), max(span, 2 * step), 8)
        combos = [np.r_[np.log(c), extra] for c in itertools.combinations(grid, L)]
        costs = [float(np.sum(resid(x) ** 2)) for x in combos]
        starts = [combos[i] for i in np.argsort(costs)[:3]]

    best = None
    for x0 in starts:
        if x0.size == 0:
            break
        sol = least_squares(resid, x0, method="trf", x_scale=1.0, xtol=1e-12, ftol=1e-12,
                            gtol=1e-12, max_nfev=2000)
        if best is None or sol.cost < best.cost:
            best = sol
    x = best.x if best is not None else np.zeros(0)
    taus, sig, tz = unpack(x)
    order = np.argsort(taus)
    if L:
        x = x.copy()
        x[:L] = x[:L][order]
        taus = taus[order]
    y, das, r = project(x)
    n_obs = r.size
    n_par = x.size + p * e.size
    dof = n_obs - n_par
    rss = float(np.sum(r * r))
    s2 = rss / dof if dof > 0 else math.nan
    yty_inv = np.linalg.pinv(y.T @ y)
    das_se = np.sqrt(np.clip(np.diag(yty_inv), 0, None) * s2)[:, None] * np.ones((1, e.size))
    alpha = 0.5 * (1 - float(ci))
    z = float(norm.ppf(1 - alpha))

    lo = np.full(x.size, math.nan)
    hi = np.full(x.size, math.nan)
    jac_used: np.ndarray | None = None
    # natural value of each nonlinear parameter and d(natural)/d(x)
    nat = np.r_[taus, [sig * _FWHM_PER_SIGMA] if fit_sigma else [], [tz] if not fix_t0 else []]
    dn = np.r_[taus, [sig * _FWHM_PER_SIGMA] if fit_sigma else [], [1.0] if not fix_t0 else []]
    if x.size and interval == "covariance":
        # Marginal covariance of the nonlinear parameters in the full problem:
        # s^2 [J^T (I - P) J]^-1 with J = d(Y(x) DAS)/dx at fixed DAS and P the projector
        # on the columns of Y (the residual-dependent part of the derivative of the
        # projected residual is left out: it would make the intervals too narrow).
        eps = 1e-6
        q, _ = np.linalg.qr(y)
        jac = np.empty((n_obs, x.size))
        for j in range(x.size):
            h = eps * max(1.0, abs(x[j]))
            xp, xm = x.copy(), x.copy()
            xp[j] += h
            xm[j] -= h
            tp, sp, zp = unpack(xp)
            tm, sm, zm = unpack(xm)
            dm = (_basis(d - zp, tp, sp, include_infinite, art)
                  - _basis(d - zm, tm, sm, include_infinite, art)) @ das / (2 * h)
            jac[:, j] = (dm - q @ (q.T @ dm)).ravel()
        jac_used = jac[:, :L]
        cov = s2 * np.linalg.pinv(jac.T @ jac)
        se = np.sqrt(np.clip(np.diag(cov), 0, None)) * np.abs(dn)
        lo, hi = nat - z * se, nat + z * se
        method = ("covariance (Wald, s^2 [J^T (I - P) J]^-1 marginal over the spectra; "
                  "assumes independent residuals of equal variance)")
    elif x.size and interval == "bootstrap":
        rng = np.random.default_rng(random_state)
        fit_map = y @ das
        refits: list[np.ndarray] = []
        for _ in range(int(n_boot)):
            rows = rng.integers(0, d.size, size=d.size)
            s_b = fit_map + r[rows]

            def resid_b(xx: np.ndarray, s_b: np.ndarray = s_b) -> np.ndarray:
                tb, sg, t_z = unpack(xx)
                yb = _basis(d - t_z, tb, sg, include_infinite, art)
                db, *_ = np.linalg.lstsq(yb, s_b, rcond=None)
                return (s_b - yb @ db).ravel()

            sol = least_squares(resid_b, x, method="trf", xtol=1e-10, ftol=1e-10, gtol=1e-10)
            tb, sg, t_z = unpack(sol.x)
            refits.append(np.r_[np.sort(tb), [sg * _FWHM_PER_SIGMA] if fit_sigma else [],
                              [t_z] if not fix_t0 else []])
        vals = np.asarray(refits)
        lo, hi = np.quantile(vals, [alpha, 1 - alpha], axis=0)
        method = (f"bootstrap ({int(n_boot)} refits; residual rows resampled with replacement, "
                  "percentile)")
    elif x.size:
        method = "none"
    else:
        method = "none (no nonlinear parameters)"

    comps = tuple([f"tau_{i + 1}" for i in range(L)] + (["inf"] if include_infinite else [])
                  + (["artefact", "artefact_d"] if art else []))
    rows = [(f"tau_{i + 1}", float(taus[i]), float(lo[i]), float(hi[i]), "fs", False)
            for i in range(L)]
    j = L
    fwhm_out = None if sig <= 0 else sig * _FWHM_PER_SIGMA
    if fit_sigma:
        rows.append(("irf_fwhm", fwhm_out, float(lo[j]), float(hi[j]), "fs", False))
        j += 1
    else:
        rows.append(("irf_fwhm", fwhm_out if fwhm_out else 0.0, math.nan, math.nan, "fs", True))
    if not fix_t0:
        rows.append(("t0", tz, float(lo[j]), float(hi[j]), "fs", False))
    else:
        rows.append(("t0", tz, math.nan, math.nan, "fs", True))
    summary = pd.DataFrame(rows, columns=["parameter", "value", "lower", "upper", "unit",
                                          "fixed"])
    sas = conc = None
    species: tuple[str, ...] = ()
    if scheme == "sequential":
        rates = np.r_[1.0 / taus, [0.0] if include_infinite else []]
        b = _k.sequential_coefficients(rates)
        if np.unique(np.round(rates, 14)).size < rates.size:
            raise SchemaError("fit_global(scheme='sequential') needs distinct lifetimes.")
        sas = np.linalg.solve(b.T, das[:p_kin])
        conc = y[:, :p_kin] @ b.T
        species = tuple(chr(ord("A") + i) for i in range(p_kin))
    diag = tuple(fit_diagnostics(taus, lo[:L], hi[:L], span=span, basis=y,
                                 jacobian=jac_used)) if L else ()
    if diag:
        warnings.warn("fit_global: " + " ".join(diag) + " " + _ADVICE, DegenerateFitWarning,
                      stacklevel=2)
    return GlobalFitResult(
        lifetimes=taus, lifetime_lower=np.asarray(lo[:L], float),
        lifetime_upper=np.asarray(hi[:L], float), interval_method=method, das=das,
        das_se=das_se, components=comps, energies=e, delays=d, data=s, fitted=y @ das,
        residuals=r, profiles=y, irf_fwhm=fwhm_out, t0=tz, scheme=scheme, sas=sas,
        concentrations=conc, species=species, summary=summary,
        rmse=float(math.sqrt(rss / n_obs)), ci=float(ci), diagnostics=diag,
    )
