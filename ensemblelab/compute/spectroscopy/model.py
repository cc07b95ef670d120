"""The stick model of a TRPES map: moment histograms and their broadening into maps.

Broadening: every stick is a Gaussian of FWHM ``Gamma = sqrt(Gamma_probe^(n)^2 +
resolution^2)`` with ``Gamma_probe^(n) = sqrt(n) 4 ln2 hbar / T_probe``, point-sampled at
the requested kinetic energies (energies below zero get no signal: the area below zero
is discarded, not renormalised). The pure signal at grid time u is
``sum_sticks / sum_alive_weight(u)`` (``normalise="alive"``) or ``/ sum of all
trajectory weights`` (``normalise="initial"``); with ``convolve=True`` it is convolved
with the normalised pump-probe cross-correlation, renormalised over the known part
(u <= t_end) (J. Chem. Phys. 2004, "Classical doorway-window approximation for
time-resolved pump-probe spectra").

A :class:`TRPESModel` holds the Taylor-moment histograms of the sticks on a fine
energy grid (:mod:`._kernels_deposit`) and broadens them exactly
(:mod:`._kernels_broadening`), so a new probe width or resolution only re-broadens.
A model made from an in-memory ensemble also keeps the sticks (re-deposited when the
width changes too much, and reused by contributions); one made from a chunked store
keeps the moments only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.spectrum import StickSpectrum, TRPESMap
from ...errors import SchemaError
from . import _kernels_broadening as KB
from . import _kernels_deposit as KD
from ._checks import (
    DEFAULT_BINS_PER_FWHM,
    DEFAULT_ORDER,
    EDGE_SIGMAS,
    REUSE_TOLERANCE,
    TIME_CUTOFF,
    check_grid,
    check_pulse,
)
from .pulses import GaussianPulse, cross_correlation_sigma
from .resolution import (
    ProportionalResolution,
    Resolution,
    check_resolution,
    describe_resolution,
    min_stick_fwhm,
    stick_fwhm,
)

__all__ = ["TRPESModel", "deposit", "ASSUMPTIONS"]

#: what every map assumes (stored in its ``params["assumptions"]``)
ASSUMPTIONS = ("isotropic orientational average (no polarisation, no magic-angle or "
               "anisotropy term); transform-limited Gaussian pulses; resolution constant "
               "FWHM unless an energy-dependent one is given; classical doorway-window")


@dataclass(eq=False, repr=False)
class TRPESModel:
    """Sticks (or their moment histograms) of an ensemble, for fast (re-)broadening.

    Made by :func:`~ensemblelab.compute.spectroscopy.sticks.prepare_sticks` or returned
    by ``compute_trpes(..., return_model=True)``; call :meth:`broaden` for maps and pass
    it to ``contributions(..., model=...)`` to skip recomputing the sticks. A plain,
    explicit object: the caller holds it, no map carries it.

    Attributes
    ----------
    sticks : StickSpectrum or None
        One stick per (snapshot, open channel); None for a model made from a chunked
        store (moments only).
    probe : GaussianPulse
        The probe the sticks were made with.
    decompose : str or None
        The decomposition prepared.
    labels : list of str
        Component labels (empty when ``decompose`` is None).
    grid_start, time_step : float
        Uniform time grid ``u_j = grid_start + j * time_step`` (fs).
    n_time : int
        Size of the time grid.
    alive : ndarray, shape (n_time,)
        Alive trajectory weight per grid time.
    total_weight : float
        Sum of all trajectory weights.
    t_known : float
        Last snapshot time (fs).
    tbin, tfrac : ndarray or None
        Time-grid index and fraction of every stick (None without sticks / on points).
    n_snapshots : int
        Snapshots of the ensemble the model was made from.
    fill : TimeFill or None
        How missing electronic data were handled (per-channel alive weights, gaps
        filled; :mod:`.gaps`); None when every snapshot had data.
    """

    sticks: StickSpectrum | None
    probe: GaussianPulse
    decompose: str | None
    labels: list[str]
    grid_start: float
    time_step: float
    n_time: int
    alive: np.ndarray
    total_weight: float
    t_known: float
    tbin: np.ndarray | None
    tfrac: np.ndarray | None
    comp: np.ndarray | None = None  # component per (expanded) stick
    comp_src: np.ndarray | None = None  # expanded stick -> stick
    comp_weight: np.ndarray | None = None  # weights of expanded sticks
    info: dict[str, Any] = field(default_factory=dict)
    order: int = DEFAULT_ORDER
    bins_per_fwhm: float = DEFAULT_BINS_PER_FWHM
    alive_count: np.ndarray | None = None  # trajectories alive per grid time (unweighted)
    n_snapshots: int = 0
    fill: Any = None  # gaps.TimeFill of the missing data, or None
    alive_parts: Any = None  # sticks.BlockSticks.alive_parts of an in-memory ensemble
    _cache: dict[str, Any] = field(default_factory=dict)

    def set_moments(self, *, e_lo: float, h: float, n_fine: int, hist: np.ndarray,
                    hist_comp: np.ndarray | None) -> None:
        """Store moment histograms deposited elsewhere (e.g. summed over chunks).

        Parameters
        ----------
        e_lo, h : float
            First fine-bin centre and bin width (eV).
        n_fine : int
            Number of fine bins.
        hist : ndarray, shape (order, 1, n_time, n_fine)
            Moments of all sticks (layout of :func:`._kernels_deposit.deposit_moments`).
        hist_comp : ndarray or None
            Moments per component.
        """
        self._cache.clear()
        self._cache.update(h=h, e_lo=e_lo, n_fine=n_fine, hist=hist, hist_comp=hist_comp)

    def with_photon_energy(self, photon_energy: float) -> TRPESModel:
        """This model's moments with every stick moved to another probe photon energy.

        A stick sits at ``n h nu - IP``: a new photon energy moves all sticks by
        ``n (h nu' - h nu)``, i.e. shifts the fine energy grid of the moments (exact).
        Valid only when the cross section does not depend on the kinetic energy and
        the channels open at ``h nu'`` are among the sticks (e.g. ``h nu' <= h nu``);
        the caller checks both (see :class:`.cache.StickCache`). Moments-only models.
        """
        if self.sticks is not None or "e_lo" not in self._cache:
            raise SchemaError("with_photon_energy needs a model holding moments only (made "
                              "with keep_sticks=False). Hint: use prepare_map_cache().")
        probe = GaussianPulse(photon_energy=photon_energy, fwhm=self.probe.fwhm,
                              n_photons=self.probe.n_photons)
        cache = dict(self._cache)
        cache["e_lo"] = cache["e_lo"] + (probe.total_energy - self.probe.total_energy)
        return replace(self, probe=probe, _cache=cache)

    def moment_grid(self, fwhm: float) -> tuple[float, float, int]:
        """``(e_lo, h, n_fine)`` of the moment histograms used for a stick FWHM (eV)."""
        return self._moments(fwhm)[2:]

    @property
    def times(self) -> np.ndarray:
        """Internal grid times (fs), shape (n_time,)."""
        return self.grid_start + self.time_step * np.arange(self.n_time)

    def fwhm(self, probe: GaussianPulse | None = None, resolution: Resolution = 0.0) -> float:
        """Stick FWHM in eV for a probe (default the model's) and resolution (the narrowest,
        at zero kinetic energy, for an energy-dependent resolution)."""
        probe = probe or self.probe
        return min_stick_fwhm(probe, check_resolution(resolution))

    def fine_grid(self, fwhm: float) -> tuple[float, float, int]:
        """Fine energy grid of the moment histograms for a stick FWHM (eV).

        Returns ``(e_lo, h, n_fine)``: first bin centre (eV), spacing ``fwhm /
        bins_per_fwhm`` (eV) and number of bins, covering all stick energies.
        """
        h = fwhm / self.bins_per_fwhm
        e = self.sticks.energy if self.sticks is not None else np.zeros(0)
        e_lo = float(e.min()) if e.size else 0.0
        e_hi = float(e.max()) if e.size else 0.0
        return e_lo, h, int(math.floor((e_hi - e_lo) / h + 0.5)) + 2

    def _moments(self, fwhm: float) -> tuple[np.ndarray, np.ndarray | None, float, float, int]:
        c = self._cache
        if "h" in c and KB.truncation_bound(c["h"], fwhm, self.order) <= max(
                REUSE_TOLERANCE, KB.truncation_bound(fwhm / self.bins_per_fwhm, fwhm,
                                                     self.order)):
            return c["hist"], c["hist_comp"], c["e_lo"], c["h"], c["n_fine"]
        if self.sticks is None:
            raise SchemaError(
                f"this model holds moment histograms for a stick FWHM near "
                f"{c['h'] * self.bins_per_fwhm:.4g} eV only (it was made from a chunked "
                f"store); {fwhm:.4g} eV needs the sticks again. Hint: call compute_trpes on "
                "the lazy ensemble with the new probe width or resolution.")
        assert self.tbin is not None  # kept with the sticks
        e = self.sticks.energy
        e_lo, h, n_fine = self.fine_grid(fwhm)
        progress = bool(self.info.get("progress", False))
        hist = deposit(self.tbin, e, self.sticks.weight, n_time=self.n_time, e_lo=e_lo, h=h,
                        n_fine=n_fine, order=self.order, tfrac=self.tfrac, progress=progress)
        hist_comp = None
        if self.comp is not None:
            src = self.comp_src
            tb = self.tbin if src is None else self.tbin[src]
            tf = None if self.tfrac is None else (self.tfrac if src is None else self.tfrac[src])
            ee = e if src is None else e[src]
            ww = self.sticks.weight if self.comp_weight is None else self.comp_weight
            hist_comp = deposit(tb, ee, ww, n_time=self.n_time, e_lo=e_lo, h=h,
                                 n_fine=n_fine, order=self.order, comp=self.comp,
                                 n_comp=len(self.labels), tfrac=tf, progress=progress)
        c.update(h=h, e_lo=e_lo, n_fine=n_fine, hist=hist, hist_comp=hist_comp)
        return hist, hist_comp, e_lo, h, n_fine

    def _norm(self, normalise: str) -> np.ndarray:
        if normalise == "alive":
            with np.errstate(divide="ignore"):
                inv = np.where(self.alive > 0, 1.0 / np.where(self.alive > 0, self.alive, 1.0),
                               0.0)
            return inv
        if normalise == "initial":
            return np.full(self.n_time, 1.0 / self.total_weight if self.total_weight else 0.0)
        raise SchemaError(f"The 'normalise' parameter must be 'alive' or 'initial'. Got "
                          f"{normalise!r} instead.")

    def time_weights(self, delays: np.ndarray, *, sigma: float | None) -> np.ndarray:
        """Matrix (n_delays, n_time) from grid times to delays (see ``time_matrix``)."""
        dt = self.time_step
        if sigma is None:
            return KB.time_matrix(delays, self.times, sigma=None, t_known=self.t_known)
        lo = min(float(delays.min()), self.grid_start) - TIME_CUTOFF * sigma
        j_lo = int(math.floor((lo - self.grid_start) / dt)) - 1
        ext = self.grid_start + dt * np.arange(j_lo, self.n_time)
        c = KB.time_matrix(delays, ext, sigma=sigma, t_known=self.t_known, cutoff=TIME_CUTOFF,
                          t_launch=0.0 if self.grid_start == 0.0 else None)
        return np.ascontiguousarray(c[:, -j_lo:])

    def broaden(
        self,
        *,
        kinetic_energies: npt.ArrayLike,
        delays: npt.ArrayLike,
        probe: GaussianPulse | None = None,
        pump: GaussianPulse | None = None,
        resolution: Resolution = 0.0,
        convolve: bool = True,
        normalise: str = "alive",
    ) -> TRPESMap:
        """Broaden the cached sticks into a map.

        Parameters
        ----------
        kinetic_energies : array_like, shape (n_energies,)
            Photoelectron kinetic energies in eV.
        delays : array_like, shape (n_delays,)
            Delays in fs.
        probe : GaussianPulse, optional
            A probe with another width (same photon energy and photon count as the
            sticks were made with); default the model's probe.
        pump : GaussianPulse, optional
            Needed for ``convolve=True``; without a pump the pump is taken as
            infinitely short (cross-correlation = the probe alone).
        resolution : float or ProportionalResolution
            Instrument FWHM in eV, added in quadrature (energy-dependent: see
            :mod:`.resolution`).
        convolve : bool
            Convolve with the cross-correlation (signal at negative delays) or
            return the pure signal.
        normalise : {"alive", "initial"}

        Returns
        -------
        TRPESMap
        """
        kinetic_energies = check_grid(kinetic_energies, "kinetic_energies")
        delays = check_grid(delays, "delays")
        resolution = check_resolution(resolution)
        probe = check_pulse(probe, "probe", optional=True) or self.probe
        pump = check_pulse(pump, "pump", optional=True)
        if (probe.photon_energy, probe.n_photons) != (self.probe.photon_energy,
                                                       self.probe.n_photons):
            raise SchemaError(
                "broaden() can change the probe width only; the photon energy and n_photons "
                f"must stay {self.probe.photon_energy} eV x {self.probe.n_photons}. Hint: call "
                "prepare_sticks() again for a new photon energy."
            )
        fwhm = self.fwhm(probe, resolution)
        hist, hist_comp, e_lo, h, n_fine = self._moments(fwhm)
        norm = self._norm(normalise)
        if convolve:
            pump_eff = pump if pump is not None else None
            sigma = (cross_correlation_sigma(pump_eff, probe) if pump_eff is not None
                     else probe.effective_sigma)
        else:
            sigma = None
        cmat: np.ndarray | KB.SparseTime
        if sigma is None:  # linear interpolation: two nonzeros a row, kept by rows
            cmat = KB.interpolation_rows(delays, self.times, t_known=self.t_known,
                                         col_scale=norm)
        else:
            cmat = self.time_weights(delays, sigma=sigma) * norm[None, :]
        fwhm_of = None
        if isinstance(resolution, ProportionalResolution):
            def fwhm_of(c: np.ndarray) -> np.ndarray:
                return np.asarray(stick_fwhm(probe, resolution, c))
        bmat = KB.broadening_blocks(kinetic_energies, e_lo=e_lo, h=h, n_fine=n_fine, fwhm=fwhm,
                                    order=self.order, fwhm_of=fwhm_of)
        total = KB.assemble(hist, bmat, cmat)[0]
        components: dict[str, np.ndarray] = {}
        if hist_comp is not None:
            comps = KB.assemble(hist_comp, bmat, cmat)
            components = {lab: comps[i] for i, lab in enumerate(self.labels)}
        t_clip = np.clip(delays, self.grid_start, None)
        alive = np.interp(t_clip, self.times, self.alive, right=0.0)
        count = (None if self.alive_count is None else
                 np.interp(t_clip, self.times, self.alive_count, right=0.0))
        params = dict(self.info)
        params.pop("progress", None)
        params.update(
            probe={"photon_energy": probe.photon_energy, "fwhm": probe.fwhm,
                   "n_photons": probe.n_photons},
            pump=None if pump is None else {"photon_energy": pump.photon_energy,
                                            "fwhm": pump.fwhm, "n_photons": pump.n_photons},
            resolution=describe_resolution(resolution),
            fwhm_energy=fwhm,
            convolve=bool(convolve),
            sigma_cc=sigma,
            normalise=normalise,
            decompose=self.decompose,
            time_step=self.time_step,
            t_end=self.t_known,
            edge_delay=(self.t_known - EDGE_SIGMAS * sigma) if sigma else self.t_known,
            order=self.order,
            bins_per_fwhm=self.bins_per_fwhm,
            energy_truncation="point-sampled; no signal below 0 eV (area below 0 discarded)",
            assumptions=ASSUMPTIONS,
        )
        return TRPESMap(kinetic_energies=kinetic_energies, delays=delays, intensity=total,
                        components=components, alive=alive, alive_count=count, params=params)


def deposit(tbin: np.ndarray, energy: np.ndarray, weight: np.ndarray, *, progress: bool,
            **kw: Any) -> np.ndarray:
    """:func:`._kernels_deposit.deposit_moments`, in blocks under a progress bar if asked."""
    n = energy.shape[0]
    block = 8 * KD.DEFAULT_CHUNK
    if n <= block or not progress:
        return KD.deposit_moments(tbin, energy, weight, **kw)
    from tqdm.auto import tqdm

    comp = kw.pop("comp", None)
    tfrac = kw.pop("tfrac", None)
    out: np.ndarray | None = None
    for s in tqdm(range(0, n, block), desc="depositing sticks", unit="block"):
        sl = slice(s, s + block)
        part = KD.deposit_moments(tbin[sl], energy[sl], weight[sl],
                                 comp=None if comp is None else comp[sl],
                                 tfrac=None if tfrac is None else tfrac[sl], **kw)
        if out is None:
            out = part
        else:
            out += part  # in place: no fresh histogram-sized array per block
    assert out is not None  # n > block: at least one block
    return out
