"""A compute-side cache of deposited sticks for fast redraws of TRPES maps.

:class:`StickCache` (made by :func:`prepare_map_cache`) deposits an ensemble's sticks
once (the compiled fused pass where it applies, see :mod:`.fused`) as Taylor-moment
histograms on a fine energy grid and redraws maps from them:

* a new probe width or instrument resolution only re-broadens the moments
  (:meth:`.model.TRPESModel.broaden`): no pass over the ensemble;
* a new photon energy moves every stick by ``n (h nu' - h nu)``; with a cross section
  that does not depend on the kinetic energy (the squared Dyson norm) that is exactly a
  shift of the fine grid, so it is a re-broadening too. The cache is built at the
  highest photon energy of ``photon_energies`` so that every channel open at a lower
  one is among its sticks (a channel further below threshold than ``THRESHOLD_TAIL``
  standard deviations of the probe spectrum adds less than 1e-14 of a stick's peak
  at zero kinetic energy). Other cross sections, or a photon energy above the range,
  rebuild the cache (one pass);
* a stick width narrower than the moments can serve (about 0.56 of the build width at
  the default 4 bins per FWHM, :data:`._checks.REUSE_TOLERANCE`) or more than
  :data:`WIDEN_LIMIT` times wider (channels the build probe's threshold tail left out
  would then matter at the 1e-6 level) rebuilds too.

A new pump (:meth:`StickCache.set_pump`) only changes the cross-correlation, unless the
trajectory weights depend on it (doorway weights): then one new pass. ``exclude=`` leaves
trajectories out of every map of the cache, as in ``compute_trpes``.

``cache.rebuilds`` counts the passes over the ensemble since construction.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.ensemble import Ensemble
from ...data.spectrum import TRPESMap
from ...errors import SchemaError
from .cross_sections import DysonNorm, resolve_cross_section
from .maps import excluded_ids, trpes_model
from .model import TRPESModel
from .pulses import GaussianPulse
from .resolution import Resolution, check_resolution, min_stick_fwhm
from .weights import weights_word

__all__ = ["StickCache", "prepare_map_cache", "WIDEN_LIMIT"]

#: widest stick FWHM served from the cache, relative to the build width: the sticks kept
#: extend 8 build standard deviations below threshold, i.e. 8 / 1.5 of the new ones,
#: whose tail there is exp(-(8 / 1.5)^2 / 2) ~ 7e-7 of the peak (computed independently)
WIDEN_LIMIT = 1.5


class StickCache:
    """Deposited sticks of an ensemble, redrawn into maps for new widths and photon energies.

    Parameters
    ----------
    ens : Ensemble
        With ``energies``, ``cation_energies`` and ``dyson``.
    probe : GaussianPulse
        The probe (photon energy in eV, FWHM in fs, ``n_photons``).
    photon_energies : (float, float), optional
        Range of probe photon energies (eV) to serve without a new pass; default the
        probe's photon energy only.
    pump, cross_section, weights, time_step, ionisation_shifts, absorbing, exclude
        As for :func:`~.maps.compute_trpes` (``exclude``: trajectory ids left out, a
        mask; every map of the cache leaves them out).
    resolution : float or ProportionalResolution
        The instrument resolution the fine grid is sized for (default 0).
    progress : bool
        Progress bars on (re)builds.
    """

    def __init__(self, ens: Ensemble, *, probe: GaussianPulse,
                 photon_energies: tuple[float, float] | None = None,
                 pump: GaussianPulse | None = None, cross_section: Any = "dyson",
                 weights: str = "auto", time_step: float | None = None,
                 ionisation_shifts: Sequence[float] | Mapping[int, float] | None = None,
                 absorbing: str = "zero", resolution: Resolution = 0.0,
                 progress: bool = False, exclude: npt.ArrayLike | None = None) -> None:
        if not isinstance(ens, Ensemble):
            raise SchemaError(f"StickCache needs an in-memory Ensemble; got "
                              f"{type(ens).__name__}. Hint: for a chunked store call "
                              "compute_trpes(..., return_model=True) and re-broaden the model.")
        if not isinstance(probe, GaussianPulse):
            raise SchemaError(f"probe must be a GaussianPulse; got {type(probe).__name__}.")
        lo, hi = ((probe.photon_energy, probe.photon_energy) if photon_energies is None
                  else (float(photon_energies[0]), float(photon_energies[1])))
        if not (0 < lo <= hi) or not np.isfinite(hi):
            raise SchemaError(f"photon_energies must be (low, high) with 0 < low <= high (eV); "
                              f"got {photon_energies!r}.")
        self.ens = ens
        self.probe = probe
        self.pump = pump
        self.photon_energies = (min(lo, probe.photon_energy), max(hi, probe.photon_energy))
        self._kw = {"pump": pump, "cross_section": cross_section, "weights": weights,
                    "time_step": time_step, "ionisation_shifts": ionisation_shifts,
                    "absorbing": absorbing, "progress": progress,
                    "exclude": None if exclude is None else excluded_ids(exclude)}
        self._shiftable = type(resolve_cross_section(cross_section)) is DysonNorm
        self.rebuilds = 0
        self._stale = False
        self._build(self.photon_energies[1], probe.fwhm, check_resolution(resolution))

    def _build(self, photon_energy: float, fwhm: float, resolution: Resolution) -> None:
        probe = GaussianPulse(photon_energy=photon_energy, fwhm=fwhm,
                              n_photons=self.probe.n_photons)
        import warnings

        with warnings.catch_warnings():  # warned once, by the first build
            if self.rebuilds:
                warnings.simplefilter("ignore")
            self.model: TRPESModel = trpes_model(self.ens, probe=probe, resolution=resolution,
                                                 keep_sticks=False, **self._kw)
        self.build_fwhm = self.model.fwhm(probe, resolution)
        self.rebuilds += 1
        self._stale = False

    def map(self, *, kinetic_energies: npt.ArrayLike, delays: npt.ArrayLike,
            probe_fwhm: float | None = None, resolution: Resolution = 0.0,
            photon_energy: float | None = None, convolve: bool = True,
            normalise: str = "alive") -> TRPESMap:
        """A map for a probe width, resolution and photon energy, from the cached sticks.

        Parameters
        ----------
        kinetic_energies : array_like, shape (n_energies,)
            Photoelectron kinetic energies (eV).
        delays : array_like, shape (n_delays,)
            Pump-probe delays (fs).
        probe_fwhm : float, optional
            Probe duration (fs); default the cache's probe.
        resolution : float or ProportionalResolution
            Instrument resolution (eV FWHM, or energy-dependent).
        photon_energy : float, optional
            Probe photon energy (eV); default the cache's probe.
        convolve, normalise
            As for :func:`~.maps.compute_trpes`.

        Returns
        -------
        TRPESMap
            As :func:`~.maps.compute_trpes` returns.
        """
        resolution = check_resolution(resolution)
        hv = self.probe.photon_energy if photon_energy is None else float(photon_energy)
        probe = GaussianPulse(photon_energy=hv,
                              fwhm=self.probe.fwhm if probe_fwhm is None else probe_fwhm,
                              n_photons=self.probe.n_photons)
        lo, hi = self.photon_energies
        if self._stale:  # a pump that changes the trajectory weights (set_pump)
            self._build(self.model.probe.photon_energy, probe.fwhm, resolution)
        if not lo <= hv <= hi or (not self._shiftable and hv != self.model.probe.photon_energy):
            self.photon_energies = (min(lo, hv), max(hi, hv)) if self._shiftable else (hv, hv)
            self._build(self.photon_energies[1], probe.fwhm, resolution)
        fwhm = min_stick_fwhm(probe, resolution)
        if fwhm > WIDEN_LIMIT * self.build_fwhm:
            self._build(self.model.probe.photon_energy, probe.fwhm, resolution)
        model = self._shifted(probe)
        try:
            return model.broaden(kinetic_energies=kinetic_energies, delays=delays, probe=probe,
                                 pump=self.pump, resolution=resolution, convolve=convolve,
                                 normalise=normalise)
        except SchemaError:  # narrower than the moments serve: one new pass
            self._build(self.model.probe.photon_energy, probe.fwhm, resolution)
            return self._shifted(probe).broaden(
                kinetic_energies=kinetic_energies, delays=delays, probe=probe, pump=self.pump,
                resolution=resolution, convolve=convolve, normalise=normalise)

    def set_pump(self, pump: GaussianPulse | None) -> None:
        """Use `pump` for the maps from now on (its cross-correlation and ``params``).

        The deposited sticks do not depend on the pump unless the trajectory weights do:
        a new pass follows (on the next :meth:`map`) only when the weighting the pump
        gives differs from the cache's, or is the pump's doorway weighting.
        """
        if pump is not None and not isinstance(pump, GaussianPulse):
            raise SchemaError(f"pump must be a GaussianPulse or None; got {type(pump).__name__}.")
        if pump == self.pump:
            return
        w = self._kw["weights"]
        before = weights_word(self.ens, weights=w, pump=self.pump)
        after = weights_word(self.ens, weights=w, pump=pump)
        self.pump = pump
        self._kw["pump"] = pump
        if before != after or after == "doorway":
            self._stale = True

    def _shifted(self, probe: GaussianPulse) -> TRPESModel:
        """The model with every stick moved to `probe`'s photon energy (a grid shift)."""
        m = self.model
        if probe.photon_energy == m.probe.photon_energy:
            return m
        return m.with_photon_energy(probe.photon_energy)


def prepare_map_cache(ens: Ensemble, *, probe: GaussianPulse, **kwargs: Any) -> StickCache:
    """Deposit an ensemble's sticks once for fast redraws (see :class:`StickCache`).

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> cache = prepare_map_cache(make_toy_ensemble(20, seed=1),
    ...                           probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
    ...                           photon_energies=(4.8, 5.2))
    >>> m = cache.map(kinetic_energies=np.linspace(0, 2, 51), delays=[0.0, 50.0],
    ...               probe_fwhm=40.0, photon_energy=4.9)
    >>> m.shape, cache.rebuilds
    ((2, 51), 1)
    """
    return StickCache(ens, probe=probe, **kwargs)
