"""Transform-limited Gaussian laser pulses: spectral widths, line shapes, cross-correlations.

Conventions: the temporal *intensity* envelope is
``I(t) = exp(-4 ln2 t^2 / T^2)`` with ``T`` the intensity FWHM in fs (what
experiments quote). Its spectral intensity has the FWHM
``Gamma = 4 ln2 hbar / T`` (eV), i.e. ``Gamma[eV] * T[fs] = 1.8249510 eV fs``.
An n-photon process goes with ``I^n``: its effective temporal FWHM is
``T / sqrt(n)`` and the spectral FWHM of the absorbed energy ``n h nu`` is
``sqrt(n) * Gamma``. The pump-probe intensity cross-correlation is a Gaussian
with ``T_cc^2 = T_pump^2 + T_probe,eff^2``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from ...units import FOUR_LN2, HBAR_EV_FS

__all__ = [
    "GaussianPulse",
    "FWHM_TO_SIGMA",
    "gaussian",
    "cross_correlation_fwhm",
    "cross_correlation_sigma",
    "cross_correlation",
]

#: sigma = FWHM * FWHM_TO_SIGMA for a Gaussian (1 / (2 sqrt(2 ln 2)))
FWHM_TO_SIGMA: float = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))


def gaussian(x: npt.ArrayLike, center: float | npt.ArrayLike, fwhm: float) -> np.ndarray:
    """Area-normalised Gaussian ``G(x; x0, Gamma)`` with FWHM `fwhm`.

    Parameters
    ----------
    x : array_like
        Where to evaluate.
    center : float or array_like (broadcast with `x`)
        Centre ``x0``.
    fwhm : float
        Full width at half maximum (> 0).

    Returns
    -------
    ndarray
        ``(2 sqrt(ln2/pi) / fwhm) exp(-4 ln2 (x - x0)^2 / fwhm^2)``.

    Examples
    --------
    >>> round(float(gaussian(1.0, 1.0, 0.060832)), 3)
    15.443
    """
    x = np.asarray(x, dtype=float)
    return (2.0 * math.sqrt(math.log(2.0) / math.pi) / fwhm) * np.exp(
        -FOUR_LN2 * (x - np.asarray(center, dtype=float)) ** 2 / fwhm**2
    )


@dataclass(frozen=True)
class GaussianPulse:
    """A transform-limited Gaussian pulse.

    Parameters
    ----------
    photon_energy : float
        Photon energy h*nu in eV (> 0).
    fwhm : float
        Temporal intensity FWHM ``T`` in fs (> 0).
    n_photons : int, default 1
        Photons absorbed per event (for a multiphoton probe).

    Examples
    --------
    >>> p = GaussianPulse(photon_energy=5.0, fwhm=30.0)
    >>> round(p.spectral_fwhm, 6)
    0.060832
    >>> round(GaussianPulse(photon_energy=2.5, fwhm=30.0, n_photons=2).effective_fwhm, 4)
    21.2132
    """

    photon_energy: float
    fwhm: float
    n_photons: int = 1

    def __post_init__(self) -> None:
        for name in ("photon_energy", "fwhm"):
            value = getattr(self, name)
            if not (isinstance(value, int | float | np.floating | np.integer)
                    and math.isfinite(float(value)) and float(value) > 0):
                raise SchemaError(
                    f"The {name!r} parameter of GaussianPulse must be a float in the range "
                    f"(0, inf). Got {value!r} instead."
                )
            object.__setattr__(self, name, float(value))
        n = self.n_photons
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or int(n) < 1:
            raise SchemaError(
                f"The 'n_photons' parameter of GaussianPulse must be an int >= 1. Got {n!r} "
                "instead."
            )
        object.__setattr__(self, "n_photons", int(n))

    # ------------------------------------------------------------------ widths
    @property
    def sigma(self) -> float:
        """Standard deviation of the single-photon intensity envelope in fs."""
        return self.fwhm * FWHM_TO_SIGMA

    @property
    def spectral_fwhm(self) -> float:
        """FWHM of the single-photon spectral intensity in eV: ``4 ln2 hbar / T``."""
        return FOUR_LN2 * HBAR_EV_FS / self.fwhm

    @property
    def effective_fwhm(self) -> float:
        """Temporal FWHM of ``I^n`` in fs: ``T / sqrt(n)``."""
        return self.fwhm / math.sqrt(self.n_photons)

    @property
    def effective_sigma(self) -> float:
        """Standard deviation of ``I^n`` in fs."""
        return self.effective_fwhm * FWHM_TO_SIGMA

    @property
    def total_energy(self) -> float:
        """Energy delivered by one event, ``n h nu``, in eV."""
        return self.n_photons * self.photon_energy

    @property
    def effective_spectral_fwhm(self) -> float:
        """FWHM in eV of the distribution of ``n h nu``: ``sqrt(n) * 4 ln2 hbar / T``."""
        return math.sqrt(self.n_photons) * self.spectral_fwhm

    # ------------------------------------------------------------------ shapes
    def envelope(self, t: npt.ArrayLike) -> np.ndarray:
        """Temporal intensity envelope ``exp(-4 ln2 t^2 / T^2)`` (peak 1), `t` in fs."""
        t = np.asarray(t, dtype=float)
        return np.exp(-FOUR_LN2 * t**2 / self.fwhm**2)

    def effective_envelope(self, t: npt.ArrayLike) -> np.ndarray:
        """``envelope(t) ** n_photons`` (peak 1)."""
        return self.envelope(t) ** self.n_photons

    def spectral_intensity(self, energy: npt.ArrayLike) -> np.ndarray:
        """Single-photon spectral intensity at `energy` (eV), peak-normalised (1 at h*nu).

        ``exp(-4 ln2 (E - h nu)^2 / Gamma^2)`` with ``Gamma = spectral_fwhm``; this is
        the doorway factor ``I_pu`` of equation (1.3) at detuning ``h nu - E``.
        """
        e = np.asarray(energy, dtype=float)
        return np.exp(-FOUR_LN2 * (e - self.photon_energy) ** 2 / self.spectral_fwhm**2)

    def absorbed_spectral_intensity(self, energy: npt.ArrayLike) -> np.ndarray:
        """Peak-normalised spectrum of the absorbed energy ``n h nu`` at `energy` (eV).

        ``exp(-4 ln2 (E - n h nu)^2 / Gamma_n^2)`` with ``Gamma_n = sqrt(n) Gamma``
        (:attr:`effective_spectral_fwhm`): an n-photon transition driven by a
        transform-limited Gaussian pulse goes with the field to the n-th power, whose
        intensity ``I^n`` is a Gaussian sqrt(n) shorter, so its spectrum (the n-fold
        convolution of the one-photon spectrum with itself) is centred at ``n h nu``
        and sqrt(n) wider (derived here from the Gaussian Fourier transform; from
        memory). For ``n_photons = 1`` this is :meth:`spectral_intensity`. Used as the
        pump's doorway factor: a 2 x 2.4 eV pump selects states near 4.8 eV.
        """
        e = np.asarray(energy, dtype=float)
        return np.exp(-FOUR_LN2 * (e - self.total_energy) ** 2
                      / self.effective_spectral_fwhm**2)

    def open_fraction(self, excess: npt.ArrayLike) -> np.ndarray:
        """Fraction of the absorbed-energy spectrum able to ionise, at ``excess = n h nu - IP``.

        ``(1/2) [1 + erf(excess / (sqrt(2) sigma_n))]`` with ``sigma_n`` the standard
        deviation of :meth:`line_shape` (eV): the area above zero kinetic energy of
        the Gaussian ``G(E; excess, Gamma_n)`` (derived here). Continuous in the
        ionisation energy: 1/2 at threshold.

        Examples
        --------
        >>> p = GaussianPulse(photon_energy=5.0, fwhm=30.0)
        >>> [round(float(x), 5) for x in p.open_fraction([0.001, -0.001])]
        [0.51544, 0.48456]
        """
        from scipy.special import erf

        x = np.asarray(excess, dtype=float)
        sigma = self.effective_spectral_fwhm * FWHM_TO_SIGMA
        return 0.5 * (1.0 + erf(x / (math.sqrt(2.0) * sigma)))

    def line_shape(self, energy: npt.ArrayLike) -> np.ndarray:
        """Area-normalised distribution (eV^-1) of the absorbed energy ``n h nu``.

        A Gaussian centred at :attr:`total_energy` with FWHM
        :attr:`effective_spectral_fwhm`.
        """
        return gaussian(energy, self.total_energy, self.effective_spectral_fwhm)


def _check_pulse(p: object, name: str) -> GaussianPulse:
    if not isinstance(p, GaussianPulse):
        raise SchemaError(
            f"The {name!r} parameter must be a GaussianPulse. Got {type(p).__name__} instead."
        )
    return p


def cross_correlation_fwhm(pump: GaussianPulse, probe: GaussianPulse) -> float:
    """FWHM in fs of the pump-probe intensity cross-correlation.

    ``sqrt(T_pump^2 + (T_probe / sqrt(n_probe))^2)``; the pump counts as one photon
    (an n-photon pump would use its effective width too).

    Examples
    --------
    >>> cross_correlation_fwhm(GaussianPulse(photon_energy=4.0, fwhm=30.0),
    ...                        GaussianPulse(photon_energy=5.0, fwhm=40.0))
    50.0
    """
    pump = _check_pulse(pump, "pump")
    probe = _check_pulse(probe, "probe")
    return math.hypot(pump.effective_fwhm, probe.effective_fwhm)


def cross_correlation_sigma(pump: GaussianPulse, probe: GaussianPulse) -> float:
    """Standard deviation in fs of the cross-correlation (``FWHM / 2.354820``)."""
    return cross_correlation_fwhm(pump, probe) * FWHM_TO_SIGMA


def cross_correlation(pump: GaussianPulse, probe: GaussianPulse,
                      delay: npt.ArrayLike) -> np.ndarray:
    """Normalised cross-correlation ``N(delay; 0, sigma_cc)`` in fs^-1 (unit area).

    Parameters
    ----------
    pump, probe : GaussianPulse
    delay : array_like
        Delays in fs.

    Returns
    -------
    ndarray
        Gaussian of area 1 with FWHM :func:`cross_correlation_fwhm`.
    """
    return gaussian(delay, 0.0, cross_correlation_fwhm(pump, probe))
