"""Live maps of the map view: redraws from deposited sticks when only a pulse knob moves.

:class:`LiveMaps` holds a :class:`~ensemblelab.compute.spectroscopy.cache.StickCache`
of the shown ensemble. A new probe width, instrument resolution or probe photon energy
(within :data:`PHOTON_ENERGY_SPAN` of the photon energy the cache was made for, with
the squared-Dyson-norm cross section) is a re-broadening of the cached moment
histograms: no pass over the ensemble. So is a new pump, unless the trajectory weights
depend on it (doorway weights). New exclusions, weights, cross section or photon count
make a new cache (one pass). A decomposition, or settings the cache does
not take, use :func:`~ensemblelab.compute.spectroscopy.compute_trpes` as before.

The band analysis needs the sticks themselves. A map from the cache comes with a
source of them (:meth:`LiveMaps.band_sticks`, kept by the selection model): indexed
:class:`~ensemblelab.compute.bands.BandSticks` made on the first brush after the cache
changed (one pass) and reused for every later map of the cache, so a new probe width,
resolution or photon energy with a band selected redraws the band from the same
sticks (moved by the photon-energy difference, re-broadened). Maps the cache does not
make (decompositions) use :meth:`.SelectionModel.stick_model` as before.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from ..data.ensemble import Ensemble
from ..errors import EnsembleWarning

__all__ = ["LiveMaps", "PHOTON_ENERGY_SPAN", "CACHE_KWARGS", "default_energies",
           "default_delays"]

#: photon energies (eV) served by a cache without a new pass: its build energy +- this
PHOTON_ENERGY_SPAN = 0.5
#: keyword arguments of compute_trpes a cache takes (``normalise`` goes to each map)
CACHE_KWARGS = ("cross_section", "weights", "time_step", "ionisation_shifts", "absorbing")


def default_energies(photon_energy: float, n_photons: int) -> np.ndarray:
    """The map view's default kinetic-energy grid (eV), shape (241,): 0 to n h nu."""
    return np.linspace(0.0, float(photon_energy) * int(n_photons), 241)


def default_delays(ens: Ensemble, fwhm_cc: float) -> np.ndarray:
    """The map view's default delay grid (fs), shape (161,): from 1.5 cross-correlation
    FWHM (`fwhm_cc`, fs) before the first snapshot to the last one."""
    t = ens.snapshots["time"].to_numpy()
    t = t[np.isfinite(t)]
    lo = float(t.min()) - 1.5 * fwhm_cc if t.size else -50.0
    hi = float(t.max()) if t.size else 500.0
    return np.linspace(lo, hi, 161)


def _frozen(kwargs: dict[str, Any]) -> tuple[tuple[str, str], ...]:
    """A comparable key of keyword arguments (by their repr: lists, arrays, models)."""
    return tuple(sorted((k, repr(v)) for k, v in kwargs.items()))


