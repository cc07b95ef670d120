"""Is the ensemble large enough? Error against the number of trajectories.

:func:`convergence` recomputes a quantity (a map, the populations, a lifetime, or any
function of an ensemble) on nested random subsets of the trajectories -- each *nesting*
is one random order, and the subset of size N is its first N trajectories -- and
measures how far each subset's value lies from the full ensemble's. For subsets drawn
without replacement from N_full trajectories the mean-square deviation of an average is
``sigma^2 (1/N - 1/N_full)``; dividing by the finite-population factor
``sqrt(1 - N/N_full)`` leaves ``sigma / sqrt(N)``. A straight-line fit of
``log(error)`` against ``log(N)`` gives the exponent (expected -1/2 for ensemble
averages) and the amplitude, hence the error of the full ensemble and the N that a
target error needs.
"""

from __future__ import annotations

import html
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ...errors import SchemaError

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble
    from ...data.spectrum import TRPESMap

__all__ = ["convergence", "ConvergenceResult", "CONVERGENCE_QUANTITIES"]

#: the named quantities :func:`convergence` knows
CONVERGENCE_QUANTITIES = ("map", "populations", "lifetime")


@dataclass(frozen=True, eq=False)
class ConvergenceResult:
    """How the error of a quantity shrinks with the number of trajectories (immutable).

    Attributes
    ----------
    quantity : str
        What was recomputed.
    metric : str
        How the deviation from the full ensemble is measured.
    n_full : int
        Trajectories of the full ensemble.
    errors : DataFrame
        One row per (size, nesting): ``n``, ``nesting``, ``error`` (deviation from the
        full ensemble's value), ``error_corrected`` (divided by ``sqrt(1 - n/n_full)``).
    table : DataFrame
        One row per size: ``n``, ``error`` (root mean square over nestings of
        ``error_corrected``), ``spread`` (standard deviation over nestings).
    exponent, exponent_se : float
        Fitted slope of log(error) against log(n) and its standard error (expected -0.5).
    amplitude : float
        ``a`` in ``error = a n^exponent`` (free exponent).
    amplitude_sqrt : float
        ``b`` in ``error = b / sqrt(n)`` (exponent fixed at -1/2: one parameter, the
        law of ensemble averages, steadier than the free fit).
    error_full : float
        Predicted standard error of the full ensemble, ``b / sqrt(n_full)``.
    target : float or None
        The error asked for.
    n_needed : float or None
        Trajectories for `target` by the ``1/sqrt(n)`` law (None without a target).
    n_needed_fitted : float or None
        The same by the free fit (inf when the error does not decrease).
    """

    quantity: str
    metric: str
    n_full: int
    errors: pd.DataFrame
    table: pd.DataFrame
    exponent: float
    exponent_se: float
    amplitude: float
    amplitude_sqrt: float
    error_full: float
    target: float | None
    n_needed: float | None
    n_needed_fitted: float | None

    def verdict(self) -> str:
        """One sentence: is the ensemble large enough for the target?"""
        head = (f"{self.quantity}: error ~ n^{self.exponent:.2f} (+- {self.exponent_se:.2f}; "
                f"expected -0.5); predicted standard error with all {self.n_full} trajectories "
                f"{self.error_full:.3g} ({self.metric})")
        if self.target is None or self.n_needed is None:
            return head + "."
        enough = self.error_full <= self.target
        need = _round_up(self.n_needed)
        return (head + f"; a target of {self.target:.3g} needs about {need} trajectories "
                "by the 1/sqrt(N) law"
                + (f" ({_round_up(self.n_needed_fitted)} by the free fit)"
                   if self.n_needed_fitted is not None else "")
                + (" -- the ensemble is large enough." if enough
                   else " -- the ensemble is too small."))

    def __str__(self) -> str:
        rows = "\n".join(f"  N = {int(n):>6d}: error {e:.3g} (spread {s:.2g})"
                         for n, e, s in zip(self.table["n"], self.table["error"],
                                            self.table["spread"], strict=True))
        return f"Convergence of the {self.quantity}\n{rows}\n{self.verdict()}"

    def _repr_html_(self) -> str:
        return (f"<div><strong>{html.escape(self.verdict())}</strong>"
                f"{self.table.to_html(index=False)}</div>")


def _round_up(n: float | None) -> str:
    if n is None or not math.isfinite(n):
        return "an unknown number of"
    return str(int(math.ceil(n)))


