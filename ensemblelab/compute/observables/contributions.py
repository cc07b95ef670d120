"""Which snapshots make a band of a scattering or transient-absorption map.

The region value is the sum of the map's main signal over the grid cells inside
``axis_range x delay_range`` (``percent_difference`` of a :class:`ScatteringMap`,
``intensity`` of an :class:`AbsorptionMap`). Both maps are linear in per-snapshot terms
(time grid deposit, division by the alive weight, cross-correlation), so the region
value splits exactly into one term per snapshot (for transient absorption plus one
bleach term per trajectory, booked on its first snapshot); the terms add up to the region
value to rounding. In-memory ensembles; the map must come from the same ensemble.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from ...data.ensemble import Ensemble
from ...data.observables import AbsorptionMap, ScatteringMap
from ...errors import SchemaError
from ..engine import as_source
from ..spectroscopy.maps import time_grid
from ..spectroscopy.weights import trajectory_weights
from ._kernels_scattering import molecular_intensity
from ._timegrid import delay_matrix, deposit_matrix, first_rows
from .absorption import CROSS_SECTION_CONSTANT, snapshot_spectra, strength_rows
from .form_factors import form_factor_table

__all__ = ["observable_contributions"]


def _mask(values: np.ndarray, rng: Sequence[float], name: str) -> np.ndarray:
    if len(rng) != 2 or not rng[0] <= rng[1]:
        raise SchemaError(f"The {name!r} parameter must be (low, high) with low <= high. Got "
                          f"{rng!r} instead.")
    sel = (values >= rng[0]) & (values <= rng[1])
    if not sel.any():
        raise SchemaError(f"{name} {tuple(rng)} holds no grid point of the map.")
    return sel


def _usable(ens: Ensemble, m: Any) -> np.ndarray:
    """Snapshots the map used (finite geometry; for absorption the strengths it needs)."""
    ok = np.all(np.isfinite(ens.geometries.reshape(ens.n_snapshots, -1)), axis=1)
    if isinstance(m, AbsorptionMap):
        if ens.transition_strengths is None:
            raise SchemaError("the ensemble has no transition_strengths; the map cannot be "
                              "from it.")
        act = ens.snapshots["active"].to_numpy()
        f_row = strength_rows(np.asarray(ens.transition_strengths, dtype=float), act)
        needed = np.arange(ens.n_states)[None, :] != act[:, None]
        ok = ~np.any(np.isnan(f_row) & needed, axis=1) & np.all(np.isfinite(ens.energies),
                                                                axis=1)
    return ok


def _time_weight(ens: Ensemble, m: Any, dsel: np.ndarray, pump: Any
                 ) -> tuple[np.ndarray, np.ndarray, dict[str, Any]]:
    """Per-snapshot weight in the delay window: sum_d C[d, t] M[t, s] / A(t) (t >= 0)."""
    params = m.params
    grid = time_grid(as_source(ens), params.get("time_step"))
    w_traj, _ = trajectory_weights(ens, weights=_weights_of(params), pump=pump)
    w = np.where(_usable(ens, m), w_traj[ens.traj_index], 0.0)
    time = ens.snapshots["time"].to_numpy()
    mat = deposit_matrix(time, np.zeros(ens.n_snapshots, dtype=np.int64), w, grid, 1)
    alive = np.asarray(mat.sum(axis=1)).ravel()
    inv = np.where(alive > 0, 1.0 / np.where(alive > 0, alive, 1.0), 0.0)
    times = grid["start"] + grid["dt"] * np.arange(int(grid["n_time"]))
    inv[times < 0] = 0.0
    cmat = delay_matrix(m.delays, grid, params.get("sigma_cc"))
    row = cmat[dsel].sum(axis=0) * inv  # (n_time,)
    return np.asarray(mat.T @ row).ravel(), w_traj, {"cmat": cmat, "times": times}


def _weights_of(params: dict[str, Any]) -> str:
    word = str(params.get("weights", "ensemble"))
    if word.startswith("column:"):
        return word[len("column:"):]
    return word  # "doorway", "ensemble" or "uniform": as resolved when the map was made


def _pump_of(params: dict[str, Any]) -> Any:
    from ..spectroscopy.pulses import GaussianPulse

    p = params.get("pump")
    return None if not p else GaussianPulse(**p)


def observable_contributions(ens: Ensemble, m: ScatteringMap | AbsorptionMap, *,
                             axis_range: Sequence[float], delay_range: Sequence[float],
                             group_by: str | Sequence[Any] = "snapshot") -> pd.DataFrame:
    """Exact per-snapshot (or per-group) terms of a band of a scattering or absorption map.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    m : ScatteringMap or AbsorptionMap
    axis_range : (float, float)
        q range (1/Angstrom) or photon-energy range (eV), inclusive.
    delay_range : (float, float)
        Delay range in fs, inclusive.
    group_by : "snapshot", "traj", "active", a snapshot column, or labels (n_snapshots,)

    Returns
    -------
    DataFrame
        For ``"snapshot"``: ``snapshot``, ``traj``, ``time``, ``active``, ``value`` (the
        term, in the map's units summed over the region's cells) and ``share``
        (``value / total``); otherwise one row per group with ``value`` and ``share``.
        ``attrs["total"]`` is the region value (the sum of the terms). Transient
        absorption adds ``bleach`` (the trajectory's bleach term on its first snapshot)
        and ``excited`` (SE + ESA), with ``value = bleach + excited``.
    """
    if not isinstance(ens, Ensemble):
        raise SchemaError("observable_contributions needs the in-memory Ensemble.")
    if isinstance(m, ScatteringMap):
        axis = m.q
    elif isinstance(m, AbsorptionMap):
        axis = m.photon_energies
    else:
        raise SchemaError(f"expected a ScatteringMap or AbsorptionMap; got {type(m).__name__}.")
    asel = _mask(axis, axis_range, "axis_range")
    dsel = _mask(m.delays, delay_range, "delay_range")
    pump = _pump_of(m.params)
    tw, w_traj, extra = _time_weight(ens, m, dsel, pump)
    fraction = float(m.params.get("excitation_fraction", 1.0))
    snaps = ens.snapshots
    frame = pd.DataFrame({"snapshot": snaps["snapshot"].to_numpy(),
                          "traj": snaps["traj"].to_numpy(),
                          "time": snaps["time"].to_numpy(),
                          "active": snaps["active"].to_numpy()})
    live = np.flatnonzero(tw != 0)
    first = first_rows(snaps["traj"].to_numpy())
    if isinstance(m, ScatteringMap):
        q = m.q[asel]
        _, index, table = form_factor_table(ens.symbols, q, kind=m.kind)
        ref_w = w_traj  # first snapshots carry the trajectory weights
        ref_mol = (ref_w @ molecular_intensity(ens.geometries[first], index, table, q)
                   ) / ref_w.sum()
        ref = m.reference[asel]
        values = np.zeros(ens.n_snapshots)
        if live.size:
            imol = molecular_intensity(ens.geometries[live], index, table, q)
            values[live] = 100.0 * fraction * tw[live] * ((imol - ref_mol) / ref).sum(axis=1)
        frame["value"] = values
    else:
        e_grid = m.photon_energies[asel]
        fwhm = float(m.params["fwhm_energy"])
        excited = np.zeros(ens.n_snapshots)
        if live.size:
            assert ens.transition_strengths is not None
            act = snaps["active"].to_numpy()[live]
            f_row = np.nan_to_num(strength_rows(np.asarray(ens.transition_strengths[live]), act))
            se, esa = snapshot_spectra(np.asarray(ens.energies[live]), act, f_row, e_grid, fwhm)
            excited[live] = fraction * tw[live] * (se + esa).sum(axis=1)
        step = (extra["cmat"] @ (extra["times"] >= 0).astype(float))[dsel].sum()
        gsb_region = m.components["GSB"][np.ix_(dsel, asel)].sum()
        bleach = np.zeros(ens.n_snapshots)
        # the bleach splits over trajectories as their share of the initial absorption
        a0_traj = _initial_absorption(ens, e_grid, fwhm) * w_traj
        if step and a0_traj.sum():
            bleach[first] = gsb_region * a0_traj / a0_traj.sum()
        frame["bleach"] = bleach
        frame["excited"] = excited
        frame["value"] = bleach + excited
    total = float(frame["value"].sum())
    frame["share"] = frame["value"] / total if total else np.nan
    if isinstance(group_by, str) and group_by == "snapshot":
        out = frame
    else:
        key: np.ndarray
        if isinstance(group_by, str):
            if group_by not in snaps.columns:
                raise SchemaError(f"group_by names no snapshot column: {group_by!r}.")
            key = np.asarray(snaps[group_by].to_numpy())
        else:
            key = np.asarray(group_by)
            if key.shape != (ens.n_snapshots,):
                raise SchemaError("group_by labels must have one entry per snapshot.")
        cols = [c for c in ("value", "bleach", "excited") if c in frame]
        out = frame[cols].groupby(key).sum().rename_axis("group").reset_index()
        out["share"] = out["value"] / total if total else np.nan
    out.attrs["total"] = total
    return out


def _initial_absorption(ens: Ensemble, e_grid: np.ndarray, fwhm: float) -> np.ndarray:
    """Each trajectory's initial S0 absorption summed over the region's energies."""
    from ..spectroscopy.pulses import gaussian

    first = first_rows(ens.snapshots["traj"].to_numpy())
    if ens.excitation_energies is not None and ens.oscillator_strengths is not None:
        gaps, fs = np.asarray(ens.excitation_energies), np.asarray(ens.oscillator_strengths)
    else:
        assert ens.transition_strengths is not None
        gaps = ens.energies[first] - ens.energies[first, :1]
        f0 = np.asarray(ens.transition_strengths[first])
        fs = np.where(np.isnan(f0[:, 0, :]), f0[:, :, 0], f0[:, 0, :])
    fs, gaps = np.nan_to_num(fs), np.nan_to_num(gaps)
    out = np.zeros(fs.shape[0])
    for j in range(1, fs.shape[1]):
        out += CROSS_SECTION_CONSTANT * fs[:, j] * gaussian(e_grid[None, :], gaps[:, j, None],
                                                            fwhm).sum(axis=1)
    return out