class LiveMaps:
    """Maps of one view, redrawn from a stick cache where the settings allow.

    Attributes
    ----------
    cache : StickCache or None
        The current cache (None before the first cached map).
    n_caches : int
        Caches made (each one pass over the ensemble; a cache's own rebuilds, e.g. for
        a photon energy outside its range, are in ``cache.rebuilds``).
    n_full : int
        Maps computed by a full ``compute_trpes`` call (decompositions).
    band : BandSticks or None
        The sticks of the band analysis (made on the first band query of a cache).
    n_band_builds : int
        Band sticks made (each one pass over the ensemble).
    """

    def __init__(self) -> None:
        self.cache: Any = None
        self.n_caches = 0
        self.n_full = 0
        self._key: Any = None
        self._sticks_key: Any = None
        self._ground: tuple[Any, float] | None = None
        self.band: Any = None
        self.n_band_builds = 0
        self._band_key: Any = None
        self._band_for: Any = None
        self._band_kw: dict[str, Any] = {}

    def compute(self, model: Any, *, probe: Any, pump: Any, kinetic_energies: np.ndarray,
                delays: np.ndarray, resolution: float, convolve: bool, decompose: str | None,
                kwargs: dict[str, Any]) -> tuple[Any, Any]:
        """The map of ``model.ens`` without ``model.excluded`` for these settings.

        Parameters
        ----------
        model : SelectionModel
            The shared selection state (ensemble, exclusions, the stick model held).
        probe, pump : GaussianPulse, GaussianPulse or None
            The pulses (photon energies in eV, FWHM in fs).
        kinetic_energies, delays : ndarray, shape (n_energies,), (n_delays,)
            The map's grids (eV, fs).
        resolution : float
            Instrument resolution FWHM (eV).
        convolve : bool
            Convolve with the cross-correlation.
        decompose : str or None
            The ``decompose`` argument of ``compute_trpes``.
        kwargs : dict
            Further keyword arguments of ``compute_trpes`` (weights, cross section, ...).

        Returns
        -------
        (TRPESMap, TRPESModel or None)
            The map, and the stick model to remember for it (None: built on demand).
        """
        from ..compute.spectroscopy import compute_trpes

        ens = model.ens
        excluded = tuple(model.excluded)
        build_kw = {k: v for k, v in kwargs.items() if k != "normalise"}
        sticks_key = (probe, pump, excluded, decompose, _frozen(build_kw))
        same_sticks = sticks_key == self._sticks_key
        held = model.known_stick_model() if same_sticks else None
        self._sticks_key = sticks_key
        if decompose is not None or not isinstance(ens, Ensemble) or any(
                k not in CACHE_KWARGS for k in build_kw):
            self.n_full += 1
            return compute_trpes(ens, probe=probe, pump=pump, kinetic_energies=kinetic_energies,
                                 delays=delays, resolution=resolution, convolve=convolve,
                                 decompose=decompose, progress=False, exclude=list(excluded),
                                 return_model=True, **kwargs)
        key = (id(ens), probe.n_photons, excluded, _frozen(build_kw))
        if self.cache is None or key != self._key or self.cache.ens is not ens:
            from ..compute.spectroscopy.cache import prepare_map_cache

            hv = probe.photon_energy
            self.band = None  # the old cache's band sticks go first (made again if asked)
            self.cache = prepare_map_cache(
                ens, probe=probe, pump=pump, resolution=resolution, exclude=list(excluded),
                photon_energies=(max(0.5 * hv, hv - PHOTON_ENERGY_SPAN),
                                 hv + PHOTON_ENERGY_SPAN), **build_kw)
            self._key = key
            self.n_caches += 1
            self._band_kw = {"exclude": list(excluded), **build_kw}
        self.cache.set_pump(pump)  # a new pass only when the weights depend on it
        trpes = self.cache.map(kinetic_energies=kinetic_energies, delays=delays,
                               probe_fwhm=probe.fwhm, resolution=resolution,
                               photon_energy=probe.photon_energy, convolve=convolve,
                               normalise=kwargs.get("normalise", "alive"))
        self._warn_ground_state(ens, probe)
        model.remember_band_sticks(trpes, self.band_sticks)
        return trpes, held

    def band_sticks(self, trpes_map: Any) -> Any:
        """Indexed sticks serving the band queries of `trpes_map` (a map of the current
        cache), made on the first call after the cache changed; None if they cannot."""
        from ..compute.bands import prepare_band_sticks
        from ..compute.spectroscopy.pulses import GaussianPulse

        cache = self.cache
        if cache is None:
            return None
        key = (self.n_caches, cache.rebuilds)
        if self.band is None or self._band_key != key or (
                self.band.serves(trpes_map) and self._band_for is not trpes_map):
            self.band = None  # the old sticks go before the new ones are made
            self.band = prepare_band_sticks(
                cache.ens, probe=GaussianPulse(**trpes_map.params["probe"]), pump=cache.pump,
                photon_energies=cache.photon_energies, **self._band_kw)
            self._band_key = key
            self._band_for = trpes_map  # made for this map: not made again for it
            self.n_band_builds += 1
        return None if self.band.serves(trpes_map) else self.band

    def _warn_ground_state(self, ens: Ensemble, probe: Any) -> None:
        """The ground-state warning of ``compute_trpes`` (the fraction kept per probe)."""
        from ..compute.spectroscopy.weights import ground_state_ionisation_fraction

        if self._ground is None or self._ground[0] != (probe.photon_energy, probe.n_photons):
            self._ground = ((probe.photon_energy, probe.n_photons),
                            ground_state_ionisation_fraction(ens, probe=probe))
        fraction = self._ground[1]
        if fraction > 0:
            warnings.warn(
                f"the probe ({probe.n_photons} x {probe.photon_energy} eV) can ionise the "
                f"ground state at {100 * fraction:.1f} % of the initial geometries, so a "
                "measured pump-on minus pump-off map would also hold a negative ground-state "
                "depletion term, which this map does not include. Hint: compare with measured "
                "maps only above the ground-state band, or lower the probe photon energy.",
                EnsembleWarning, stacklevel=2)
