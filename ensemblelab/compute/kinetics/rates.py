"""Fits of kinetic schemes to populations, with bootstrap or covariance intervals.

The schemes (``"single"``, ``"sequential"``, ``"parallel"``) and their model
functions are in :mod:`.schemes`. Fits are unweighted least squares on the
population curves (time constants fitted as log tau, so they stay positive).
Intervals (``interval=``):

* ``"bootstrap"`` (needs the ensemble: ``fit_kinetics(ens, ...)`` or ``ens=``):
  percentile bootstrap over whole trajectories -- every resample's populations
  (computed all at once, see :mod:`.populations`) are refitted, all resamples
  together by a vectorised Levenberg-Marquardt started at the full-data estimate;
* ``"covariance"``: Wald intervals from the Jacobian covariance. These treat the
  residuals at different times as independent, which they are not (a trajectory
  contributes to every time), so they are too narrow; the result says so in
  ``interval_method``;
* ``None``: no intervals (NaN bounds).
"""

from __future__ import annotations

import html
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.optimize import least_squares
from scipy.stats import norm

from ...errors import NumericalWarning, SchemaError
from . import _kernels_populations as _k
from .schemes import KINETIC_SCHEMES, POSITIVE, UNIT, Problem, Scheme, fwhm_to_sigma

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = ["fit_kinetics", "KineticsResult", "INTERVAL_CHOICES"]

#: interval choices of :func:`fit_kinetics`
INTERVAL_CHOICES = ("bootstrap", "covariance", None)


# ---------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class KineticsResult:
    """Outcome of :func:`fit_kinetics` (immutable).

    Attributes
    ----------
    scheme : str
        ``"single"``, ``"sequential"`` or ``"parallel"``.
    params : dict of str to float
        Fitted (and fixed) parameters in natural units (fs or 1).
    summary : DataFrame
        ``parameter, value, lower, upper, unit, fixed``: every parameter and the
        derived quantities (partial time constants, maximum of B), with intervals
        at level `ci` (NaN for fixed ones).
    curves : DataFrame
        ``time, state, label, role, population, fitted, residual`` on the fitted
        time range.
    interval_method : str
        How the intervals were made: ``"bootstrap (N resamples of trajectories, ...)"``,
        ``"covariance (...)"`` or ``"none"``.
    ci : float
        Confidence level.
    boot_params : DataFrame or None
        One row per bootstrap resample (natural units), failed refits NaN.
    n_failed : int
        Bootstrap refits that did not converge (left out of the intervals).
    irf_fwhm, t0 : float or None, float
        Instrument response (fs) and time zero used.
    states : tuple of int
        Fitted states (A, B, C roles in order).
    rmse : float
        Root-mean-square residual of the full-data fit.
    """

    scheme: str
    params: dict[str, float]
    summary: pd.DataFrame
    curves: pd.DataFrame
    interval_method: str
    ci: float
    boot_params: pd.DataFrame | None
    n_failed: int
    irf_fwhm: float | None
    t0: float
    states: tuple[int, ...]
    rmse: float
    _problem: Any = field(default=None, repr=False)

    @property
    def time_constants(self) -> dict[str, float]:
        """The time constants (fs) by name, e.g. ``{"tau": 98.7}``."""
        return {k: v for k, v in self.params.items() if k.startswith("tau")}

    @property
    def residuals(self) -> pd.DataFrame:
        """``time, state, residual`` (data - fit) of the full-data fit."""
        return self.curves[["time", "state", "residual"]]

    def interval(self, name: str) -> tuple[float, float]:
        """(lower, upper) of parameter `name` at level :attr:`ci`."""
        row = self.summary.loc[self.summary["parameter"] == name]
        if row.empty:
            raise KeyError(f"no parameter {name!r}; have {self.summary['parameter'].tolist()}")
        return float(row["lower"].iloc[0]), float(row["upper"].iloc[0])

    def predict(self, times: npt.ArrayLike) -> pd.DataFrame:
        """Fitted curves on any time grid: ``time, state, role, fitted``."""
        t = np.asarray(times, dtype=np.float64).ravel()
        prob = self._problem
        p = Problem(prob.scheme, prob.free, prob.fixed, t, prob.n_roles, prob.sigma, self.t0)
        x = prob.to_free(self.params)[None, :]
        c = p.curves(x)[0]
        roles = KINETIC_SCHEMES[self.scheme].roles[: prob.n_roles]
        return pd.DataFrame({
            "time": np.tile(t, len(roles)),
            "state": np.repeat(self.states, t.size),
            "role": np.repeat(roles, t.size),
            "fitted": c.ravel(),
        })

    def __str__(self) -> str:
        lines = [f"Kinetic fit: scheme {self.scheme!r}, states {list(self.states)}, "
                 f"IRF FWHM {self.irf_fwhm if self.irf_fwhm is not None else 'none'}"
                 f"{' fs' if self.irf_fwhm is not None else ''}, t0 {self.t0:g} fs",
                 f"{int(round(self.ci * 100))}% intervals: {self.interval_method}",
                 f"rms residual {self.rmse:.3g}"]
        rows = [("parameter", "value", "interval", "unit")]
        r: Any
        for r in self.summary.itertuples():
            iv = "fixed" if r.fixed else (
                "-" if not np.isfinite(r.lower) else f"[{r.lower:.4g}, {r.upper:.4g}]")
            rows.append((r.parameter, f"{r.value:.4g}", iv, r.unit))
        widths = [max(len(row[i]) for row in rows) for i in range(4)]
        lines += ["  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)).rstrip()
                  for row in rows]
        if self.n_failed:
            lines.append(f"{self.n_failed} bootstrap refits did not converge (left out)")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        head = html.escape(
            f"Kinetic fit ({self.scheme}), {int(round(self.ci * 100))}% intervals: "
            f"{self.interval_method}")
        return f"<div><strong>{head}</strong>{self.summary.to_html(index=False)}</div>"


