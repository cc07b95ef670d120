"""Instrument energy resolution of a photoelectron map: constant or proportional to energy.

``resolution=0.05`` (a float, eV) is a constant FWHM added in quadrature to the probe's
absorbed-energy width. ``resolution=ProportionalResolution(0.03)`` is a FWHM
``dE = c * E`` growing with the kinetic energy (common for velocity-map imaging
spectrometers, whose resolution is a fixed fraction of the energy; common practice),
optionally with a floor ``dE = sqrt(floor^2 + (c E)^2)``. Each stick is broadened with
the width at its own kinetic energy: ``Gamma(E) = sqrt(Gamma_probe^2 + dE(E)^2)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from .pulses import GaussianPulse

__all__ = ["ProportionalResolution", "Resolution", "check_resolution", "stick_fwhm",
           "describe_resolution", "resolution_from_params", "min_stick_fwhm"]


@dataclass(frozen=True)
class ProportionalResolution:
    """Energy resolution proportional to the kinetic energy: FWHM ``sqrt(floor^2 + (c E)^2)``.

    Parameters
    ----------
    fraction : float
        ``c = dE / E`` (dimensionless, >= 0), e.g. 0.03 for 3 %.
    floor : float
        Constant part in eV (FWHM, >= 0), added in quadrature.

    Examples
    --------
    >>> r = ProportionalResolution(0.05)
    >>> [round(float(x), 6) for x in r.fwhm([0.0, 2.0])]
    [0.0, 0.1]
    """

    fraction: float
    floor: float = 0.0

    def __post_init__(self) -> None:
        for name in ("fraction", "floor"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | float | np.floating | np.integer) \
                    or not math.isfinite(float(v)) or float(v) < 0:
                raise SchemaError(f"The {name!r} parameter of ProportionalResolution must be a "
                                  f"float >= 0. Got {v!r} instead.")
            object.__setattr__(self, name, float(v))

    def fwhm(self, energy: npt.ArrayLike) -> np.ndarray:
        """Instrument FWHM (eV) at kinetic energy `energy` (eV; negative taken as 0)."""
        e = np.maximum(np.asarray(energy, dtype=float), 0.0)
        return np.hypot(self.floor, self.fraction * e)

    def describe(self) -> dict[str, Any]:
        """JSON-friendly description (stored in map parameters)."""
        return {"model": "proportional", "fraction": self.fraction, "floor": self.floor}


Resolution = float | ProportionalResolution


def check_resolution(value: Any) -> Resolution:
    """A float >= 0 (constant FWHM, eV) or a :class:`ProportionalResolution`."""
    if isinstance(value, ProportionalResolution):
        return value
    if isinstance(value, dict):
        return resolution_from_params(value)
    if isinstance(value, bool) or not isinstance(value, int | float | np.floating | np.integer) \
            or not math.isfinite(float(value)) or float(value) < 0:
        raise SchemaError(
            f"The 'resolution' parameter must be a float >= 0 (FWHM in eV) or a "
            f"ProportionalResolution. Got {value!r} instead. Hint: "
            "ProportionalResolution(0.03) for dE = 3 % of E.")
    return float(value)


def stick_fwhm(probe: GaussianPulse, resolution: Resolution,
               energy: npt.ArrayLike | float) -> Any:
    """FWHM (eV) of a stick at kinetic energy `energy`: probe width and resolution in
    quadrature (a float for a constant resolution)."""
    g = probe.effective_spectral_fwhm
    if isinstance(resolution, ProportionalResolution):
        return np.hypot(g, resolution.fwhm(energy))
    return math.hypot(g, float(resolution))


def min_stick_fwhm(probe: GaussianPulse, resolution: Resolution) -> float:
    """The narrowest stick FWHM (eV) over all kinetic energies (at E = 0)."""
    return float(stick_fwhm(probe, resolution, 0.0))


def describe_resolution(resolution: Resolution) -> float | dict[str, Any]:
    """The float, or the model's description (for map parameters)."""
    if isinstance(resolution, ProportionalResolution):
        return resolution.describe()
    return float(resolution)


def resolution_from_params(value: Any) -> Resolution:
    """Rebuild a resolution from :func:`describe_resolution` output."""
    if isinstance(value, dict):
        if value.get("model") != "proportional":
            raise SchemaError(f"unknown resolution description {value!r}.")
        return ProportionalResolution(float(value.get("fraction", 0.0)),
                                      float(value.get("floor", 0.0)))
    return check_resolution(0.0 if value is None else value)
