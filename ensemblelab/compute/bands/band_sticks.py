"""Sticks indexed for band queries: a band's per-snapshot intensities without new sticks.

:func:`~ensemblelab.compute.spectroscopy.region_intensity` needs the sticks of the map's
probe; a new probe width or photon energy used to mean new sticks (one pass over the
ensemble, then a sort of all of them). :class:`BandSticks` makes the sticks once and
serves the band intensities of every map whose settings only move or re-broaden them:

* a new photon energy ``h nu'`` moves every stick by ``n (h nu' - h nu)`` (the stick
  weights do not change when the cross section does not depend on the kinetic energy,
  the squared Dyson norm): the energy window is moved the other way instead, and the
  part of a stick's line above zero kinetic energy (its open fraction) follows from the
  window's lower edge at 0 eV, as in ``region_intensity``;
* a new probe width or resolution changes the energy width ``s`` of a stick's line and,
  with the cross-correlation, the delay-window weights: both enter per query.

The sticks are made at the highest photon energy of ``photon_energies`` with a
threshold tail :data:`TAIL_WIDEN` times wider than the probe's (all channels within
``THRESHOLD_TAIL`` standard deviations of threshold for every probe up to that much
broader in energy); a query leaves out the channels a fresh model of the map's probe
leaves out (more than ``THRESHOLD_TAIL`` of its standard deviations below threshold),
so the sticks summed are the same. They are indexed by (time-grid index, energy)
(:mod:`._kernels_region`), so a query touches only the sticks inside the band.
``exclude=`` leaves trajectories out as in ``compute_trpes``.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import SchemaError
from ..spectroscopy.contributions import delay_window_weights
from ..spectroscopy.cross_sections import DysonNorm, resolve_cross_section
from ..spectroscopy.maps import excluded_ids
from ..spectroscopy.pulses import FWHM_TO_SIGMA, GaussianPulse
from ..spectroscopy.resolution import ProportionalResolution, resolution_from_params, stick_fwhm
from ..spectroscopy.sticks import THRESHOLD_TAIL, prepare_sticks
from ..spectroscopy.weights import resolve_weights
from ._kernels_region import index_sticks, region_sums

__all__ = ["BandSticks", "prepare_band_sticks", "TAIL_WIDEN"]

#: the sticks kept reach this many times the probe's threshold tail below threshold, so
#: that probes up to this much broader in energy (shorter in time) are served too
TAIL_WIDEN = 1.5


class BandSticks:
    """The sticks of an ensemble, indexed to give band intensities for many maps.

    Parameters
    ----------
    ens : Ensemble
        With ``energies``, ``cation_energies`` and ``dyson``.
    probe : GaussianPulse
        The probe (photon energy in eV, FWHM in fs, ``n_photons``).
    photon_energies : (float, float), optional
        Range of probe photon energies (eV) served; default the probe's only. With a
        cross section that depends on the kinetic energy only the probe's is served.
    pump, cross_section, weights, time_step, ionisation_shifts, absorbing, exclude
        As for :func:`~ensemblelab.compute.spectroscopy.compute_trpes`.
    progress : bool
        Progress bar while the sticks are made.

    Attributes
    ----------
    photon_energies : (float, float)
        The photon energies served (eV).
    n_sticks : int
        Sticks held.
    n_snapshots : int
        Snapshot rows of the ensemble (length of every result).
    """

    def __init__(self, ens: Ensemble, *, probe: GaussianPulse,
                 photon_energies: tuple[float, float] | None = None,
                 pump: GaussianPulse | None = None, cross_section: Any = "dyson",
                 weights: str = "auto", time_step: float | None = None,
                 ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
                 absorbing: str = "zero", exclude: npt.ArrayLike | None = None,
                 progress: bool = False) -> None:
        if not isinstance(ens, Ensemble):
            raise SchemaError(f"BandSticks needs an in-memory Ensemble; got "
                              f"{type(ens).__name__}. Hint: for a chunked store use "
                              "contributions(..., group_by=...).")
        if not isinstance(probe, GaussianPulse):
            raise SchemaError(f"probe must be a GaussianPulse; got {type(probe).__name__}.")
        shiftable = type(resolve_cross_section(cross_section)) is DysonNorm
        lo, hi = ((probe.photon_energy, probe.photon_energy)
                  if photon_energies is None or not shiftable
                  else (float(photon_energies[0]), float(photon_energies[1])))
        if not (0 < lo <= hi) or not np.isfinite(hi):
            raise SchemaError(f"photon_energies must be (low, high) with 0 < low <= high (eV); "
                              f"got {photon_energies!r}.")
        self.photon_energies = (min(lo, probe.photon_energy), max(hi, probe.photon_energy))
        # a shorter pulse of the same photon count: a TAIL_WIDEN times wider threshold tail
        self._build_probe = GaussianPulse(photon_energy=self.photon_energies[1],
                                          fwhm=probe.fwhm / TAIL_WIDEN,
                                          n_photons=probe.n_photons)
        self._pump = pump
        self._excluded = excluded_ids(exclude) if exclude is not None else np.zeros(0, int)
        with warnings.catch_warnings():  # the map warned already
            warnings.simplefilter("ignore")
            kind, _ = resolve_weights(ens, weights=weights, pump=pump)  # as compute_trpes
            model = prepare_sticks(ens, probe=self._build_probe, pump=pump,
                                   cross_section=cross_section, weights=kind,
                                   time_step=time_step, ionisation_shifts=ionisation_shifts,
                                   absorbing=absorbing, exclude=exclude, progress=progress)
        sticks = model.sticks
        assert sticks is not None and model.tbin is not None  # kept: in-memory ensemble
        order, self._starts = index_sticks(np.asarray(model.tbin), sticks.energy,
                                           model.n_time)
        self._energy = sticks.energy[order]
        self._weight = sticks.weight[order]
        snap = sticks.snapshot[order]
        self._snap = snap.astype(np.int32) if ens.n_snapshots < 2**31 - 1 else snap
        self._tfrac = None if model.tfrac is None else np.asarray(model.tfrac)[order]
        del order, sticks, snap
        # the model without sticks or moments: grid, alive weights and settings only
        self.model = replace(model, sticks=None, tbin=None, tfrac=None, comp=None,
                             comp_src=None, comp_weight=None, _cache={})
        self.n_sticks = int(self._energy.size)
        self.n_snapshots = int(ens.n_snapshots)

    # ------------------------------------------------------------------ queries
    def serves(self, trpes_map: TRPESMap) -> str:
        """Why this map's band intensities cannot come from these sticks ("" if they can).

        The map must come from the same ensemble, exclusions, weights, cross section,
        time step, ionisation shifts and absorbing mode, with a probe of the same photon
        count, a photon energy in :attr:`photon_energies` and an energy width up to the
        one the sticks' threshold tail covers.
        """
        p = trpes_map.params
        info = self.model.info
        try:
            probe = GaussianPulse(**p["probe"])
        except (KeyError, TypeError):
            return "the map's params lack the probe"
        lo, hi = self.photon_energies
        if probe.n_photons != self._build_probe.n_photons:
            return "another photon count"
        if not lo <= probe.photon_energy <= hi:
            return f"photon energy {probe.photon_energy} eV outside {lo}-{hi} eV"
        if probe.effective_spectral_fwhm > self._build_probe.effective_spectral_fwhm * (
                1 + 1e-12):
            return "a probe broader in energy than the sticks' threshold tail covers"
        checks = {"weights": p.get("weights") == info.get("weights"),
                  "cross section": p.get("cross_section") == info.get("cross_section"),
                  "time step": p.get("time_step") == self.model.time_step,
                  "ionisation shifts": p.get("ionisation_shifts") == info.get(
                      "ionisation_shifts"),
                  "absorbing mode": p.get("absorbing", "zero") == info.get("absorbing"),
                  "exclusions": sorted(int(i) for i in p.get("excluded") or []) == sorted(
                      int(i) for i in self._excluded)}
        if "doorway" in str(info.get("weights")):  # the weights depend on the pump
            pump = self._pump
            checks["pump"] = p.get("pump") == (None if pump is None else {
                "photon_energy": pump.photon_energy, "fwhm": pump.fwhm,
                "n_photons": pump.n_photons})
        bad = [k for k, ok in checks.items() if not ok]
        return f"another {', '.join(bad)}" if bad else ""

    def region_intensity(self, trpes_map: TRPESMap, *, energy_range: Sequence[float],
                         delay_range: Sequence[float], backend: str = "auto") -> np.ndarray:
        """Band intensity of every snapshot row, as ``region_intensity`` gives it.

        Parameters
        ----------
        trpes_map : TRPESMap
            A map of the ensemble the sticks were made from (see :meth:`serves`).
        energy_range : (float, float)
            Kinetic-energy window in eV.
        delay_range : (float, float)
            Delay window in fs.
        backend : {"auto", "numba", "numpy"}
            The compiled pass (default when numba is installed) or its numpy twin.

        Returns
        -------
        ndarray of float, shape (n_snapshots,)
            Band intensity per snapshot row in fs (eV^-1 eV fs), all >= 0.
        """
        why = self.serves(trpes_map)
        if why:
            raise SchemaError(f"these band sticks cannot serve this map: {why}. Hint: make "
                              "new ones (prepare_band_sticks) with the map's settings.")
        e1, e2 = (float(x) for x in energy_range)
        t1, t2 = (float(x) for x in delay_range)
        if not (e2 > e1 and t2 > t1):
            raise SchemaError(f"energy_range and delay_range must be (low, high) with low < "
                              f"high; got {energy_range!r}, {delay_range!r}.")
        p = trpes_map.params
        probe = GaussianPulse(**p["probe"])
        tw = delay_window_weights(self.model, p, (t1, t2))
        shift = probe.total_energy - self._build_probe.total_energy  # map minus sticks
        res = resolution_from_params(p.get("resolution", 0.0))
        sigma: Any = float(p["fwhm_energy"]) * FWHM_TO_SIGMA
        if isinstance(res, ProportionalResolution):  # per-stick width, from its energy
            def sigma(x: np.ndarray) -> np.ndarray:
                return np.asarray(stick_fwhm(probe, res, x)) * FWHM_TO_SIGMA
        # the channels a fresh model of this probe holds: above -THRESHOLD_TAIL sigma
        floor = -THRESHOLD_TAIL * probe.effective_spectral_fwhm * FWHM_TO_SIGMA - shift
        return region_sums(self._energy, self._weight, self._snap, self._tfrac, self._starts,
                           tw, lo=max(e1, 0.0) - shift, hi=e2 - shift, sigma=sigma,
                           n_snapshots=self.n_snapshots, shift=shift, floor=floor,
                           backend=backend)


def prepare_band_sticks(ens: Ensemble, *, probe: GaussianPulse, **kwargs: Any) -> BandSticks:
    """Make and index an ensemble's sticks for band queries (see :class:`BandSticks`).

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.compute.spectroscopy import compute_trpes, region_intensity
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> ens = make_toy_ensemble(12, seed=2)
    >>> probe = GaussianPulse(photon_energy=5.0, fwhm=30.0)
    >>> sticks = prepare_band_sticks(ens, probe=probe, photon_energies=(4.8, 5.2))
    >>> m = compute_trpes(ens, probe=GaussianPulse(photon_energy=4.9, fwhm=40.0),
    ...                   kinetic_energies=np.linspace(0, 2, 41), delays=[0.0, 100.0],
    ...                   progress=False)
    >>> x = sticks.region_intensity(m, energy_range=(0.2, 1.5), delay_range=(0, 100))
    >>> ref = region_intensity(ens, m, energy_range=(0.2, 1.5), delay_range=(0, 100))
    >>> bool(np.allclose(x, ref, rtol=1e-9, atol=1e-12 * ref.max()))
    True
    """
    return BandSticks(ens, probe=probe, **kwargs)
