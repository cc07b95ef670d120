"""Decomposition fractions of a map (neutral state, cation channel, pair, diabatic) with
trajectory-bootstrap intervals, over a region or per delay.

Every stick of the map's model (one per snapshot and open ionisation channel) is given
to a component (its neutral state, its cation state, the pair, or -- split by the
squared diabatic characters -- the diabatic pairs). Its contribution to a window is its
weight times the energy-window integral of its Gaussian (error functions) times the
delay weight of its grid time (:func:`~ensemblelab.compute.spectroscopy.contributions.
delay_window_weights` over a region, the map's time matrix per delay), the same terms
:func:`~ensemblelab.compute.spectroscopy.region_intensity` sums. The sums per
(trajectory, component) are the partials a bootstrap resamples: trajectories are drawn
whole with their weights (:mod:`._kernels_resample`). The normaliser (alive weight per
grid time) is held at the full ensemble's, which is exact for fractions while every
trajectory is alive over the window.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy.special import ndtr

from ...errors import SchemaError
from ._kernels_resample import percentile_interval, ratio_replicates
from .shares import ZERO_TOL, bootstrap_counts_for, check_interval_args

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble
    from ...data.spectrum import TRPESMap
    from ..spectroscopy.model import TRPESModel

__all__ = ["decomposition_fractions", "DECOMPOSITIONS"]

#: the decompositions :func:`decomposition_fractions` splits a map into
DECOMPOSITIONS = ("neutral", "cation", "pair", "diabatic")

_FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))


def _components(ens: Ensemble, model: TRPESModel, decompose: str
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """(stick index, component, weight) of every (expanded) stick, and the labels."""
    from ..spectroscopy._checks import component_labels

    sticks = model.sticks
    assert sticks is not None
    labels = component_labels(ens, decompose)
    idx = np.arange(sticks.n_sticks)
    if decompose == "neutral":
        return idx, sticks.state, sticks.weight, labels
    if decompose == "cation":
        return idx, sticks.channel, sticks.weight, labels
    if decompose == "pair":
        return idx, sticks.state * len(ens.cation_labels) + sticks.channel, sticks.weight, \
            labels
    if model.decompose != "diabatic" or model.comp is None:
        raise SchemaError(
            "decomposition_fractions(decompose='diabatic') needs the map's model prepared "
            "with the diabatic decomposition. Hint: pass model= from compute_trpes(..., "
            "decompose='diabatic', return_model=True).")
    src = idx if model.comp_src is None else model.comp_src
    w = sticks.weight if model.comp_weight is None else model.comp_weight
    return src, model.comp, w, list(model.labels)


def decomposition_fractions(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    decompose: str = "neutral",
    energy_range: Sequence[float] | None = None,
    delay_range: Sequence[float] | None = None,
    per_delay: bool = False,
    model: TRPESModel | None = None,
    interval: str | None = "bootstrap",
    ci: float = 0.95,
    n_boot: int = 1000,
    random_state: int | np.random.Generator | None = 0,
    resampling: str = "multinomial",
) -> pd.DataFrame:
    """Fractions of a map's signal made by each component, with bootstrap intervals.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    trpes_map : TRPESMap
        From :func:`~ensemblelab.compute.spectroscopy.compute_trpes`.
    decompose : {"neutral", "cation", "pair", "diabatic"}
        Components: active neutral state, cation state (ionisation channel), the
        (neutral, cation) pair, or the diabatic pairs (needs `model` prepared with
        ``decompose="diabatic"``).
    energy_range : (float, float), optional
        Kinetic-energy window in eV (default: all energies >= 0).
    delay_range : (float, float), optional
        Delay window in fs (default: the map's delays). Ignored with `per_delay`.
    per_delay : bool
        Fractions at every delay of the map (over `energy_range`) instead of over the
        region.
    model : TRPESModel, optional
        The map's model (``compute_trpes(..., return_model=True)``); rebuilt from the
        map's params when missing.
    interval, ci, n_boot, random_state, resampling
        Trajectory bootstrap (see :func:`~.shares.grouped_shares`); ``interval=None``
        gives NaN bounds.

    Returns
    -------
    DataFrame
        One row per component (per delay first with `per_delay`): [``delay`` (fs),]
        ``component`` (index), ``label``, ``fraction`` (sums to 1 over the components
        where there is signal), ``lower``, ``upper``, ``includes_zero``, ``intensity``
        (the component's integral; fs over a region, eV^-1 eV per delay). ``attrs``:
        ``decompose``, ``energy_range``, ``delay_range``, ``interval``, ``ci``,
        ``n_boot``, ``n_trajectories``.

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(20, seed=1, t_max=100.0, dt=2.0)
    >>> m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
    ...                   kinetic_energies=np.linspace(0, 2, 81),
    ...                   delays=np.arange(0, 101, 10.0), progress=False)
    >>> f = decomposition_fractions(ens, m, delay_range=(0, 100), n_boot=200)
    >>> round(float(f["fraction"].sum()), 12), sorted(f["label"])
    (1.0, ['S0', 'S1', 'S2'])
    """
    from ..spectroscopy.contributions import delay_window_weights, model_for_map

    if decompose not in DECOMPOSITIONS:
        raise SchemaError(f"The 'decompose' parameter of decomposition_fractions must be one "
                          f"of {DECOMPOSITIONS}; got {decompose!r}.")
    check_interval_args("decomposition_fractions", interval=interval, ci=ci, n_boot=n_boot,
                        resampling=resampling)
    p = trpes_map.params
    delays = np.asarray(trpes_map.delays, dtype=np.float64)
    e1, e2 = (0.0, np.inf) if energy_range is None else (float(x) for x in energy_range)
    t1, t2 = ((float(delays[0]), float(delays[-1])) if delay_range is None
              else (float(x) for x in delay_range))
    if not (e2 > e1 and (per_delay or t2 > t1)):
        raise SchemaError(f"energy_range and delay_range must be (low, high) with low < high; "
                          f"got {energy_range!r}, {delay_range!r}.")
    if model is None:
        model = model_for_map(ens, trpes_map)
    if model.sticks is None or model.tbin is None:
        raise SchemaError("decomposition_fractions needs a model holding the sticks (made "
                          "from an in-memory ensemble).")
    src, comp, w, labels = _components(ens, model, decompose)
    sticks = model.sticks
    s_e = float(p["fwhm_energy"]) * _FWHM_TO_SIGMA
    x = sticks.energy[src]
    lo = max(e1, 0.0)
    ew = ndtr((e2 - x) / s_e) - ndtr((lo - x) / s_e) if np.isfinite(e2) else ndtr(
        (x - lo) / s_e)
    base = w * ew
    u_codes, u_keys = pd.factorize(sticks.traj[src], sort=True)
    n_u, n_c, n_t = len(u_keys), len(labels), model.n_time
    tb = model.tbin[src]
    tf = None if model.tfrac is None else model.tfrac[src]
    # per (trajectory, component, grid time) sums; interpolation fractions split a stick
    # between grid times tb and tb + 1
    key = (u_codes * n_c + comp) * n_t
    if tf is None:
        hist = np.bincount(key + tb, base, minlength=n_u * n_c * n_t)
    else:
        hist = np.bincount(key + tb, base * (1.0 - tf), minlength=n_u * n_c * n_t)
        hist += np.bincount(key + np.minimum(tb + 1, n_t - 1), base * tf,
                            minlength=n_u * n_c * n_t)
    hist = hist.reshape(n_u * n_c, n_t)
    if per_delay:
        tw = _delay_matrix(model, p, delays)  # (n_delays, n_time)
        part = (hist @ tw.T).reshape(n_u, n_c, delays.size)
        part = np.transpose(part, (0, 2, 1)).reshape(n_u, delays.size * n_c)
        denom = np.repeat(part.reshape(n_u, delays.size, n_c).sum(axis=2), n_c, axis=1)
    else:
        tw1 = delay_window_weights(model, p, (t1, t2))
        part = (hist @ tw1).reshape(n_u, n_c)
        denom = part.sum(axis=1)
    value = part.sum(axis=0)
    total = denom.sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(total > 0, value / np.where(total > 0, total, 1.0), np.nan)
    lo_b = np.full(frac.shape, np.nan)
    hi_b = np.full(frac.shape, np.nan)
    if interval == "bootstrap":
        counts = bootstrap_counts_for(n_u, n_boot, random_state, resampling=resampling)
        reps = ratio_replicates(part, denom, np.asarray(counts))
        lo_b, hi_b = percentile_interval(reps, float(ci))
    cols: dict[str, Any] = {}
    if per_delay:
        cols["delay"] = np.repeat(delays, n_c)
    cols.update(component=np.tile(np.arange(n_c), delays.size if per_delay else 1),
                label=np.tile(np.asarray(labels, dtype=object), delays.size if per_delay else 1),
                fraction=frac, lower=lo_b, upper=hi_b, includes_zero=~(lo_b > ZERO_TOL),
                intensity=value)
    out = pd.DataFrame(cols)
    out.attrs.update(decompose=decompose, energy_range=(e1, e2),
                     delay_range=None if per_delay else (t1, t2), interval=interval,
                     ci=float(ci), n_boot=int(n_boot) if interval == "bootstrap" else 0,
                     n_trajectories=int(n_u), resampling=resampling)
    return out


def _delay_matrix(model: TRPESModel, p: dict[str, Any], delays: np.ndarray) -> np.ndarray:
    """Map time matrix times the normaliser, (n_delays, n_time) (as the map was made)."""
    sigma = p.get("sigma_cc") if p.get("convolve", True) else None
    cmat = model.time_weights(delays, sigma=sigma or None)
    norm: np.ndarray
    if p.get("normalise", "alive") == "initial":
        norm = np.full(model.n_time, 1.0 / model.total_weight if model.total_weight else 0.0)
    else:
        alive = np.asarray(model.alive, dtype=np.float64)
        norm = np.where(alive > 0, 1.0 / np.where(alive > 0, alive, 1.0), 0.0)
    return cmat * norm[None, :]