# ---------------------------------------------------------------- fitting
def _pivot(frame: pd.DataFrame) -> tuple[np.ndarray, dict[int, np.ndarray], dict[int, str]]:
    need = {"time", "state", "population"}
    if not need <= set(frame.columns):
        raise SchemaError(
            f"fit_kinetics needs a populations frame with columns {sorted(need)}; found "
            f"{list(frame.columns)}. Hint: pass the output of populations(ens) or the ensemble."
        )
    wide = frame.pivot_table(index="time", columns="state", values="population",
                             aggfunc="first", dropna=False).sort_index()
    labels = {}
    if "label" in frame.columns:
        labels = dict(frame.drop_duplicates("state").set_index("state")["label"])
    return (wide.index.to_numpy(np.float64),
            {int(c): wide[c].to_numpy(np.float64) for c in wide.columns}, labels)


def _resolve_states(states, available: Sequence[int], labels: dict[int, str], scheme: Scheme,
                    first_values: dict[int, float]) -> tuple[int, ...]:
    if states is None:
        if scheme.name != "single":
            raise SchemaError(
                f"fit_kinetics(scheme={scheme.name!r}) needs 'states' naming the "
                f"{'/'.join(scheme.roles)} states in order, e.g. states=('S2', 'S1', 'S0')."
            )
        return (max(first_values, key=lambda s: first_values[s]),)
    if isinstance(states, str | int | np.integer):
        states = (states,)
    by_label = {v: k for k, v in labels.items()}
    out = []
    for s in states:
        if isinstance(s, str):
            if s not in by_label:
                raise SchemaError(f"fit_kinetics: unknown state label {s!r}; have "
                                  f"{sorted(by_label)}.")
            out.append(int(by_label[s]))
        else:
            if int(s) not in available:
                raise SchemaError(f"fit_kinetics: unknown state {s!r}; have {list(available)}.")
            out.append(int(s))
    if len(out) not in scheme.n_roles:
        raise SchemaError(
            f"fit_kinetics(scheme={scheme.name!r}) fits {' or '.join(map(str, scheme.n_roles))} "
            f"states (roles {scheme.roles}); got {len(out)}: {list(states)}."
        )
    return tuple(out)


def _first_crossing(t: np.ndarray, y: np.ndarray, level: float) -> float | None:
    ok = np.flatnonzero(np.isfinite(y) & (y <= level))
    return float(t[ok[0]]) if ok.size else None


