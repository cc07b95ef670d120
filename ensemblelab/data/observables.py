"""Maps of further observables from the same ensemble: scattering and transient absorption.

* :class:`ScatteringMap`: time-resolved X-ray or electron scattering in the
  independent-atom model, on a (delay, q) grid (:func:`ensemblelab.compute_scattering`).
* :class:`AbsorptionMap`: transient absorption (differential absorption cross
  section) on a (delay, photon energy) grid with its bleach, stimulated-emission and
  excited-state-absorption components (:func:`ensemblelab.compute_transient_absorption`).

Both are immutable (frozen dataclasses with read-only arrays), have ``to_frame()`` and
``to_xarray()`` (the optional ``xarray`` extra) and are saved and loaded by
:mod:`ensemblelab.io.observable_maps` (``.npz`` without pickle). Units: delays in fs,
q in inverse Angstrom (``q = 4 pi sin(theta)/lambda``), photon energies in eV.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from .._optional import import_optional
from ..errors import SchemaError

__all__ = ["ScatteringMap", "AbsorptionMap", "json_safe"]


def _ro(a: Any, name: str, ndim: int) -> np.ndarray:
    arr = np.array(a, dtype=np.float64)
    if arr.ndim != ndim:
        raise SchemaError(f"{name} must be a {ndim}-D array; got shape {arr.shape}.")
    arr.setflags(write=False)
    return arr


def json_safe(value: Any) -> Any:
    """Numpy scalars/arrays and tuples turned into JSON-friendly values (recursively)."""
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float | int | str | bool) or value is None:
        return value
    return repr(value)


def _check_axis(arr: np.ndarray, name: str) -> None:
    if arr.size > 1 and np.any(np.diff(arr) <= 0):
        raise SchemaError(f"{name} must increase strictly; got {arr[:5]!r}...")


class _DelayMap:
    """Shared machinery: a (delay, axis) map with components, alive weight and params."""

    # fields of the subclasses (dataclasses); a plain base, so these are no fields here
    delays: np.ndarray
    components: dict[str, np.ndarray]
    alive: Any
    alive_count: Any
    params: dict[str, Any]
    __dataclass_fields__: ClassVar[dict[str, Any]]

    AXIS: ClassVar[str] = "axis"
    AXIS_COLUMN: ClassVar[str] = "axis"
    AXIS_UNIT: ClassVar[str] = ""
    VALUE_UNIT: ClassVar[str] = ""
    #: extra 2-D fields on the (delay, axis) grid, 1-D fields on the axis
    GRID_FIELDS: ClassVar[tuple[str, ...]] = ()
    AXIS_FIELDS: ClassVar[tuple[str, ...]] = ()

    def _validate_common(self) -> tuple[int, int]:
        set_ = object.__setattr__
        axis = _ro(getattr(self, self.AXIS), self.AXIS, 1)
        d = _ro(self.delays, "delays", 1)
        _check_axis(axis, self.AXIS)
        _check_axis(d, "delays")
        shape = (d.size, axis.size)
        set_(self, self.AXIS, axis)
        set_(self, "delays", d)
        for name in self.GRID_FIELDS:
            value = getattr(self, name)
            if value is None:
                continue
            arr = _ro(value, name, 2)
            if arr.shape != shape:
                raise SchemaError(f"{name} must have shape (n_delays, n_{self.AXIS}) = {shape}; "
                                  f"got {arr.shape}.")
            set_(self, name, arr)
        for name in self.AXIS_FIELDS:
            value = getattr(self, name)
            if value is None:
                continue
            arr = _ro(value, name, 1)
            if arr.shape != (axis.size,):
                raise SchemaError(f"{name} must have shape (n_{self.AXIS}={axis.size},); got "
                                  f"{arr.shape}.")
            set_(self, name, arr)
        comps: dict[str, np.ndarray] = {}
        for label, value in dict(self.components).items():
            c = _ro(value, f"components[{label!r}]", 2)
            if c.shape != shape:
                raise SchemaError(f"components[{label!r}] must have shape {shape}; got "
                                  f"{c.shape}.")
            comps[str(label)] = c
        set_(self, "components", comps)
        for name in ("alive", "alive_count"):
            value = getattr(self, name)
            arr = _ro(np.full(d.size, np.nan) if value is None else value, name, 1)
            if arr.shape != (d.size,):
                raise SchemaError(f"{name} must have shape (n_delays={d.size},); got "
                                  f"{arr.shape}.")
            set_(self, name, arr)
        set_(self, "params", json_safe(dict(self.params)))
        return shape

    @property
    def shape(self) -> tuple[int, int]:
        """(n_delays, n_axis)."""
        return (self.delays.size, getattr(self, self.AXIS).size)

    def component_sum(self) -> np.ndarray:
        """Sum of all components, shape (n_delays, n_axis) (zeros if there are none)."""
        total = np.zeros(self.shape)
        for arr in self.components.values():
            total = total + arr
        return total

    def replace(self, **changes: Any) -> Any:
        """A new map with some fields replaced."""
        fields_ = {name: getattr(self, name) for name in self.__dataclass_fields__}
        fields_.update(changes)
        return type(self)(**fields_)

    def arrays(self) -> dict[str, np.ndarray]:
        """Every array of the map by name (components as ``component:<label>``)."""
        out: dict[str, np.ndarray] = {}
        for name in self.__dataclass_fields__:
            value = getattr(self, name)
            if isinstance(value, np.ndarray):
                out[name] = value
        for label, arr in self.components.items():
            out[f"component:{label}"] = arr
        return out

    def _main(self) -> str:
        return self.GRID_FIELDS[0]

    def to_frame(self, *, components: bool = True) -> pd.DataFrame:
        """The main signal as a tidy long frame.

        Returns
        -------
        DataFrame
            Columns ``component`` (``"total"`` then each component), ``delay`` (fs), the
            axis (``q`` or ``photon_energy``), ``value`` and ``alive``; delay-major.
        """
        axis = getattr(self, self.AXIS)
        blocks = [("total", getattr(self, self._main()))]
        if components:
            blocks += list(self.components.items())
        nd, na = self.shape
        frames = [pd.DataFrame({"component": lab, "delay": np.repeat(self.delays, na),
                                self.AXIS_COLUMN: np.tile(axis, nd),
                                "value": arr.reshape(-1),
                                "alive": np.repeat(self.alive, na)})
                  for lab, arr in blocks]
        return pd.concat(frames, ignore_index=True)

    def to_xarray(self) -> Any:
        """The map as an ``xarray.Dataset`` with units and coordinates.

        Returns
        -------
        xarray.Dataset
            Coordinates ``delay`` (fs) and the map's axis (``q`` in 1/Angstrom or
            ``photon_energy`` in eV); every 2-D field and each
            component (``component_<label>``) as a variable with ``units``; ``alive``
            per delay; the parameters as a JSON string attribute ``params``.
            ``.to_netcdf(path)`` writes it as NetCDF.
        """
        import json

        xr = import_optional("xarray", extra="xarray", purpose="Map.to_xarray()")
        axis = self.AXIS_COLUMN  # singular dimension name: "q", "photon_energy"
        coords = {"delay": ("delay", np.array(self.delays), {"units": "fs"}),
                  axis: (axis, np.array(getattr(self, self.AXIS)), {"units": self.AXIS_UNIT})}
        data: dict[str, Any] = {}
        for name in self.GRID_FIELDS:
            value = getattr(self, name)
            if value is not None:
                data[name] = (("delay", axis), np.array(value), {"units": self.unit_of(name)})
        for name in self.AXIS_FIELDS:
            value = getattr(self, name)
            if value is not None:
                data[name] = ((axis,), np.array(value), {"units": self.unit_of(name)})
        for label, arr in self.components.items():
            data[f"component_{label}"] = (("delay", axis), np.array(arr),
                                          {"units": self.unit_of("components"),
                                           "label": label})
        data["alive"] = (("delay",), np.array(self.alive), {"units": "trajectory weight"})
        extra = self._extra_xarray()
        data.update(extra.pop("data", {}))
        coords.update(extra.pop("coords", {}))
        return xr.Dataset(data, coords=coords,
                          attrs={"kind": type(self).__name__,
                                 "params": json.dumps(self.params)})

    def _extra_xarray(self) -> dict[str, Any]:
        return {}

    def unit_of(self, name: str) -> str:
        """Unit of a field (for files and xarray)."""
        return self.VALUE_UNIT


@dataclass(frozen=True, eq=False, repr=False)
class ScatteringMap(_DelayMap):
    """Time-resolved scattering of an ensemble in the independent-atom model (immutable).

    Attributes
    ----------
    q : ndarray, shape (n_q,)
        Momentum transfer ``4 pi sin(theta)/lambda`` in inverse Angstrom (in electron
        diffraction often called ``s``; tabulations use ``sin(theta)/lambda = q/(4 pi)``).
    delays : ndarray, shape (n_delays,)
        Pump-probe delays in fs.
    intensity : ndarray, shape (n_delays, n_q)
        Isotropic scattering intensity of the pumped sample,
        ``reference + excitation_fraction * dI`` with ``dI`` the alive-normalised
        ensemble average of the excited molecules minus that of the molecules the pump
        removed (convolved with the cross-correlation when asked). Electron units squared
        for X-rays, Angstrom^2 for electrons. With fraction 1 and no convolution this is
        the alive-normalised ensemble average itself.
    reference : ndarray, shape (n_q,)
        Intensity of the reference (default: the ground-state initial conditions).
    percent_difference : ndarray, shape (n_delays, n_q)
        ``100 (intensity - reference) / reference``.
    components : dict of str to ndarray (n_delays, n_q)
        Additive decomposition of `percent_difference` (by active state or by the
        labels given as ``by=``); the components sum to it.
    atomic : ndarray, shape (n_q,)
        Atomic part ``sum_a f_a(q)^2`` (same for every geometry).
    delta_sm : ndarray, shape (n_delays, n_q)
        Modified-scattering difference ``q dI / atomic`` (inverse Angstrom), i.e.
        ``sM = q I_mol / I_at`` of the pumped sample minus that of the reference.
    r : ndarray, shape (n_r,)
        Distances (Angstrom) of the pair-distribution difference.
    delta_pdf : ndarray, shape (n_delays, n_r)
        ``integral delta_sm(q) sin(q r) exp(-k q^2) dq`` over the q grid (trapezoid), k =
        ``params["damping"]`` (Angstrom^2).
    alive, alive_count : ndarray, shape (n_delays,)
        Alive trajectory weight and number behind each delay (pure signal, interpolated).
    params : dict
        How the map was made (``kind``, pulses, weights, excitation fraction, ...;
        ``interval`` says how the band below was made, or that there is none).
    percent_lower, percent_upper : ndarray, shape (n_delays, n_q), or None
        Bootstrap percentile interval of `percent_difference` (``n_boot > 0``).
    """

    q: np.ndarray
    delays: np.ndarray
    intensity: np.ndarray
    reference: np.ndarray
    percent_difference: np.ndarray
    components: dict[str, np.ndarray] = field(default_factory=dict)
    atomic: np.ndarray | None = None
    delta_sm: np.ndarray | None = None
    r: np.ndarray | None = None
    delta_pdf: np.ndarray | None = None
    alive: np.ndarray | None = None
    alive_count: np.ndarray | None = None
    params: dict[str, Any] = field(default_factory=dict)
    percent_lower: np.ndarray | None = None
    percent_upper: np.ndarray | None = None

    AXIS: ClassVar[str] = "q"
    AXIS_COLUMN: ClassVar[str] = "q"
    AXIS_UNIT: ClassVar[str] = "1/Angstrom"
    GRID_FIELDS: ClassVar[tuple[str, ...]] = ("percent_difference", "intensity", "delta_sm",
                                              "percent_lower", "percent_upper")
    AXIS_FIELDS: ClassVar[tuple[str, ...]] = ("reference", "atomic")

    def __post_init__(self) -> None:
        self._validate_common()
        set_ = object.__setattr__
        if self.r is not None:
            r = _ro(self.r, "r", 1)
            set_(self, "r", r)
            if self.delta_pdf is not None:
                pdf = _ro(self.delta_pdf, "delta_pdf", 2)
                if pdf.shape != (self.delays.size, r.size):
                    raise SchemaError(f"delta_pdf must have shape (n_delays, n_r) = "
                                      f"{(self.delays.size, r.size)}; got {pdf.shape}.")
                set_(self, "delta_pdf", pdf)
        elif self.delta_pdf is not None:
            raise SchemaError("delta_pdf needs its distances r.")

    @property
    def kind(self) -> str:
        """``"xray"`` or ``"electron"``."""
        return str(self.params.get("kind", "xray"))

    def modified_scattering(self) -> tuple[np.ndarray, np.ndarray]:
        """Modified scattering ``sM = q I_mol / I_at`` of the pumped sample and the reference.

        Returns
        -------
        sm : ndarray, shape (n_delays, n_q)
            ``q (intensity - atomic) / atomic`` in inverse Angstrom (``s = q``).
        sm_reference : ndarray, shape (n_q,)
            The same for the reference; ``sm - sm_reference`` is :attr:`delta_sm`.
        """
        if self.atomic is None:
            raise SchemaError("this map holds no atomic scattering (atomic=None).")
        sm = self.q[None, :] * (self.intensity - self.atomic[None, :]) / self.atomic[None, :]
        ref = self.q * (self.reference - self.atomic) / self.atomic
        return sm, ref

    def unit_of(self, name: str) -> str:
        """Unit of a field."""
        sq = "electron units^2" if self.kind == "xray" else "Angstrom^2"
        return {"percent_difference": "percent", "components": "percent", "intensity": sq,
                "percent_lower": "percent", "percent_upper": "percent",
                "reference": sq, "atomic": sq, "delta_sm": "1/Angstrom",
                "delta_pdf": "1/Angstrom^2"}.get(name, "")

    def _extra_xarray(self) -> dict[str, Any]:
        if self.r is None or self.delta_pdf is None:
            return {}
        return {"coords": {"r": ("r", np.array(self.r), {"units": "Angstrom"})},
                "data": {"delta_pdf": (("delay", "r"), np.array(self.delta_pdf),
                                       {"units": self.unit_of("delta_pdf")})}}

    def __repr__(self) -> str:
        if not self.delays.size or not self.q.size:
            return "<ensemblelab.ScatteringMap (empty)>"
        return (f"<ensemblelab.ScatteringMap {self.kind}, {self.delays.size} delays x "
                f"{self.q.size} q; delay {self.delays[0]:.6g}..{self.delays[-1]:.6g} fs, q "
                f"{self.q[0]:.6g}..{self.q[-1]:.6g} 1/Angstrom; components: "
                f"{', '.join(self.components) or '-'}>")


@dataclass(frozen=True, eq=False, repr=False)
class AbsorptionMap(_DelayMap):
    """Transient absorption of an ensemble in the doorway-window picture (immutable).

    Attributes
    ----------
    photon_energies : ndarray, shape (n_energies,)
        Probe photon energies in eV.
    delays : ndarray, shape (n_delays,)
        Pump-probe delays in fs.
    intensity : ndarray, shape (n_delays, n_energies)
        Differential absorption cross section per excited molecule times the excitation
        fraction, in Angstrom^2 (pump on minus pump off; positive = more absorption,
        like delta-OD): ``GSB + SE + ESA``.
    components : dict of str to ndarray (n_delays, n_energies)
        ``"GSB"`` ground-state bleach (<= 0), ``"SE"`` stimulated emission (<= 0),
        ``"ESA"`` excited-state absorption (>= 0); they sum to `intensity`. With
        ``by="state"`` also ``"SE:<state>"`` and ``"ESA:<state>"`` by active state.
    steady_state : ndarray, shape (n_energies,)
        Steady-state absorption cross section of the initial conditions (Angstrom^2).
    alive, alive_count : ndarray, shape (n_delays,)
    params : dict
        ``interval`` says how the band below was made, or that there is none.
    lower, upper : ndarray, shape (n_delays, n_energies), or None
        Bootstrap percentile interval of `intensity` (``n_boot > 0``).
    """

    photon_energies: np.ndarray
    delays: np.ndarray
    intensity: np.ndarray
    components: dict[str, np.ndarray] = field(default_factory=dict)
    steady_state: np.ndarray | None = None
    alive: np.ndarray | None = None
    alive_count: np.ndarray | None = None
    params: dict[str, Any] = field(default_factory=dict)
    lower: np.ndarray | None = None
    upper: np.ndarray | None = None

    AXIS: ClassVar[str] = "photon_energies"
    AXIS_COLUMN: ClassVar[str] = "photon_energy"
    AXIS_UNIT: ClassVar[str] = "eV"
    VALUE_UNIT: ClassVar[str] = "Angstrom^2"
    GRID_FIELDS: ClassVar[tuple[str, ...]] = ("intensity", "lower", "upper")
    AXIS_FIELDS: ClassVar[tuple[str, ...]] = ("steady_state",)

    def __post_init__(self) -> None:
        self._validate_common()

    def __repr__(self) -> str:
        if not self.delays.size or not self.photon_energies.size:
            return "<ensemblelab.AbsorptionMap (empty)>"
        return (f"<ensemblelab.AbsorptionMap {self.delays.size} delays x "
                f"{self.photon_energies.size} photon energies; delay {self.delays[0]:.6g}.."
                f"{self.delays[-1]:.6g} fs, energy {self.photon_energies[0]:.6g}.."
                f"{self.photon_energies[-1]:.6g} eV; components: "
                f"{', '.join(self.components) or '-'}>")
