"""Photoionisation cross-section models for the TRPES window function.

Every model is a callable object ``model(dyson, energy, ip, channel, photon_energy)``
returning the cross section of each stick (arbitrary but consistent units):

* :class:`DysonNorm` (default, ``"dyson"``): ``sigma = ||phi_D||^2``.
* :class:`DysonTimes`: ``||phi_D||^2 * f(E_kin)`` with a user function or a table of
  kinetic energy (per channel or shared), linearly interpolated.
* :class:`HydrogenicCoulomb` (``"hydrogenic"``): the exact photoionisation cross
  section of a hydrogenic 1s orbital into Coulomb continuum waves, with the binding
  energy set to the stick's ionisation energy. **Finite at threshold**, as for every
  neutral ionised to a cation (the Coulomb field of the cation); falls as E^(-7/2) far
  above.
* :class:`AnionThresholdLaw` (``"anion-threshold"``): ``||phi_D||^2 * E^(l + 1/2)``, the
  Wigner threshold law, and :class:`HydrogenicPWA` (``"anion-hydrogenic"``): the
  plane-wave cross section of a hydrogenic 1s orbital, ``omega k^3 zeta^5 / (zeta^2 +
  k^2)^6``, which vanishes as E^(3/2) at threshold (a p wave without Coulomb field, the
  same law). Both hold for **photodetachment of anions** only (short-range final-state
  interaction); for a neutral ionised to a cation the cross section stays finite at
  threshold, so they are never a default and the bare names ``"threshold"`` and
  ``"hydrogenic-pwa"`` are refused.

Which applies when: neutral -> cation (the usual TRPES): ``"dyson"`` (default) or
``"hydrogenic"``; anion -> neutral (photodetachment): ``"anion-threshold"`` or
``"anion-hydrogenic"``. Every model is evaluated at the stick's kinetic energy, clipped
at 0 for the sticks from the tail of the probe spectrum just below threshold.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from ...units import HARTREE_EV

__all__ = [
    "CrossSection",
    "DysonNorm",
    "DysonTimes",
    "HydrogenicPWA",
    "HydrogenicCoulomb",
    "AnionThresholdLaw",
    "hydrogenic_factor",
    "hydrogenic_coulomb_cross_section",
    "resolve_cross_section",
    "cross_section_from_description",
    "describe_cross_section",
]


class CrossSection:
    """Base class: ``__call__(dyson, energy, ip, channel, photon_energy) -> sigma``.

    All arguments are arrays of shape (n_sticks,) except `photon_energy`
    (``n h nu`` in eV): squared Dyson norms, kinetic energies (eV, > 0),
    ionisation energies (eV) and cation channel indices.
    """

    name = "custom"

    def __call__(self, dyson: np.ndarray, energy: np.ndarray, ip: np.ndarray,
                 channel: np.ndarray, photon_energy: float) -> np.ndarray:
        raise NotImplementedError

    def describe(self) -> dict[str, Any]:
        """A JSON-friendly description (stored in map parameters)."""
        return {"model": self.name}


@dataclass(frozen=True)
class DysonNorm(CrossSection):
    """``sigma = ||phi_D||^2`` (model M0; the default)."""

    name: str = field(default="dyson", init=False)

    def __call__(self, dyson, energy, ip, channel, photon_energy):  # noqa: D102
        return np.asarray(dyson, dtype=float)


@dataclass(frozen=True)
class DysonTimes(CrossSection):
    """``sigma = ||phi_D||^2 * f(E_kin)`` with a user function or table.

    Parameters
    ----------
    factor : callable or (energies, values) or mapping channel -> (energies, values)
        ``f(energy, channel) -> array`` (vectorised, energy in eV); or a table of
        kinetic energies (eV, increasing) and factors used for every channel; or
        one table per cation channel index. Tables are linearly interpolated and
        held constant beyond their ends.

    Examples
    --------
    >>> import numpy as np
    >>> cs = DysonTimes(([0.0, 2.0], [0.0, 1.0]))
    >>> cs(np.array([0.5]), np.array([1.0]), np.array([4.0]), np.array([0]), 5.0)
    array([0.25])
    """

    factor: Any = None
    name: str = field(default="dyson-times", init=False)

    def __post_init__(self) -> None:
        f = self.factor
        if callable(f):
            return
        tables = f if isinstance(f, Mapping) else {None: f}
        for key, tab in tables.items():
            try:
                e, v = (np.asarray(x, dtype=float) for x in tab)
            except (TypeError, ValueError) as exc:
                raise SchemaError(
                    "The 'factor' parameter of DysonTimes must be a callable, an (energies, "
                    f"values) pair or a mapping channel -> pair. Got {type(f).__name__}."
                ) from exc
            if e.ndim != 1 or e.shape != v.shape or e.size < 2 or np.any(np.diff(e) <= 0):
                raise SchemaError(
                    f"DysonTimes table for channel {key!r} must be two 1-D arrays of equal "
                    f"length >= 2 with increasing energies; got shapes {e.shape}, {v.shape}."
                )

    def __call__(self, dyson, energy, ip, channel, photon_energy):  # noqa: D102
        f = self.factor
        energy = np.asarray(energy, dtype=float)
        if callable(f):
            fac = np.asarray(f(energy, np.asarray(channel)), dtype=float)
        elif isinstance(f, Mapping):
            fac = np.zeros_like(energy)
            channel = np.asarray(channel)
            for k in np.unique(channel):
                if int(k) not in f:
                    raise SchemaError(
                        f"DysonTimes has no table for cation channel {int(k)}; tables for "
                        f"{sorted(f)}."
                    )
                e, v = (np.asarray(x, dtype=float) for x in f[int(k)])
                sel = channel == k
                fac[sel] = np.interp(energy[sel], e, v)
        else:
            e, v = (np.asarray(x, dtype=float) for x in f)
            fac = np.interp(energy, e, v)
        return np.asarray(dyson, dtype=float) * fac

    def describe(self) -> dict[str, Any]:
        """Name and factor; tables are stored in full (energies, values per channel or
        for ``"all"``) so that :func:`cross_section_from_description` can rebuild them."""
        f = self.factor
        if callable(f):
            return {"model": self.name, "factor": "callable"}
        tables = f if isinstance(f, Mapping) else {"all": f}
        return {"model": self.name, "factor": "table",
                "tables": {str(k): [np.asarray(x, dtype=float).tolist() for x in tab]
                           for k, tab in tables.items()}}


def hydrogenic_factor(energy: npt.ArrayLike, ip: npt.ArrayLike, *,
                      photon_energy: float | None = None,
                      zeta: npt.ArrayLike | None = None) -> np.ndarray:
    """Plane-wave cross section of a hydrogenic 1s orbital (derived here; from memory).

    ``omega k^3 zeta^5 / (zeta^2 + k^2)^6`` in atomic units, with ``k = sqrt(2 E)``
    and, unless given, ``zeta = sqrt(2 IP)``. Threshold behaviour ``E^(3/2)``
    (p wave); maximum at ``E = zeta^2 / 6`` hartree.

    Parameters
    ----------
    energy : array_like
        Kinetic energy in eV.
    ip : array_like
        Ionisation energy in eV (sets zeta when `zeta` is None).
    photon_energy : float, optional
        ``omega`` in eV; default ``energy + ip``.
    zeta : array_like, optional
        Orbital exponent in bohr^-1.

    Returns
    -------
    ndarray
        Relative cross section (arbitrary units, consistent across snapshots).

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.units import HARTREE_EV
    >>> r = hydrogenic_factor([0.01 * HARTREE_EV, 0.04 * HARTREE_EV], 1.0, zeta=1.0,
    ...                       photon_energy=1.0)
    >>> round(float(r[0] / r[1]), 6)
    0.176137
    """
    e = np.maximum(np.asarray(energy, dtype=float), 0.0) / HARTREE_EV
    ip_au = np.asarray(ip, dtype=float) / HARTREE_EV
    z = np.sqrt(2.0 * np.maximum(ip_au, 0.0)) if zeta is None else np.asarray(zeta, float)
    omega = (e + ip_au) if photon_energy is None else photon_energy / HARTREE_EV
    k2 = 2.0 * e
    return omega * k2**1.5 * z**5 / (z * z + k2) ** 6


def hydrogenic_coulomb_cross_section(energy: npt.ArrayLike, ip: npt.ArrayLike
                                     ) -> np.ndarray:
    """Photoionisation cross section (Mb) of a hydrogenic 1s orbital into Coulomb waves.

    ``sigma = (2^9 pi^2 alpha a0^2 / (3 Z^2)) (I / h nu)^4 exp(-4 eta arccot eta) /
    (1 - exp(-2 pi eta))`` with ``eta = sqrt(I / E)``, ``h nu = I + E`` and the binding
    energy ``I = Z^2 / 2`` hartree set to `ip` (the exact non-relativistic dipole
    result for hydrogen-like ions, from memory; hydrogen at threshold: 6.30e-18 cm^2).
    Finite at threshold (``E -> 0``: the factor tends to ``e^-4``).

    Parameters
    ----------
    energy : array_like
        Kinetic energy in eV (clipped at 0).
    ip : array_like
        Binding (ionisation) energy in eV (> 0).

    Returns
    -------
    ndarray
        Cross section in megabarn (1 Mb = 1e-18 cm^2).

    Examples
    --------
    >>> from ensemblelab.units import HARTREE_EV
    >>> round(float(hydrogenic_coulomb_cross_section(0.0, 0.5 * HARTREE_EV)), 3)
    6.304
    """
    from scipy.constants import physical_constants

    alpha = physical_constants["fine-structure constant"][0]
    a0_cm = physical_constants["Bohr radius"][0] * 100.0
    e = np.maximum(np.asarray(energy, dtype=float), 0.0)
    i = np.asarray(ip, dtype=float)
    z2 = 2.0 * np.maximum(i, 1e-300) / HARTREE_EV  # Z^2 = 2 I (hartree)
    x = np.sqrt(e / np.maximum(i, 1e-300))  # 1 / eta
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        small = x < 1e-6
        xs = np.where(small, 1.0, x)
        eta_arccot = np.where(small, 1.0 - x * x / 3.0, np.arctan(xs) / xs)
        denom = np.where(small, 1.0, -np.expm1(-2.0 * np.pi / xs))
    sigma0 = 2.0**9 * np.pi**2 * alpha * a0_cm**2 / 3.0 / 1e-18  # Mb, Z = 1
    return sigma0 / z2 * (i / (i + e)) ** 4 * np.exp(-4.0 * eta_arccot) / denom


@dataclass(frozen=True)
class HydrogenicCoulomb(CrossSection):
    """``sigma = ||phi_D||^2 * hydrogenic_coulomb_cross_section(E, IP)`` (Mb).

    The Coulomb-wave hydrogenic model for a neutral ionised to a cation: finite at
    threshold (see the module docstring for which model applies when).
    """

    name: str = field(default="hydrogenic", init=False)

    def __call__(self, dyson, energy, ip, channel, photon_energy):  # noqa: D102
        return np.asarray(dyson, dtype=float) * hydrogenic_coulomb_cross_section(energy, ip)


@dataclass(frozen=True)
class HydrogenicPWA(CrossSection):
    """``sigma = ||phi_D||^2 * hydrogenic_factor(E, IP)`` (plane waves, model M3).

    Vanishes as E^(3/2) at threshold, the Wigner law of :class:`AnionThresholdLaw`
    (l = 1): for **anion photodetachment** only (for neutrals use
    :class:`HydrogenicCoulomb`, ``"hydrogenic"``).

    Parameters
    ----------
    zeta : float, optional
        Fixed orbital exponent in bohr^-1; default ``sqrt(2 IP)`` per stick.
    """

    zeta: float | None = None
    name: str = field(default="anion-hydrogenic", init=False)

    def __call__(self, dyson, energy, ip, channel, photon_energy):  # noqa: D102
        return np.asarray(dyson, dtype=float) * hydrogenic_factor(
            energy, ip, photon_energy=photon_energy, zeta=self.zeta)

    def describe(self) -> dict[str, Any]:  # noqa: D102
        return {"model": self.name, "zeta": self.zeta}


@dataclass(frozen=True)
class AnionThresholdLaw(CrossSection):
    """``sigma = ||phi_D||^2 * (E / 1 eV)^(l + 1/2)``: Wigner threshold law.

    Only for photodetachment of **anions** (short-range final-state interaction).
    Do not use for neutral molecules ionised to cations: the Coulomb tail keeps
    their cross section finite at threshold.

    Parameters
    ----------
    l : int, default 1
        Lowest outgoing partial wave (detachment from an s-like orbital gives a
        p wave, l = 1, i.e. E^(3/2); from a p-like orbital an s wave, E^(1/2)).
    """

    l: int = 1
    name: str = field(default="anion-threshold", init=False)

    def __post_init__(self) -> None:
        if isinstance(self.l, bool) or not isinstance(self.l, int) or self.l < 0:
            raise SchemaError(f"AnionThresholdLaw l must be an int >= 0; got {self.l!r}.")

    def __call__(self, dyson, energy, ip, channel, photon_energy):  # noqa: D102
        e = np.maximum(np.asarray(energy, dtype=float), 0.0)
        return np.asarray(dyson, dtype=float) * e ** (self.l + 0.5)

    def describe(self) -> dict[str, Any]:  # noqa: D102
        return {"model": self.name, "l": self.l}


_NAMED: dict[str, Callable[[], CrossSection]] = {
    "dyson": DysonNorm,
    "hydrogenic": HydrogenicCoulomb,
    "anion-threshold": AnionThresholdLaw,
    "anion-hydrogenic": HydrogenicPWA,
}


def cross_section_from_description(desc: Mapping[str, Any]) -> CrossSection:
    """Rebuild a cross-section model from its :meth:`CrossSection.describe` dictionary
    (as stored in ``TRPESMap.params["cross_section"]``), parameters included.

    Parameters
    ----------
    desc : mapping
        ``{"model": name, ...}``: ``zeta`` (bohr^-1 or None) for ``"hydrogenic"``,
        ``l`` for ``"anion-threshold"``, ``tables`` for a tabulated ``"dyson-times"``.

    Returns
    -------
    CrossSection

    Raises
    ------
    SchemaError
        For a user function or a custom class (code cannot be stored in parameters)
        and for an unknown or malformed description.
    """
    name = desc.get("model", "dyson") if isinstance(desc, Mapping) else None
    try:
        if name == "dyson":
            return DysonNorm()
        if name == "hydrogenic":
            return HydrogenicCoulomb()
        if name == "anion-hydrogenic":
            z = desc.get("zeta")
            return HydrogenicPWA(zeta=None if z is None else float(z))
        if name == "anion-threshold":
            return AnionThresholdLaw(l=int(desc.get("l", 1)))
        if name == "dyson-times" and desc.get("factor") == "table":
            tabs = desc["tables"]
            if set(tabs) == {"all"}:
                return DysonTimes(tuple(tabs["all"]))
            return DysonTimes({int(k): tuple(v) for k, v in tabs.items()})
    except (KeyError, TypeError, ValueError) as exc:
        raise SchemaError(f"cross-section description {dict(desc)!r} is malformed ({exc}). "
                          "Hint: pass the map object returned by compute_trpes.") from exc
    raise SchemaError(
        f"the cross section {name!r} cannot be rebuilt from stored parameters (a user "
        "function or custom model holds code). Hint: pass the map object returned by "
        "compute_trpes for this ensemble (in memory), or use a table for DysonTimes."
    )


def resolve_cross_section(spec: str | CrossSection | Callable[..., Any]) -> CrossSection:
    """Turn a name, a model object or a plain ``f(energy, channel)`` into a model.

    Parameters
    ----------
    spec : {"dyson", "hydrogenic", "anion-threshold", "anion-hydrogenic"}, ...
        A name, a CrossSection or a callable.
        A plain callable is wrapped as ``DysonTimes(spec)``.

    Returns
    -------
    CrossSection
    """
    if isinstance(spec, CrossSection):
        return spec
    if isinstance(spec, str):
        if spec in _NAMED:
            return _NAMED[spec]()
        if spec == "hydrogenic-pwa":
            raise SchemaError(
                "cross_section='hydrogenic-pwa' is not offered: the plane-wave hydrogenic "
                "model vanishes as E^(3/2) at threshold, the anion photodetachment law (a "
                "neutral ionised to a cation has a finite cross section there). Hint: "
                "cross_section='hydrogenic' (Coulomb waves) for neutrals, "
                "'anion-hydrogenic' for anions."
            )
        if spec == "threshold":
            raise SchemaError(
                "cross_section='threshold' is not offered: the E^(l+1/2) threshold law holds "
                "for anion photodetachment only (a neutral ionised to a cation has a finite "
                "cross section at threshold). Hint: for anions pass "
                "cross_section='anion-threshold' or AnionThresholdLaw(l=...)."
            )
        raise SchemaError(
            f"The 'cross_section' parameter must be one of {sorted(_NAMED)}, a CrossSection or "
            f"a callable f(energy, channel). Got {spec!r} instead."
        )
    if callable(spec):
        return DysonTimes(spec)
    raise SchemaError(
        f"The 'cross_section' parameter must be a str, a CrossSection or a callable. Got "
        f"{type(spec).__name__} instead."
    )


def describe_cross_section(cs: CrossSection) -> dict[str, Any]:
    """``cs.describe()`` with non-finite floats as None (JSON-safe map params)."""
    d = cs.describe()
    return {k: (v if not isinstance(v, float) or math.isfinite(v) else None)
            for k, v in d.items()}