def _default_sizes(n_full: int) -> np.ndarray:
    lo = max(5, n_full // 16)
    hi = max(lo + 1, n_full // 2)
    return np.unique(np.round(np.geomspace(lo, hi, 5)).astype(np.int64))


def _quantity_function(ens: Ensemble, quantity: Any, trpes_map: TRPESMap | None,
                       options: dict[str, Any]) -> tuple[Callable[[Ensemble], np.ndarray],
                                                         Callable[[np.ndarray, np.ndarray],
                                                                  float], str, str]:
    """(value of a subset, deviation from the full value, name, metric)."""
    if callable(quantity):
        def rms(a: np.ndarray, ref: np.ndarray) -> float:
            return float(np.sqrt(np.nanmean((np.asarray(a) - np.asarray(ref)) ** 2)))
        return (lambda e: np.asarray(quantity(e), dtype=np.float64)), rms, \
            getattr(quantity, "__name__", "quantity"), "root mean square deviation"
    if quantity == "populations":
        from ..kinetics import populations

        grid = np.asarray(options.pop("time_grid", None) if "time_grid" in options
                          else ens.times, dtype=np.float64)

        def pops(e: Ensemble) -> np.ndarray:
            frame = populations(e, interval="wilson", time_grid=grid, **options)
            return frame["population"].to_numpy(np.float64)

        def rms_pop(a: np.ndarray, ref: np.ndarray) -> float:
            return float(np.sqrt(np.nanmean((a - ref) ** 2)))
        return pops, rms_pop, "populations", "root mean square deviation of the populations"
    if quantity == "lifetime":
        from ..kinetics import fit_kinetics

        name = options.pop("parameter", "tau")

        def life(e: Ensemble) -> np.ndarray:
            res = fit_kinetics(e, interval=None, **options)
            return np.array([res.params[name]])

        def rel(a: np.ndarray, ref: np.ndarray) -> float:
            return float(abs(a[0] - ref[0]) / abs(ref[0]))
        return life, rel, f"lifetime {name}", f"relative deviation of {name}"
    if quantity == "map":
        if trpes_map is None:
            raise SchemaError("convergence(quantity='map') needs the map: pass trpes_map= (from "
                              "compute_trpes); subsets are recomputed with its settings.")
        from ..spectroscopy import compute_trpes
        from ..spectroscopy._checks import settings_from_params

        p = trpes_map.params
        probe, pump, cs, weights = settings_from_params(p)
        kw = {"probe": probe, "pump": pump, "kinetic_energies": trpes_map.kinetic_energies,
              "delays": trpes_map.delays, "resolution": float(p.get("resolution", 0.0)),
              "convolve": bool(p.get("convolve", True)), "cross_section": cs,
              "weights": weights, "normalise": p.get("normalise", "alive"),
              "time_step": p.get("time_step"), "progress": False}
        full = np.asarray(trpes_map.intensity, dtype=np.float64)
        peak = float(np.nanmax(np.abs(full))) if full.size else 0.0
        level = float(options.pop("signal_level", 0.05))
        mask = np.abs(full) > level * peak

        def one_map(e: Ensemble) -> np.ndarray:
            import warnings

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return np.asarray(compute_trpes(e, **kw).intensity, dtype=np.float64)

        def rms_map(a: np.ndarray, ref: np.ndarray) -> float:
            if peak == 0 or not mask.any():
                return math.nan
            return float(np.sqrt(np.mean((a[mask] - ref[mask]) ** 2)) / peak)
        return one_map, rms_map, "map", (f"root mean square deviation over pixels above "
                                         f"{level:.0%} of the peak, relative to the peak")
    raise SchemaError(f"The 'quantity' parameter of convergence must be one of "
                      f"{CONVERGENCE_QUANTITIES} or a function of an ensemble; got "
                      f"{quantity!r}.")


def convergence(
    ens: Ensemble,
    quantity: str | Callable[[Ensemble], Any] = "populations",
    *,
    sizes: Sequence[int] | npt.ArrayLike | None = None,
    n_nestings: int = 8,
    target: float | None = None,
    trpes_map: TRPESMap | None = None,
    random_state: int | np.random.Generator | None = 0,
    progress: bool = False,
    **options: Any,
) -> ConvergenceResult:
    """Error of a quantity against the number of trajectories, on nested random subsets.

    Parameters
    ----------
    ens : Ensemble
        The full ensemble.
    quantity : {"map", "populations", "lifetime"} or callable
        What to recompute: the map of `trpes_map` (same settings and grids), the
        active-state populations on the ensemble's times, a kinetic-fit time constant
        (``fit_kinetics(..., interval=None)``; ``parameter=`` names it, default
        ``"tau"``), or any function ``f(ens) -> array`` (deviation: root mean square).
    sizes : sequence of int, optional
        Subset sizes, each in [2, n_trajectories); default 5 sizes from n/16 to n/2.
    n_nestings : int
        Random orders of the trajectories (each gives nested subsets).
    target : float, optional
        An error to reach, in the units of the metric; the result says how many
        trajectories it needs.
    trpes_map : TRPESMap, optional
        With ``quantity="map"``: the full ensemble's map.
    random_state : int, Generator or None
        Seed of the orders.
    progress : bool
        Progress bar over the subsets.
    **options
        Passed on: to ``populations`` (``kind``, ``weights``, ``time_grid``), to
        ``fit_kinetics`` (``scheme``, ``states``...), or ``signal_level`` (default 0.05)
        for the map's pixel mask.

    Returns
    -------
    ConvergenceResult

    Examples
    --------
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> res = convergence(make_toy_ensemble(160, seed=2, dt=10.0), "populations",
    ...                   target=0.01)
    >>> bool(-0.8 < res.exponent < -0.2), res.n_needed > 160
    (True, True)
    """
    n_full = int(ens.n_trajectories)
    if n_full < 4:
        raise SchemaError(f"convergence needs at least 4 trajectories; got {n_full}.")
    size_arr = _default_sizes(n_full) if sizes is None else np.unique(
        np.asarray(sizes, dtype=np.int64))
    if size_arr.size < 2 or size_arr.min() < 2 or size_arr.max() >= n_full:
        raise SchemaError(f"The 'sizes' parameter of convergence must hold at least two sizes "
                          f"in [2, {n_full - 1}] (fewer than all {n_full} trajectories); got "
                          f"{size_arr.tolist()}.")
    if int(n_nestings) < 1:
        raise SchemaError(f"The 'n_nestings' parameter of convergence must be >= 1; got "
                          f"{n_nestings!r}.")
    if target is not None and not (np.isfinite(target) and target > 0):
        raise SchemaError(f"The 'target' parameter of convergence must be > 0; got {target!r}.")
    value_of, deviation, name, metric = _quantity_function(ens, quantity, trpes_map,
                                                           dict(options))
    reference = value_of(ens)
    rng = np.random.default_rng(random_state)
    ids = ens.trajectories["traj"].to_numpy()
    traj_col = ens.snapshots["traj"].to_numpy()
    jobs = [(k, int(n)) for k in range(int(n_nestings)) for n in size_arr]
    orders = [rng.permutation(ids) for _ in range(int(n_nestings))]
    it: Any = jobs
    if progress:
        from tqdm.auto import tqdm

        it = tqdm(jobs, desc=f"convergence of the {name}", unit="subset")
    rows = []
    for k, n in it:
        sub = ens.select(np.isin(traj_col, orders[k][:n]))
        err = deviation(value_of(sub), reference)
        rows.append((n, k, err, err / math.sqrt(1.0 - n / n_full)))
    errors = pd.DataFrame(rows, columns=["n", "nesting", "error", "error_corrected"])
    grouped = errors.groupby("n")["error_corrected"]
    table = pd.DataFrame({"n": size_arr,
                          "error": grouped.apply(lambda v: float(np.sqrt(np.mean(v**2))))
                          .reindex(size_arr).to_numpy(),
                          "spread": grouped.std(ddof=1).reindex(size_arr).to_numpy()})
    ok = np.isfinite(table["error"].to_numpy()) & (table["error"].to_numpy() > 0)
    exponent = exponent_se = amplitude = a_sqrt = math.nan
    if ok.sum() >= 2:
        x = np.log(table["n"].to_numpy(np.float64)[ok])
        y = np.log(table["error"].to_numpy()[ok])
        coef, cov = np.polyfit(x, y, 1, cov=True) if ok.sum() > 2 else (np.polyfit(x, y, 1),
                                                                         np.full((2, 2), np.nan))
        exponent, amplitude = float(coef[0]), float(math.exp(coef[1]))
        exponent_se = float(math.sqrt(cov[0, 0])) if np.isfinite(cov[0, 0]) else math.nan
        a_sqrt = float(math.exp(np.mean(y + 0.5 * x)))  # fit with the exponent at -1/2
    error_full = a_sqrt / math.sqrt(n_full)
    n_needed = n_needed_fitted = None
    if target is not None and math.isfinite(amplitude):
        n_needed = (a_sqrt / target) ** 2
        n_needed_fitted = (target / amplitude) ** (1.0 / exponent) if exponent < 0 \
            else math.inf
    return ConvergenceResult(
        quantity=name, metric=metric, n_full=n_full, errors=errors, table=table,
        exponent=exponent, exponent_se=exponent_se, amplitude=amplitude,
        amplitude_sqrt=a_sqrt, error_full=float(error_full),
        target=None if target is None else float(target), n_needed=n_needed,
        n_needed_fitted=n_needed_fitted)
