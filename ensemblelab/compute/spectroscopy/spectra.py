"""Time-resolved photoelectron spectra in the classical doorway-window picture.

Method (method notes sections 1-4):

* **Window.** Each snapshot on active neutral state ``a`` and each cation state
  ``k`` with ``E_kin = n h nu_probe - IP_ak > 0`` gives a stick at ``E_kin`` with weight
  ``w_traj * sigma_ak`` (cross-section model, default the squared Dyson norm).
  Closed channels give nothing. Sticks are kept raw in a :class:`StickSpectrum`.
* **Broadening.** Every stick is a Gaussian of FWHM
  ``Gamma = sqrt(Gamma_probe^(n)^2 + resolution^2)`` with
  ``Gamma_probe^(n) = sqrt(n) 4 ln2 hbar / T_probe``. The map is point-sampled at the
  requested kinetic energies; energies below zero get no signal (the tails are
  *truncated*: the area below zero is discarded, not renormalised, so a stick
  within ~Gamma of threshold loses part of its area).
* **Ensemble average** (eq. 1.5). Snapshot times are put on a uniform time grid
  (step = the trajectories' median output step, or ``time_step``). Snapshots on
  grid points go to that point; otherwise a snapshot is split linearly between its
  two neighbouring grid points (numerator and alive weight alike). The pure signal
  at grid time u is ``sum_sticks / sum_alive_weight(u)`` (``normalise="alive"``) or
  ``/ sum of all trajectory weights`` (``normalise="initial"``).
* **Temporal convolution** (eq. 2.3). With ``convolve=True`` the pure signal
  (zero for u < 0) is convolved with the normalised pump-probe cross-correlation
  (``sigma_cc``); this produces signal at negative delays. Beyond the end of the
  longest trajectory the pure signal is unknown: the kernel is renormalised over
  the known part (u <= t_end), and delays later than ``t_end - 3 sigma_cc`` are
  reported as edge-affected in ``params["edge_delay"]``. With ``convolve=False`` the
  pure signal is linearly interpolated to the delays.
* **Assignment.** Exact additive decompositions by neutral state, cation state,
  (neutral, cation) pair or (neutral diabat, cation diabat) pair (eq. 4.1) whose sum
  is the total map.

The fast path (:mod:`ensemblelab.compute.spectroscopy._kernels_trpes`) deposits Taylor moments
of the sticks on a fine energy grid and broadens them exactly; :class:`TRPESModel`
caches the moments so that a new probe width or resolution only re-broadens.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.special import ndtr

from ...data.ensemble import Ensemble
from ...data.spectrum import StickSpectrum, TRPESMap
from ...errors import EnsembleWarning, SchemaError
from ...units import HARTREE_EV
from . import _kernels_trpes as K
from .cross_sections import (
    CrossSection,
    _describe,
    cross_section_from_description,
    resolve_cross_section,
)
from .pulses import FWHM_TO_SIGMA, GaussianPulse, cross_correlation_sigma

__all__ = [
    "compute_trpes",
    "contributions",
    "region_intensity",
    "prepare_sticks",
    "TRPESModel",
    "doorway_weights",
    "doorway_factor",
    "trajectory_weights",
    "DEFAULT_ORDER",
    "DEFAULT_BINS_PER_FWHM",
]

#: Taylor moments kept per fine energy bin (truncation bound 2.8e-7 of the peak at 4 bins
#: per FWHM; 8 moments of float64 are one 64-byte cache line, see ._kernels_trpes)
DEFAULT_ORDER = 8
#: fine energy bins per FWHM of the stick Gaussian
DEFAULT_BINS_PER_FWHM = 4.0
#: cached moments are re-broadened for a new width while the truncation bound of the
#: moment expansion (``_kernels_trpes.truncation_bound``) stays below this
REUSE_TOLERANCE = 3e-5
#: kernel half-width of the temporal convolution in sigma_cc
TIME_CUTOFF = 8.0
#: edge-affected region at the end, in sigma_cc (method notes section 2.3)
EDGE_SIGMAS = 3.0

_BY = (None, "neutral", "cation", "pair", "diabatic")


# ---------------------------------------------------------------------- weights
def doorway_factor(excitation_energy: npt.ArrayLike, *, pump: GaussianPulse,
                   transition_dipole: npt.ArrayLike | None = None,
                   oscillator_strength: npt.ArrayLike | None = None) -> np.ndarray:
    """Doorway weight ``|mu_0i|^2 I_pump(h nu - dE_0i)`` (eq. 1.2, 1.3).

    Parameters
    ----------
    excitation_energy : array_like, shape (n,)
        ``E_i - E_0`` in eV.
    pump : GaussianPulse
        The pump (its peak-normalised spectral intensity is used).
    transition_dipole : array_like, shape (n, 3) or (n,), optional
        ``mu_0i`` in e*bohr (vectors) or ``|mu_0i|^2`` (scalars).
    oscillator_strength : array_like, shape (n,), optional
        ``f_0i``; converted with ``|mu|^2 = 3 f / (2 dE)`` (atomic units), i.e. the
        weight is proportional to ``f / dE`` (not to ``f``).

    Returns
    -------
    ndarray, shape (n,)
        Weights in e^2 bohr^2 (times the dimensionless spectral factor).

    Examples
    --------
    >>> from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    >>> w = doorway_factor([4.0, 4.3], pump=GaussianPulse(photon_energy=4.1, fwhm=20.0),
    ...                    transition_dipole=[1.0, 0.5])
    >>> [float(f"{x:.6g}") for x in w]
    [0.0357934, 8.20699e-07]
    """
    de = np.asarray(excitation_energy, dtype=float)
    if transition_dipole is not None:
        mu = np.asarray(transition_dipole, dtype=float)
        mu2 = np.sum(mu * mu, axis=-1) if mu.ndim == de.ndim + 1 else mu
    elif oscillator_strength is not None:
        f = np.asarray(oscillator_strength, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            mu2 = np.where(de > 0, 1.5 * f / (de / HARTREE_EV), 0.0)
    else:
        raise SchemaError("doorway_factor needs transition_dipole or oscillator_strength.")
    return mu2 * pump.spectral_intensity(de)


def doorway_weights(ens: Ensemble, *, pump: GaussianPulse) -> np.ndarray:
    """Doorway weight of each trajectory from its initial excitation (eq. 1.2).

    Uses ``ens.excitation_energies`` and ``ens.transition_dipoles`` (preferred) or
    ``ens.oscillator_strengths`` at the trajectory's ``initial_state``; multiplies
    the ensemble's own ``trajectories["weight"]``.

    Returns
    -------
    ndarray, shape (n_trajectories,)
    """
    if ens.excitation_energies is None or (
        ens.transition_dipoles is None and ens.oscillator_strengths is None
    ):
        raise SchemaError(
            "doorway weights need ens.excitation_energies and ens.transition_dipoles or "
            "ens.oscillator_strengths. Hint: pass weights='uniform' for a doorway-sampled "
            "ensemble."
        )
    rows = np.arange(ens.n_trajectories)
    init = ens.trajectories["initial_state"].to_numpy().astype(np.int64)
    de = ens.excitation_energies[rows, init]
    if ens.transition_dipoles is not None:
        fac = doorway_factor(de, pump=pump, transition_dipole=ens.transition_dipoles[rows, init])
    else:
        fac = doorway_factor(de, pump=pump,
                             oscillator_strength=ens.oscillator_strengths[rows, init])
    return ens.trajectories["weight"].to_numpy() * fac


def trajectory_weights(ens: Ensemble, *, weights: str = "doorway",
                       pump: GaussianPulse | None = None) -> tuple[np.ndarray, str]:
    """Weight of each trajectory and a word saying how it was obtained.

    ``"doorway"``: ``doorway_weights`` when a pump is given and the ensemble has
    excitation data; otherwise the ensemble's own ``trajectories["weight"]`` (a
    doorway-sampled ensemble, or one carrying its importance weights), reported
    as ``"ensemble"``.
    ``"uniform"``: 1 for every trajectory. Any other string: that column of
    ``ens.trajectories``.
    """
    if weights == "uniform":
        return np.ones(ens.n_trajectories), "uniform"
    if weights == "doorway":
        if pump is None:
            return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
        if ens.excitation_energies is None or (
            ens.transition_dipoles is None and ens.oscillator_strengths is None
        ):
            # no excitation data: the ensemble is taken as doorway-sampled (its own
            # weights); params["weights"] says "ensemble"
            return ens.trajectories["weight"].to_numpy().astype(float), "ensemble"
        return doorway_weights(ens, pump=pump), "doorway"
    if isinstance(weights, str) and weights in ens.trajectories.columns:
        w = ens.trajectories[weights].to_numpy().astype(float)
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise SchemaError(f"trajectory column {weights!r} must be finite and >= 0.")
        return w, f"column:{weights}"
    raise SchemaError(
        "The 'weights' parameter must be 'doorway', 'uniform' or a column of ens.trajectories "
        f"{list(ens.trajectories.columns)}. Got {weights!r} instead."
    )


# ---------------------------------------------------------------------- checks
def _check_grid(values: npt.ArrayLike, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1 or arr.size < 1 or not np.all(np.isfinite(arr)):
        raise SchemaError(f"The {name!r} parameter must be a non-empty 1-D array of finite "
                          f"floats. Got shape {arr.shape}.")
    if arr.size > 1 and np.any(np.diff(arr) <= 0):
        raise SchemaError(f"The {name!r} parameter must increase strictly.")
    return arr


def _check_nonneg(value: float, name: str) -> float:
    if not isinstance(value, int | float | np.floating | np.integer) or not (
        math.isfinite(float(value)) and float(value) >= 0
    ):
        raise SchemaError(f"The {name!r} parameter must be a float in the range [0, inf). Got "
                          f"{value!r} instead.")
    return float(value)


def _check_pulse(p: object, name: str, *, optional: bool = False) -> GaussianPulse | None:
    if p is None and optional:
        return None
    if not isinstance(p, GaussianPulse):
        raise SchemaError(f"The {name!r} parameter must be a GaussianPulse. Got "
                          f"{type(p).__name__} instead.")
    return p


# ---------------------------------------------------------------------- model
@dataclass(eq=False, repr=False)
class TRPESModel:
    """Raw sticks of an ensemble plus cached moment histograms for fast re-broadening.

    Build with :func:`prepare_sticks`; call :meth:`broaden` for maps.

    Attributes
    ----------
    sticks : StickSpectrum
        One stick per (snapshot, open channel).
    grid_start, time_step : float
        Uniform time grid ``u_j = grid_start + j * time_step`` (fs).
    alive : ndarray, shape (n_time,)
        Alive trajectory weight per grid time.
    t_known : float
        Last snapshot time (fs).
    labels : list of str
        Component labels (empty when ``by`` is None).
    """

    sticks: StickSpectrum
    probe: GaussianPulse
    by: str | None
    labels: list[str]
    grid_start: float
    time_step: float
    n_time: int
    alive: np.ndarray
    total_weight: float
    t_known: float
    tbin: np.ndarray
    tfrac: np.ndarray | None
    comp: np.ndarray | None = None  # component per (expanded) stick
    comp_src: np.ndarray | None = None  # expanded stick -> stick
    comp_weight: np.ndarray | None = None  # weights of expanded sticks
    info: dict[str, Any] = field(default_factory=dict)
    order: int = DEFAULT_ORDER
    bins_per_fwhm: float = DEFAULT_BINS_PER_FWHM
    alive_count: np.ndarray | None = None  # trajectories alive per grid time (unweighted)
    ens_id: int = 0
    n_snapshots: int = 0
    _cache: dict[str, Any] = field(default_factory=dict)

    @property
    def times(self) -> np.ndarray:
        """Internal grid times (fs), shape (n_time,)."""
        return self.grid_start + self.time_step * np.arange(self.n_time)

    def fwhm(self, probe: GaussianPulse | None = None, resolution: float = 0.0) -> float:
        """Stick FWHM in eV for a probe (default the model's) and resolution."""
        probe = probe or self.probe
        return math.hypot(probe.effective_spectral_fwhm, resolution)

    def fine_grid(self, fwhm: float) -> tuple[float, float, int]:
        """Fine energy grid of the moment histograms for a stick FWHM (eV).

        Returns ``(e_lo, h, n_fine)``: first bin centre (eV), spacing ``fwhm /
        bins_per_fwhm`` (eV) and number of bins, covering all stick energies.
        """
        h = fwhm / self.bins_per_fwhm
        e = self.sticks.energy
        e_lo = float(e.min()) if e.size else 0.0
        e_hi = float(e.max()) if e.size else 0.0
        return e_lo, h, int(math.floor((e_hi - e_lo) / h + 0.5)) + 2

    def _moments(self, fwhm: float) -> tuple[np.ndarray, np.ndarray | None, float, float, int]:
        c = self._cache
        if "h" in c and K.truncation_bound(c["h"], fwhm, self.order) <= max(
                REUSE_TOLERANCE, K.truncation_bound(fwhm / self.bins_per_fwhm, fwhm,
                                                    self.order)):
            return c["hist"], c["hist_comp"], c["e_lo"], c["h"], c["n_fine"]
        e = self.sticks.energy
        e_lo, h, n_fine = self.fine_grid(fwhm)
        progress = bool(self.info.get("progress", False))
        hist = _deposit(self.tbin, e, self.sticks.weight, n_time=self.n_time, e_lo=e_lo, h=h,
                        n_fine=n_fine, order=self.order, tfrac=self.tfrac, progress=progress)
        hist_comp = None
        if self.comp is not None:
            src = self.comp_src
            tb = self.tbin if src is None else self.tbin[src]
            tf = None if self.tfrac is None else (self.tfrac if src is None else self.tfrac[src])
            ee = e if src is None else e[src]
            ww = self.sticks.weight if self.comp_weight is None else self.comp_weight
            hist_comp = _deposit(tb, ee, ww, n_time=self.n_time, e_lo=e_lo, h=h,
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
            return K.time_matrix(delays, self.times, sigma=None, t_known=self.t_known)
        lo = min(float(delays.min()), self.grid_start) - TIME_CUTOFF * sigma
        j_lo = int(math.floor((lo - self.grid_start) / dt)) - 1
        ext = self.grid_start + dt * np.arange(j_lo, self.n_time)
        c = K.time_matrix(delays, ext, sigma=sigma, t_known=self.t_known, cutoff=TIME_CUTOFF,
                          t_launch=0.0 if self.grid_start == 0.0 else None)
        return np.ascontiguousarray(c[:, -j_lo:])

    def broaden(
        self,
        *,
        energies: npt.ArrayLike,
        delays: npt.ArrayLike,
        probe: GaussianPulse | None = None,
        pump: GaussianPulse | None = None,
        resolution: float = 0.0,
        convolve: bool = True,
        normalise: str = "alive",
    ) -> TRPESMap:
        """Broaden the cached sticks into a map.

        Parameters
        ----------
        energies : array_like, shape (n_energies,)
            Kinetic energies in eV.
        delays : array_like, shape (n_delays,)
            Delays in fs.
        probe : GaussianPulse, optional
            A probe with another width (same photon energy and photon count as the
            sticks were made with); default the model's probe.
        pump : GaussianPulse, optional
            Needed for ``convolve=True``; without a pump the pump is taken as
            infinitely short (cross-correlation = the probe alone).
        resolution : float
            Instrument FWHM in eV, added in quadrature.
        convolve : bool
            Convolve with the cross-correlation (signal at negative delays) or
            return the pure signal.
        normalise : {"alive", "initial"}

        Returns
        -------
        TRPESMap
        """
        energies = _check_grid(energies, "energies")
        delays = _check_grid(delays, "delays")
        resolution = _check_nonneg(resolution, "resolution")
        probe = _check_pulse(probe, "probe", optional=True) or self.probe
        pump = _check_pulse(pump, "pump", optional=True)
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
        cmat = self.time_weights(delays, sigma=sigma)
        cmat = cmat * norm[None, :]
        bmat = K.broadening_blocks(energies, e_lo=e_lo, h=h, n_fine=n_fine, fwhm=fwhm,
                                 order=self.order)
        total = K.assemble(hist, bmat, cmat)[0]
        components: dict[str, np.ndarray] = {}
        if hist_comp is not None:
            comps = K.assemble(hist_comp, bmat, cmat)
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
            resolution=resolution,
            fwhm_energy=fwhm,
            convolve=bool(convolve),
            sigma_cc=sigma,
            normalise=normalise,
            by=self.by,
            time_step=self.time_step,
            t_end=self.t_known,
            edge_delay=(self.t_known - EDGE_SIGMAS * sigma) if sigma else self.t_known,
            order=self.order,
            bins_per_fwhm=self.bins_per_fwhm,
            energy_truncation="point-sampled; no signal below 0 eV (area below 0 discarded)",
        )
        m = TRPESMap(energies=energies, delays=delays, intensity=total, components=components,
                     alive=alive, alive_count=count, params=params)
        object.__setattr__(m, "_model", self)
        return m


def _deposit(tbin, energy, weight, *, progress: bool, **kw) -> np.ndarray:
    n = energy.shape[0]
    block = 8 * K.DEFAULT_CHUNK
    if n <= block or not progress:
        return K.deposit_moments(tbin, energy, weight, **kw)
    from tqdm.auto import tqdm

    comp = kw.pop("comp", None)
    tfrac = kw.pop("tfrac", None)
    out = None
    for s in tqdm(range(0, n, block), desc="depositing sticks", unit="block"):
        sl = slice(s, s + block)
        part = K.deposit_moments(tbin[sl], energy[sl], weight[sl],
                                 comp=None if comp is None else comp[sl],
                                 tfrac=None if tfrac is None else tfrac[sl], **kw)
        if out is None:
            out = part
        else:
            out += part  # in place: no fresh histogram-sized array per block
    return out


def _time_grid(ens: Ensemble, time_step: float | None) -> tuple[float, float, np.ndarray,
                                                                np.ndarray | None, int]:
    time = ens.snapshots["time"].to_numpy()
    traj = ens.snapshots["traj"].to_numpy()
    if time_step is None:
        dt_all = np.diff(time)[traj[1:] == traj[:-1]]
        dt = float(np.median(dt_all)) if dt_all.size else 1.0
    else:
        dt = _check_nonneg(time_step, "time_step")
        if dt == 0:
            raise SchemaError("The 'time_step' parameter must be > 0.")
    start = math.floor(float(time.min()) / dt + 1e-9) * dt if time.size else 0.0
    start = min(start, 0.0)
    pos = (time - start) / dt
    j = np.floor(pos + 1e-9).astype(np.int64)
    frac = pos - j
    frac[np.abs(frac) < 1e-9] = 0.0
    n_time = int(j.max()) + 2 if j.size else 2
    return start, dt, j, (frac if np.any(frac > 0) else None), n_time


def prepare_sticks(
    ens: Ensemble,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    by: str | None = None,
    time_step: float | None = None,
    order: int = DEFAULT_ORDER,
    bins_per_fwhm: float = DEFAULT_BINS_PER_FWHM,
    progress: bool = True,
) -> TRPESModel:
    """Compute the raw sticks of an ensemble for a probe and cache them for broadening.

    Parameters
    ----------
    ens : Ensemble
        Needs ``energies``, ``cation_energies`` and ``dyson``.
    probe : GaussianPulse
        Probe pulse (photon energy, n_photons, width).
    pump : GaussianPulse, optional
        Used for doorway weights.
    cross_section : str, CrossSection or callable
        See :func:`ensemblelab.compute.spectroscopy.cross_sections.resolve_cross_section`.
    weights : {"doorway", "uniform"} or str
        See :func:`trajectory_weights`.
    by : {None, "neutral", "cation", "pair", "diabatic"}
        Decomposition to prepare.
    time_step : float, optional
        Internal time grid step in fs; default the median trajectory step.
    order, bins_per_fwhm : int, float
        Accuracy knobs of the fast kernel (see :mod:`._kernels_trpes`).
    progress : bool
        Show a progress bar for large ensembles.

    Returns
    -------
    TRPESModel
    """
    if not isinstance(ens, Ensemble):
        raise SchemaError(f"ens must be an Ensemble; got {type(ens).__name__}.")
    probe = _check_pulse(probe, "probe")
    pump = _check_pulse(pump, "pump", optional=True)
    if by not in _BY:
        raise SchemaError(f"The 'by' parameter must be one of {list(_BY)}. Got {by!r} instead.")
    if not isinstance(order, int) or order < 1:
        raise SchemaError(f"The 'order' parameter must be an int >= 1. Got {order!r} instead.")
    if ens.cation_energies is None or ens.dyson is None:
        raise SchemaError(
            "compute_trpes needs ens.cation_energies and ens.dyson (squared Dyson norms). "
            "Hint: load an ensemble whose snapshots carry cation energies and Dyson norms."
        )
    cs = resolve_cross_section(cross_section)
    w_traj, weights_used = trajectory_weights(ens, weights=weights, pump=pump)
    n = ens.n_snapshots
    tix = ens.traj_index
    w_snap = w_traj[tix]
    start, dt, tbin_snap, tfrac_snap, n_time = _time_grid(ens, time_step)
    alive = K.deposit_counts(tbin_snap, w_snap, n_time=n_time, tfrac=tfrac_snap)
    alive_count = K.deposit_counts(tbin_snap, np.ones(n), n_time=n_time, tfrac=tfrac_snap)
    active = ens.snapshots["active"].to_numpy()
    rows = np.arange(n)
    e_neutral = ens.energies[rows, active]
    ip = ens.cation_energies - e_neutral[:, None]
    ekin = probe.total_energy - ip
    is_open = ekin > 0
    snap, chan = np.nonzero(is_open)
    dyson = ens.active_dyson()
    sigma = np.asarray(cs(dyson[snap, chan], ekin[snap, chan], ip[snap, chan], chan,
                          probe.total_energy), dtype=float)
    if sigma.shape != snap.shape or not np.all(np.isfinite(sigma)) or np.any(sigma < 0):
        raise SchemaError("the cross-section model must return finite values >= 0, one per "
                          "stick.")
    time = ens.snapshots["time"].to_numpy()
    columns = {"snapshot": snap, "traj": ens.snapshots["traj"].to_numpy()[snap],
               "time": time[snap], "state": active[snap], "channel": chan,
               "energy": ekin[snap, chan], "weight": w_snap[snap] * sigma}
    for name, arr in columns.items():  # made here, owned by nobody else: hand over
        if arr.dtype == (np.float64 if name in ("time", "energy", "weight") else np.int64):
            arr.setflags(write=False)
    sticks = StickSpectrum(
        **columns,
        info={"photon_energy": probe.photon_energy, "n_photons": probe.n_photons,
              "cross_section": _describe(cs), "weights": weights_used},
    )
    n_states, n_cat = ens.n_states, ens.n_cation
    comp = comp_src = comp_weight = None
    labels: list[str] = []
    if by == "neutral":
        labels = list(ens.state_labels)
        comp = sticks.state
    elif by == "cation":
        labels = list(ens.cation_labels)
        comp = sticks.channel
    elif by == "pair":
        labels = [f"{a}->{b}" for a in ens.state_labels for b in ens.cation_labels]
        comp = sticks.state * n_cat + sticks.channel
    elif by == "diabatic":
        if ens.adt is None:
            raise SchemaError(
                "by='diabatic' needs ens.adt (adiabatic-to-diabatic matrices). Hint: build "
                "them with ensemblelab.compute.spectroscopy.ensemble_adt (Loewdin, local "
                "diabatisation or Boys) "
                "and ens.replace(adt=...)."
            )
        fa = ens.adt[sticks.snapshot, sticks.state, :] ** 2  # (n_sticks, n_states)
        if ens.adt_cation is not None:
            fb = ens.adt_cation[sticks.snapshot, sticks.channel, :] ** 2
        else:
            fb = np.zeros((sticks.n_sticks, n_cat))
            fb[np.arange(sticks.n_sticks), sticks.channel] = 1.0
        meta = ens.metadata
        dl = list(meta.get("diabatic_labels") or [f"d{lab}" for lab in ens.state_labels])
        cl = list(meta.get("cation_diabatic_labels") or [f"d{lab}" for lab in ens.cation_labels])
        labels = [f"{a}->{b}" for a in dl for b in cl]
        frac = (fa[:, :, None] * fb[:, None, :]).reshape(sticks.n_sticks, -1)
        keep = frac > 0
        comp_src, comp = np.nonzero(keep)
        comp_weight = sticks.weight[comp_src] * frac[comp_src, comp]
    model = TRPESModel(
        sticks=sticks, probe=probe, by=by, labels=labels, grid_start=start, time_step=dt,
        n_time=n_time, alive=alive, alive_count=alive_count, total_weight=float(w_traj.sum()),
        t_known=float(time.max()) if n else 0.0,
        tbin=tbin_snap[snap], tfrac=None if tfrac_snap is None else tfrac_snap[snap],
        comp=comp, comp_src=comp_src, comp_weight=comp_weight,
        info={"cross_section": _describe(cs), "weights": weights_used,
              "n_sticks": sticks.n_sticks, "n_snapshots": n,
              "n_trajectories": ens.n_trajectories, "progress": progress,
              "n_states": n_states, "n_cation": n_cat},
        order=order, bins_per_fwhm=float(bins_per_fwhm), ens_id=id(ens), n_snapshots=n,
    )
    return model


def compute_trpes(
    ens: Ensemble,
    *,
    probe: GaussianPulse,
    pump: GaussianPulse | None = None,
    energies: npt.ArrayLike,
    delays: npt.ArrayLike,
    resolution: float = 0.0,
    convolve: bool = True,
    cross_section: str | CrossSection | Any = "dyson",
    weights: str = "doorway",
    normalise: str = "alive",
    by: str | None = None,
    progress: bool = True,
    time_step: float | None = None,
    client: Any = None,
) -> TRPESMap:
    """Simulated TRPES map of an ensemble (classical doorway-window, eq. 1.4, 1.5, 2.3).

    Parameters
    ----------
    ens : Ensemble
        With ``energies``, ``cation_energies`` (common zero) and ``dyson``.
    probe : GaussianPulse
        Probe: photon energy (eV), intensity FWHM (fs), ``n_photons``.
    pump : GaussianPulse, optional
        Pump: sets the doorway weights (with ``weights="doorway"``) and the
        cross-correlation. Without it the cross-correlation is the probe alone.
    energies : array_like, shape (n_energies,)
        Photoelectron kinetic energies in eV (values < 0 get no signal).
    delays : array_like, shape (n_delays,)
        Pump-probe delays in fs.
    resolution : float
        Instrument energy resolution (FWHM, eV), added in quadrature to the probe
        bandwidth.
    convolve : bool
        True: convolve with the pump-probe cross-correlation (signal at negative
        delays). False: the pure doorway-window signal.
    cross_section : {"dyson", "hydrogenic", "anion-threshold"}, CrossSection or callable
        Cross-section model (see :mod:`ensemblelab.compute.spectroscopy.cross_sections`).
    weights : {"doorway", "uniform"} or str
        Trajectory weights (see :func:`trajectory_weights`).
    normalise : {"alive", "initial"}
        Divide by the alive weight at each time (eq. 1.5) or by the weight at t = 0.
    by : {None, "neutral", "cation", "pair", "diabatic"}
        Additive decomposition stored in ``components``.
    progress : bool
        Progress bar for large ensembles.
    time_step : float, optional
        Internal time grid step (fs); default the median trajectory step.
    client : dask.distributed.Client, optional
        For a lazy ensemble (``load(path, lazy=True)``): run the per-chunk
        reduction on this cluster (default: Dask's default scheduler).

    Returns
    -------
    TRPESMap
        ``intensity`` in eV^-1 (per trajectory weight), ``alive`` weight per delay,
        ``params`` with everything used (``edge_delay``: later delays are affected by
        the end of the trajectories).

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    >>> ens = make_toy_ensemble(20, seed=1)
    >>> m = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
    ...                   energies=np.linspace(0, 2, 201), delays=np.arange(-50, 201, 10.0),
    ...                   by="neutral", progress=False)
    >>> m.shape, sorted(m.components)
    ((26, 201), ['S0', 'S1', 'S2'])
    """
    from .. import _dask

    if _dask.is_lazy(ens):  # chunked store: reduce chunk by chunk with Dask
        return _dask.compute_trpes(ens, probe=probe, pump=pump, energies=energies, delays=delays,
                                   resolution=resolution, convolve=convolve,
                                   cross_section=cross_section, weights=weights,
                                   normalise=normalise, by=by, progress=progress,
                                   time_step=time_step, client=client)
    model = prepare_sticks(ens, probe=probe, pump=pump, cross_section=cross_section,
                           weights=weights, by=by, time_step=time_step, progress=progress)
    fraction = ground_state_ionisation_fraction(ens, probe=probe)
    if fraction > 0:
        warnings.warn(
            f"compute_trpes: the probe ({probe.n_photons} x {probe.photon_energy} eV) can ionise "
            f"the ground state at {100 * fraction:.1f} % of the initial geometries, so a measured "
            "pump-on minus pump-off map would also hold a negative ground-state depletion term "
            "(method notes 1.5), which this map does not include. Hint: compare with measured "
            "maps only above the ground-state band, or lower the probe photon energy.",
            EnsembleWarning, stacklevel=2)
    return model.broaden(energies=energies, delays=delays, pump=pump, resolution=resolution,
                         convolve=convolve, normalise=normalise)


def ground_state_ionisation_fraction(ens: Ensemble, *, probe: GaussianPulse) -> float:
    """Weighted fraction of initial geometries at which the probe ionises the ground state.

    At the first snapshot of each trajectory (its initial, Wigner-sampled geometry) the
    ground state S0 is ionisable when ``n h-nu > E+_k - E_0`` for some cation state k.
    A non-zero fraction means a pump-on minus pump-off experiment also sees a
    ground-state depletion (bleach) term, absent from the doorway-window map.

    Parameters
    ----------
    ens : Ensemble
        Needs ``cation_energies``; without them the fraction is 0.
    probe : GaussianPulse
        The probe pulse (``n_photons * photon_energy`` is the total energy, eV).

    Returns
    -------
    float
        Fraction in [0, 1], weighted by the trajectory weights.
    """
    if ens.cation_energies is None or ens.n_snapshots == 0:
        return 0.0
    traj = ens.snapshots["traj"].to_numpy()
    first = np.r_[0, np.flatnonzero(traj[1:] != traj[:-1]) + 1]
    ip0 = ens.cation_energies[first] - ens.energies[first, 0][:, None]
    open_ = np.any(probe.total_energy - ip0 > 0, axis=1)
    w = ens.trajectories["weight"].to_numpy()
    total = float(w.sum())
    return float(w[open_].sum() / total) if total > 0 else 0.0


# ---------------------------------------------------------------------- contributions
def _model_for(ens: Ensemble, m: TRPESMap) -> TRPESModel:
    model = getattr(m, "_model", None)
    if isinstance(model, TRPESModel) and model.ens_id == id(ens) and \
            model.n_snapshots == ens.n_snapshots:
        return model
    probe, pump, cs, weights = _settings_from_params(m.params)
    return prepare_sticks(ens, probe=probe, pump=pump, cross_section=cs, weights=weights,
                          time_step=m.params.get("time_step"), progress=False)


def _settings_from_params(
    p: dict[str, Any],
) -> tuple[GaussianPulse, GaussianPulse | None, CrossSection, str]:
    """(probe, pump, cross-section model, weights) that made a map, from its ``params``
    (the model with its parameters: exponent, partial wave, tables)."""
    try:
        probe = GaussianPulse(**p["probe"])
        pump = GaussianPulse(**p["pump"]) if p.get("pump") else None
    except (KeyError, TypeError) as exc:
        raise SchemaError("trpes_map.params lacks the probe settings; pass a map made by "
                          "compute_trpes.") from exc
    cs = cross_section_from_description(p.get("cross_section") or {"model": "dyson"})
    w = p.get("weights", "doorway")
    weights = ("doorway" if w in ("doorway", "ensemble") else
               "uniform" if w == "uniform" else w.split(":", 1)[-1])
    return probe, pump, cs, weights


def _hat_integrals(times: np.ndarray, lo: float, hi: float, t_known: float) -> np.ndarray:
    """Integral over [lo, hi] of the linear-interpolation hat of each grid point."""
    dt = times[1] - times[0]
    out = np.zeros(times.size)

    def prim(x: np.ndarray) -> np.ndarray:  # integral of hat centred at 0 from -inf to x
        x = np.clip(x, -1.0, 1.0)
        return np.where(x < 0, 0.5 * (1 + x) ** 2, 1.0 - 0.5 * (1 - x) ** 2)

    hi = min(hi, t_known)
    if hi <= lo:
        return out
    out = dt * (prim((hi - times) / dt) - prim((lo - times) / dt))
    return out


def _region_intensity(ens: Ensemble, trpes_map: TRPESMap, energy_range: Sequence[float],
                      delay_range: Sequence[float]
                      ) -> tuple[np.ndarray, tuple[float, float], tuple[float, float]]:
    """Per-snapshot-row region intensity (n_snapshots,) and the checked ranges."""
    e1, e2 = (float(x) for x in energy_range)
    t1, t2 = (float(x) for x in delay_range)
    if not (e2 > e1 and t2 > t1):
        raise SchemaError(f"energy_range and delay_range must be (low, high) with low < high; "
                          f"got {energy_range!r}, {delay_range!r}.")
    model = _model_for(ens, trpes_map)
    p = trpes_map.params
    fwhm = float(p["fwhm_energy"])
    s_e = fwhm * FWHM_TO_SIGMA
    norm = model._norm(p.get("normalise", "alive"))
    times = model.times
    sigma = p.get("sigma_cc")
    if sigma:
        # integral over the delay window of the (edge-renormalised) kernel matrix,
        # by 8-point Gauss-Legendre on sub-intervals no longer than sigma_cc
        n_sub = max(1, int(math.ceil((t2 - t1) / sigma)))
        x, wq = np.polynomial.legendre.leggauss(8)
        edges = np.linspace(t1, t2, n_sub + 1)
        half = 0.5 * np.diff(edges)
        nodes = (edges[:-1, None] + half[:, None] * (x[None, :] + 1.0)).ravel()
        wts = (half[:, None] * wq[None, :]).ravel()
        tw = wts @ model.time_weights(nodes, sigma=sigma)
    else:
        tw = _hat_integrals(times, t1, t2, model.t_known)
    tw = tw * norm
    per_snap = _region_per_snapshot(model, tw, max(e1, 0.0), e2, s_e, ens.n_snapshots)
    return per_snap, (e1, e2), (t1, t2)


def region_intensity(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
) -> np.ndarray:
    """Region intensity of every snapshot, unsorted, in the ensemble's row order.

    The array :func:`contributions` sorts and groups: entry ``i`` is the integral
    over ``energy_range x delay_range`` of the part of the map made by snapshot row
    ``i`` of ``ens.snapshots`` (zero where it does not contribute). Its sum is the
    region total (``contributions(...).attrs["total"]``). No sort and no table: for
    interactive use, where a caller groups it (``np.bincount``) or picks the
    strongest rows (``np.argpartition``) itself.

    Parameters
    ----------
    ens : Ensemble
        The in-memory ensemble the map was computed from.
    trpes_map : TRPESMap
        A map from :func:`compute_trpes`.
    energy_range : (float, float)
        Kinetic energy window in eV.
    delay_range : (float, float)
        Delay window in fs.

    Returns
    -------
    ndarray of float, shape (n_snapshots,)
        Region intensity per snapshot row in fs (eV^-1 eV fs), all >= 0.
    """
    from .. import _dask

    if _dask.is_lazy(ens):
        raise SchemaError("region_intensity needs an in-memory ensemble; for a lazy "
                          "(chunked) ensemble use contributions(..., by=...) instead.")
    return _region_intensity(ens, trpes_map, energy_range, delay_range)[0]


def contributions(
    ens: Ensemble,
    trpes_map: TRPESMap,
    *,
    energy_range: Sequence[float],
    delay_range: Sequence[float],
    by: str = "snapshot",
    top: int | None = None,
    client: Any = None,
) -> pd.DataFrame:
    """Share of each snapshot (or group) in a region of a TRPES map.

    The region intensity is the integral of the map over
    ``energy_range x delay_range`` (eV x fs), decomposed exactly into sticks: a stick
    at time u and energy x with weight w contributes
    ``w / A(u) * int_E G(E - x) dE * int_tau K(tau - u) dtau`` where ``A`` is the
    normalisation (alive weight) and ``K`` the cross-correlation (or the linear
    interpolation hat when the map was not convolved). Energies below 0 count as
    no signal. The kernel is the one the map used (renormalised near the
    trajectories' end, see :func:`compute_trpes`); the delay integral is done by
    Gauss-Legendre quadrature, the energy integral with error functions.

    Parameters
    ----------
    ens : Ensemble
        The ensemble the map was computed from.
    trpes_map : TRPESMap
        A map from :func:`compute_trpes` (its params say how it was made).
    energy_range : (float, float)
        Kinetic energy window in eV.
    delay_range : (float, float)
        Delay window in fs.
    by : {"snapshot", "traj"} or str
        Group by snapshot, trajectory, or any column of ``ens.snapshots``.
    top : int, optional
        With ``by="snapshot"``: return only the `top` strongest snapshots (shares
        stay fractions of the whole region, ``attrs["total"]``). For interactive use.
    client : dask.distributed.Client, optional
        For a lazy ensemble: run the per-chunk work on this cluster.

    Returns
    -------
    DataFrame
        Sorted by ``intensity`` descending, rows with zero intensity dropped. For
        ``by="snapshot"``: ``snapshot``, ``traj``, ``time``, ``active``, ``intensity``
        (eV^-1 eV fs = fs), ``share`` (fraction of the region total). Otherwise the
        group key column, ``intensity``, ``share`` and ``n_snapshots``.
        ``attrs["total"]`` holds the region total.
    """
    from .. import _dask

    if _dask.is_lazy(ens):  # chunked store: per-chunk contributions with Dask
        return _dask.contributions(ens, trpes_map, energy_range=energy_range,
                                   delay_range=delay_range, by=by, client=client)
    if by not in ("snapshot", "traj") and by not in ens.snapshots.columns:
        raise SchemaError(f"The 'by' parameter must be 'snapshot', 'traj' or a column of "
                          f"ens.snapshots {list(ens.snapshots.columns)}. Got {by!r} instead.")
    per_snap, (e1, e2), (t1, t2) = _region_intensity(ens, trpes_map, energy_range,
                                                     delay_range)
    total = float(per_snap.sum())
    frame = ens.snapshots
    if by == "snapshot":
        keep = np.flatnonzero(per_snap > 0)
        if top is not None and top < keep.size:
            keep = keep[np.argpartition(-per_snap[keep], top - 1)[:top]]
        order = keep[np.argsort(-per_snap[keep], kind="stable")]
        out = pd.DataFrame({
            "snapshot": frame["snapshot"].to_numpy()[order],
            "traj": frame["traj"].to_numpy()[order],
            "time": frame["time"].to_numpy()[order],
            "active": frame["active"].to_numpy()[order],
            "intensity": per_snap[order],
        })
    else:
        keys = frame[by].to_numpy()
        codes, uniques = pd.factorize(keys, sort=True)
        grp = np.bincount(codes, per_snap, minlength=len(uniques))
        cnt = np.bincount(codes[per_snap > 0], minlength=len(uniques))
        keep = np.flatnonzero(grp > 0)
        order = keep[np.argsort(-grp[keep], kind="stable")]
        out = pd.DataFrame({by: np.asarray(uniques)[order], "intensity": grp[order],
                            "n_snapshots": cnt[order]})
    out["share"] = out["intensity"] / total if total > 0 else 0.0
    out.attrs["total"] = total
    out.attrs["energy_range"] = (e1, e2)
    out.attrs["delay_range"] = (t1, t2)
    return out


def _region_per_snapshot(model: TRPESModel, tw: np.ndarray, lo_e: float, hi_e: float,
                         s_e: float, n_snapshots: int) -> np.ndarray:
    """Region intensity of every snapshot row, shape (n_snapshots,).

    ``tw`` (n_time,) holds the normalised delay-window weight of each time-grid point.
    Sticks are kept sorted by energy (contiguous slices, no gathers); sticks further
    than 9 sigma inside the energy window have an energy weight of exactly 1.0 in
    double precision, so only the two edge slices need error functions (one each when
    the window is wider than 18 sigma: the far edge's term is then 1 or 0). The time
    weight is applied per snapshot (all sticks of a snapshot share it).
    """
    sticks = model.sticks
    c = model._cache
    if "e_sorted" not in c:
        order = np.argsort(sticks.energy, kind="stable")
        c["e_sorted"] = sticks.energy[order]
        c["w_sorted"] = sticks.weight[order]
        c["s_sorted"] = sticks.snapshot[order]
        tb = np.zeros(n_snapshots, dtype=np.int64)
        tb[sticks.snapshot] = model.tbin
        c["tbin_snap"] = tb
        if model.tfrac is not None:
            tf = np.zeros(n_snapshots)
            tf[sticks.snapshot] = model.tfrac
            c["tfrac_snap"] = tf
    e_sorted, w_sorted, s_sorted = c["e_sorted"], c["w_sorted"], c["s_sorted"]
    span = 9.0 * s_e
    a, a2, b2, b = np.searchsorted(e_sorted, [lo_e - span, lo_e + span, hi_e - span,
                                              hi_e + span])
    per_snap = np.zeros(n_snapshots)
    wide = hi_e - lo_e >= 2.0 * span  # each edge slice is >= 9 sigma from the other edge
    if a2 < b2:  # interior: erf weight is 1.0 to double precision
        per_snap += np.bincount(s_sorted[a2:b2], w_sorted[a2:b2], minlength=n_snapshots)
        edges = [(a, a2, "low"), (b2, b, "high")]
    else:
        edges = [(a, b, "both")]
    for i, j, side in edges:
        if j <= i:
            continue
        x = e_sorted[i:j]
        if wide and side == "low":  # ndtr((hi - x) / s) is 1.0 in double precision here
            ew = ndtr((x - lo_e) / s_e)
        elif wide and side == "high":  # ndtr((lo - x) / s) < 1.2e-19 here
            ew = ndtr((hi_e - x) / s_e)
        else:
            ew = ndtr((hi_e - x) / s_e) - ndtr((lo_e - x) / s_e)
        per_snap += np.bincount(s_sorted[i:j], w_sorted[i:j] * ew, minlength=n_snapshots)
    tb = c["tbin_snap"]
    if model.tfrac is None:
        dw = tw[tb]
    else:
        f = c["tfrac_snap"]
        dw = (1.0 - f) * tw[tb] + f * tw[np.minimum(tb + 1, tw.size - 1)]
    per_snap *= dw
    return per_snap