def _starts(scheme: str, t: np.ndarray, y: np.ndarray, t0: float, latency: bool,
            offset: bool) -> list[dict[str, float]]:
    span = max(float(np.nanmax(t) - t0), 1e-6)
    a = y[0]
    a0 = float(np.nanmax(a[: max(3, a.size // 20)]))
    tail = float(np.nanmean(a[-max(3, a.size // 20):]))
    p_inf = tail if offset else 0.0
    level = p_inf + (a0 - p_inf) / math.e
    tc = _first_crossing(t, a, level)
    tau = max((tc - t0) if tc is not None else span / 2.0, span / 1000.0)
    if scheme == "single":
        lat = [0.0] if not latency else [0.0, 0.2 * tau]
        return [{"tau": tau * f, "latency": d, "p_inf": p_inf}
                for f in (0.5, 1.0, 2.0) for d in lat]
    if scheme == "sequential":
        return [{"tau1": tau, "tau2": tau * f} for f in (0.3, 0.7, 1.6, 4.0)]
    if y.shape[0] >= 3:
        bend, cend = float(np.nanmean(y[1][-5:])), float(np.nanmean(y[2][-5:]))
        phi = bend / (bend + cend) if bend + cend > 0 else 0.5
    else:
        phi = float(np.nanmean(y[1][-5:])) / max(1.0 - tail, 1e-6)
    phi = min(max(phi, 0.02), 0.98)
    return [{"tau": tau * f, "branching": phi} for f in (0.5, 1.0, 2.0)]


def _derived(scheme: str, p: Mapping[str, Any]) -> dict[str, np.ndarray]:
    if scheme == "parallel":
        # arrays, not Python floats: a branching of exactly 0 or 1 gives an infinite partial
        # lifetime instead of a ZeroDivisionError
        tau = np.asarray(p["tau"], dtype=float)
        branching = np.asarray(p["branching"], dtype=float)
        with np.errstate(divide="ignore"):
            return {"tau_B": tau / branching, "tau_C": tau / (1.0 - branching)}
    if scheme == "sequential":
        k1, k2 = 1.0 / np.asarray(p["tau1"], float), 1.0 / np.asarray(p["tau2"], float)
        with np.errstate(divide="ignore", invalid="ignore"):
            tm = np.log(k1 / k2) / (k1 - k2)
            bm = (k1 / k2) ** (k2 / (k2 - k1))
        eq = np.isclose(k1, k2, rtol=1e-12)
        return {"t_max_B": np.where(eq, 1.0 / k1, tm), "B_max": np.where(eq, math.exp(-1), bm)}
    return {}


def fit_kinetics(
    data: Ensemble | pd.DataFrame,
    *,
    scheme: str = "single",
    states: Sequence[int | str] | int | str | None = None,
    kind: str | None = None,
    weights: str | npt.ArrayLike | None = None,
    irf_fwhm: float | None = None,
    t0: float = 0.0,
    latency: bool = False,
    offset: bool = False,
    time_range: tuple[float, float] | None = None,
    time_grid: npt.ArrayLike | None = None,
    interval: str | None = "bootstrap",
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    ens: Ensemble | None = None,
    absorbing_state: int | str | None = "metadata",
) -> KineticsResult:
    """Fit a kinetic scheme to populations, with bootstrap or covariance intervals.

    Parameters
    ----------
    data : Ensemble or DataFrame
        The ensemble (needed for bootstrap intervals: refit per resample of
        trajectories), or a populations frame (``time, state, population``) from
        :func:`~ensemblelab.compute.kinetics.populations.populations`.
    scheme : {"single", "sequential", "parallel"}
        Kinetic scheme, see :mod:`.schemes`.
    states : sequence of int or str, optional
        States (indices or labels) playing the roles A[, B[, C]]. Default for
        ``"single"``: the most populated state at the first time; required
        otherwise.
    kind : {"active", "amplitudes", "diabatic"}, optional
        Population kind computed from the ensemble (default ``"active"``, or the
        frame's ``attrs["kind"]``).
    weights : None, "uniform", str or array_like
        Trajectory weights (as in ``populations``), ensemble input only.
    irf_fwhm : float, optional
        FWHM in fs of a Gaussian instrument response to convolve the scheme with.
    t0 : float
        Time zero in fs (fixed).
    latency, offset : bool
        ``"single"`` only: also fit a latency d (fs) / a final population P_inf.
    time_range : (float, float), optional
        Only fit times in this closed range (fs).
    time_grid : array_like, optional
        Time grid for populations computed from the ensemble.
    interval : {"bootstrap", "covariance", None}
        How the intervals are made: percentile bootstrap over trajectories (needs
        the ensemble), Wald intervals from the Jacobian (too narrow, see the module
        docstring), or none (NaN bounds).
    ci : float
        Interval level in (0, 1).
    n_boot : int
        Number of bootstrap resamples (``interval="bootstrap"``), >= 1.
    random_state : int, Generator or None
        Seed of the bootstrap.
    ens : Ensemble, optional
        With a frame as `data`: the ensemble it came from, to bootstrap.
    absorbing_state : "metadata", int or None
        Populations from the ensemble count trajectories that end on this state in it
        until the ensemble's end (see
        :func:`~ensemblelab.compute.kinetics.populations.populations`); "metadata"
        uses ``ens.absorbing_state`` (default 0), None switches it off.

    Returns
    -------
    KineticsResult

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> res = fit_kinetics(make_toy_ensemble(200, seed=3), interval="bootstrap", n_boot=200)
    >>> lo, hi = res.interval("tau")
    >>> bool(lo < res.params["tau"] < hi)
    True
    """
    from ...data.ensemble import Ensemble
    from .populations import population_arrays

    if scheme not in KINETIC_SCHEMES:
        raise SchemaError(f"The 'scheme' parameter of fit_kinetics must be one of "
                          f"{tuple(KINETIC_SCHEMES)}; got {scheme!r}.")
    spec = KINETIC_SCHEMES[scheme]
    if interval not in INTERVAL_CHOICES:
        raise SchemaError(f"The 'interval' parameter of fit_kinetics must be one of "
                          f"{INTERVAL_CHOICES}; got {interval!r}.")
    if interval == "bootstrap" and (isinstance(n_boot, bool) or int(n_boot) != n_boot
                                     or n_boot < 1):
        raise SchemaError(f"The 'n_boot' parameter of fit_kinetics must be an int >= 1 with "
                          f"interval='bootstrap'; got {n_boot!r}. Hint: interval=None "
                          "(or 'covariance') skips the bootstrap.")
    if not 0.0 < float(ci) < 1.0:
        raise SchemaError(f"The 'ci' parameter of fit_kinetics must be in (0, 1); got {ci!r}.")
    if irf_fwhm is not None and not (np.isfinite(irf_fwhm) and irf_fwhm > 0):
        raise SchemaError(f"The 'irf_fwhm' parameter of fit_kinetics must be > 0 fs or None; "
                          f"got {irf_fwhm!r}.")
    arrays = None
    if isinstance(data, Ensemble):
        ens = data
        frame = None
    elif isinstance(data, pd.DataFrame):
        frame = data
    else:
        raise SchemaError(f"fit_kinetics takes an Ensemble or a populations DataFrame; got "
                          f"{type(data).__name__}.")
    if ens is not None:
        kind_ = kind or (frame.attrs.get("kind") if frame is not None else None) or "active"
        if frame is not None and time_grid is None:
            time_grid = np.unique(frame["time"].to_numpy(np.float64))
        arrays = population_arrays(ens, kind=kind_, weights=weights, time_grid=time_grid,
                                   absorbing_state=absorbing_state)
        mean = arrays.mean()
        t_all = arrays.times
        series = {s: mean[:, s] for s in range(mean.shape[1])}
        labels = dict(enumerate(arrays.labels))
    else:
        assert frame is not None
        t_all, series, labels = _pivot(frame)
    if interval == "bootstrap" and arrays is None:
        raise SchemaError("fit_kinetics(interval='bootstrap') resamples trajectories, so it "
                          "needs the ensemble: pass it as data or as ens=. Hint: "
                          "interval='covariance' gives (too narrow) intervals from a frame "
                          "alone, interval=None none.")
    sel: np.ndarray = np.ones(t_all.size, dtype=bool)
    if time_range is not None:
        sel = (t_all >= time_range[0]) & (t_all <= time_range[1])
    sel &= t_all >= (t0 if irf_fwhm is None else -np.inf)
    if sel.sum() < 3:
        raise SchemaError(f"fit_kinetics needs at least 3 times to fit; {int(sel.sum())} are in "
                          f"time_range={time_range} (and >= t0={t0} without an IRF).")
    first = {s: float(np.nan_to_num(v[sel][0])) for s, v in series.items()}
    st = _resolve_states(states, list(series), labels, spec, first)
    t = t_all[sel]
    y = np.stack([series[s][sel] for s in st])

    fixed: dict[str, float] = {}
    free = list(spec.params)
    if scheme == "single":
        if not latency:
            fixed["latency"] = 0.0
            free.remove("latency")
        if not offset:
            fixed["p_inf"] = 0.0
            free.remove("p_inf")
    sigma = fwhm_to_sigma(irf_fwhm)
    prob = Problem(scheme, free, fixed, t, len(st), sigma, t0)
    yflat = y.ravel()
    ok = np.isfinite(yflat)

    def res(x: np.ndarray) -> np.ndarray:
        return (prob(x[None, :])[0] - yflat)[ok]

    best = None
    for start in _starts(scheme, t, y, t0, latency, offset):
        x0 = prob.to_free({**start, **fixed})
        try:
            sol = least_squares(res, x0, method="lm", xtol=1e-12, ftol=1e-12, gtol=1e-12,
                                max_nfev=2000)
        except ValueError:
            continue
        if best is None or sol.cost < best.cost:
            best = sol
    if best is None or not np.all(np.isfinite(best.x)):
        raise SchemaError("fit_kinetics: the fit failed from every starting point. Hint: check "
                          "the states and the time range.")
    xhat = best.x
    nat = {k: float(np.asarray(v)) for k, v in prob.to_natural(xhat).items()}
    derived = {k: float(v) for k, v in _derived(scheme, nat).items()}
    fitted = prob(xhat[None, :])[0].reshape(len(st), -1)
    resid = y - fitted
    rmse = float(np.sqrt(np.nanmean(resid**2)))

    alpha = 0.5 * (1.0 - float(ci))
    boot_frame = None
    n_failed = 0
    names = free + list(derived)
    lower = dict.fromkeys(names, math.nan)
    upper = dict.fromkeys(names, math.nan)
    if interval == "bootstrap" and arrays is not None:
        rng = np.random.default_rng(random_state)
        counts = _k.bootstrap_counts(arrays.weights.size, int(n_boot), rng)
        boot = arrays.bootstrap(counts)[:, sel][:, :, list(st)]  # (n_boot, n_t, n_roles)
        yb = np.transpose(boot, (0, 2, 1)).reshape(int(n_boot), -1)
        xb, _, conv = _k.batched_lm(prob, np.repeat(xhat[None, :], int(n_boot), axis=0), yb)
        good = conv & np.all(np.isfinite(xb), axis=1)
        n_failed = int((~good).sum())
        natb = prob.to_natural(xb)
        cols = {k: np.asarray(natb[k], float) for k in free}
        cols.update({k: np.asarray(v, float) for k, v in _derived(scheme, natb).items()})
        boot_frame = pd.DataFrame({k: np.where(good, v, np.nan) for k, v in cols.items()})
        for k in names:
            v = boot_frame[k].to_numpy()
            v = v[np.isfinite(v)]
            if v.size:
                lower[k], upper[k] = (float(q) for q in np.quantile(v, [alpha, 1 - alpha]))
        method = f"bootstrap ({int(n_boot)} resamples of trajectories, percentile)"
        if n_failed > 0.05 * n_boot:
            warnings.warn(f"fit_kinetics: {n_failed} of {n_boot} bootstrap refits did not "
                          "converge; the intervals leave them out.", NumericalWarning,
                          stacklevel=2)
    elif interval == "covariance":
        # Wald intervals from the Jacobian at the optimum, in natural parameters
        jac = best.jac
        dof = max(int(ok.sum()) - len(free), 1)
        s2 = 2.0 * best.cost / dof
        z = float(norm.ppf(1 - alpha))
        try:
            cov_x = s2 * np.linalg.inv(jac.T @ jac)
        except np.linalg.LinAlgError:
            cov_x = np.full((len(free), len(free)), np.nan)
        # d natural / d x for each transformed parameter
        dnat = []
        for name in free:
            if name in POSITIVE:
                dnat.append(nat[name])
            elif name == "branching":
                dnat.append(nat[name] * (1 - nat[name]))
            else:
                dnat.append(1.0)
        se = np.sqrt(np.clip(np.diag(cov_x), 0, None)) * np.abs(np.asarray(dnat))
        for name, e in zip(free, se, strict=True):
            lower[name], upper[name] = nat[name] - z * e, nat[name] + z * e
        method = ("covariance (Wald, from the Jacobian; treats times as independent, so "
                  "too narrow -- pass the ensemble for bootstrap intervals)")
    else:
        method = "none"

    rows: list[tuple[str, float, float, float, str, bool]] = []
    for name in spec.params:
        if name in fixed:
            rows.append((name, fixed[name], math.nan, math.nan, UNIT[name], True))
        else:
            rows.append((name, nat[name], lower[name], upper[name], UNIT[name], False))
    for name, dv in derived.items():
        rows.append((name, dv, lower[name], upper[name], UNIT[name], False))
    summary = pd.DataFrame(rows, columns=["parameter", "value", "lower", "upper", "unit",
                                          "fixed"])
    roles = spec.roles[: len(st)]
    curves = pd.DataFrame({
        "time": np.tile(t, len(st)),
        "state": np.repeat(st, t.size),
        "label": np.repeat([labels.get(s, str(s)) for s in st], t.size),
        "role": np.repeat(roles, t.size),
        "population": y.ravel(),
        "fitted": fitted.ravel(),
        "residual": resid.ravel(),
    })
    return KineticsResult(
        scheme=scheme, params={**nat, **derived}, summary=summary, curves=curves,
        interval_method=method, ci=float(ci), boot_params=boot_frame, n_failed=n_failed,
        irf_fwhm=None if irf_fwhm is None else float(irf_fwhm), t0=float(t0), states=st,
        rmse=rmse, _problem=prob,
    )
