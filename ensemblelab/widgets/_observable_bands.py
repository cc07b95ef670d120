"""Bands of the absorption and scattering maps for the explorer (no widgets here).

The photoelectron map finds a band's contributors with ``analyse_band``; the other two
maps use :func:`ensemblelab.compute.observables.observable_contributions`, whose
per-snapshot terms add up exactly to the band value. Those terms are signed (a
scattering difference or a bleach is negative), so a band is described along its own
sign: the listed snapshots are those that push the band the way it goes (for a negative
band, the snapshots with negative terms), and shares are fractions of the net band value.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..compute.bands import BandAnalysis, SnapshotGroups
from ..data.ensemble import Ensemble

__all__ = ["OBSERVABLES", "ObservableSpec", "ObservableBand", "default_axis", "compute_map",
           "map_values", "observable_band"]


@dataclass(frozen=True)
class ObservableSpec:
    """How one observable's map is drawn: axis name and unit, and the colour label."""

    name: str
    axis_label: str
    axis_unit: str
    color_label: str


#: the observables of the switch (the photoelectron map is the map view itself)
OBSERVABLES = {
    "photoelectron": ObservableSpec("photoelectron", "kinetic energy / eV", "eV",
                                    "intensity"),
    "absorption": ObservableSpec("absorption", "probe photon energy / eV", "eV",
                                 "ΔA / Å² per molecule"),
    "scattering": ObservableSpec("scattering", "q / Å⁻¹", "Å⁻¹", "ΔI/I / %"),
}


def default_axis(observable: str, ens: Ensemble) -> np.ndarray:
    """The map's axis grid: q in 1/Angstrom, or probe photon energies in eV.

    Scattering: 0.5-8 1/Angstrom (151 points), the range of common time-resolved
    diffraction set-ups (common practice). Absorption: 0.2 eV up to the largest gap
    between neutral states in the ensemble plus 1 eV (finite snapshots), 161 points.
    """
    if observable == "scattering":
        return np.linspace(0.5, 8.0, 151)
    if observable == "absorption":
        e = np.asarray(ens.energies, dtype=float)
        gaps = np.nanmax(e, axis=1) - np.nanmin(e, axis=1) if e.size else np.zeros(0)
        gaps = gaps[np.isfinite(gaps)]
        top = float(gaps.max()) + 1.0 if gaps.size else 8.0
        return np.linspace(0.2, max(top, 1.0), 161)
    raise ValueError(f"no default axis for observable {observable!r}.")


def compute_map(observable: str, ens: Ensemble, *, probe: Any, pump: Any, delays: np.ndarray,
                axis: np.ndarray, scattering_kind: str = "xray", weights: str | None = None
                ) -> Any:
    """The absorption or scattering map of `ens` (no bootstrap: the explorer stays quick).

    Trajectory weights as the map view's photoelectron map: `weights` when given, else
    ``"auto"`` (from ``metadata["sampling"]``), ``"uniform"`` without a pump.
    """
    from ..compute.observables import compute_scattering, compute_transient_absorption

    if weights is None:
        weights = "auto" if pump is not None else "uniform"
    if observable == "scattering":
        return compute_scattering(ens, kind=scattering_kind, q=axis, delays=delays, pump=pump,
                                  probe=probe, weights=weights)
    if observable == "absorption":
        if ens.transition_strengths is None:
            raise ValueError(
                "this ensemble has no transition_strengths, which the absorption map needs. "
                "Hint: load data that carries them (the 'transition_strengths' key of the "
                "open formats), or for the invented demo add them with "
                "ensemblelab.demo.strengths.with_demo_transition_strengths(ens).")
        return compute_transient_absorption(ens, probe=probe, pump=pump, photon_energies=axis,
                                            delays=delays, weights=weights)
    raise ValueError(f"observable must be 'absorption' or 'scattering'; got {observable!r}.")


def map_values(m: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Axis (n_axis,), delays (n_delays,) and the drawn signal (n_delays, n_axis).

    The scattering map draws ``percent_difference``, the absorption map ``intensity``.
    """
    if hasattr(m, "q"):
        return (np.asarray(m.q, float), np.asarray(m.delays, float),
                np.asarray(m.percent_difference, float))
    return (np.asarray(m.photon_energies, float), np.asarray(m.delays, float),
            np.asarray(m.intensity, float))


@dataclass(frozen=True)
class ObservableBand:
    """A band of an absorption or scattering map.

    Attributes
    ----------
    analysis : BandAnalysis
        Terms along the band's sign (``sign * term``, one per snapshot row).
    total : float
        The band value: the map's signal summed over the region's cells (signed).
    sign : int
        +1 or -1, the sign of `total` (+1 for an empty band).
    where : str
        The band in words, with units.
    """

    analysis: BandAnalysis
    total: float
    sign: int
    where: str


def observable_band(ens: Ensemble, groups: SnapshotGroups, m: Any, observable: str, *,
                    axis_range: tuple[float, float], delay_range: tuple[float, float]
                    ) -> ObservableBand:
    """What makes a band of an absorption or scattering map.

    Parameters
    ----------
    ens : Ensemble
        The ensemble the map was computed from (the explorer's current one).
    groups : SnapshotGroups
        Group keys of the rows of `ens`, or of a larger ensemble holding them (the
        explorer's whole ensemble; rows not in `ens` get no term).
    m : ScatteringMap or AbsorptionMap
    observable : {"absorption", "scattering"}
    axis_range : (float, float)
        Photon energies (eV) or q (1/Angstrom).
    delay_range : (float, float)
        Delays in fs.

    Returns
    -------
    ObservableBand
    """
    from ..compute.observables import observable_contributions

    a_rng = (float(min(axis_range)), float(max(axis_range)))
    d_rng = (float(min(delay_range)), float(max(delay_range)))
    terms = observable_contributions(ens, m, axis_range=a_rng, delay_range=d_rng)
    # the groups may cover more rows than `ens` (the explorer's whole ensemble, with
    # excluded trajectories): those rows get no band term
    at = pd.Index(groups.snapshot).get_indexer(terms["snapshot"].to_numpy())
    if np.any(at < 0):
        raise ValueError("the snapshot groups do not belong to the ensemble of the map.")
    total = float(terms.attrs["total"])
    sign = -1 if total < 0 else 1
    values = np.zeros(len(groups.snapshot))
    values[at] = sign * terms["value"].to_numpy(float)
    analysis = BandAnalysis.from_intensity(groups, values, energy_range=a_rng,
                                           delay_range=d_rng)
    against = float(np.abs(np.minimum(values, 0.0)).sum())
    spec = OBSERVABLES[observable]
    unit = "%·cells" if observable == "scattering" else "Å²·cells"
    where = (f"{observable} band {a_rng[0]:.2f}–{a_rng[1]:.2f} {spec.axis_unit}, "
             f"{d_rng[0]:.0f}–{d_rng[1]:.0f} fs (net {total:+.3g} {unit}; listed: the "
             f"snapshots that make it {'negative' if sign < 0 else 'positive'})")
    if against > 0.01 * abs(total):  # opposite terms cancel in part
        where += (f"; terms of the other sign ({against:.3g}) cancel in part, so shares of "
                  "the net value can exceed 100 %")
    return ObservableBand(analysis=analysis, total=total, sign=sign, where=where)
