"""Spectra: raw stick contributions and broadened time-resolved photoelectron maps.

Two kinds of object, kept apart on purpose:

* :class:`StickSpectrum` holds the *raw* ionisation sticks of an ensemble: one
  row per (snapshot, open ionisation channel) with its kinetic energy and
  weight. It is never resampled or broadened.
* :class:`TRPESMap` holds a *broadened* map on a (delay, kinetic energy) grid,
  with additive components (by state, channel, ...), the alive weight per delay
  and the parameters that made it (files: :mod:`ensemblelab.io.maps`).

Both are immutable (frozen dataclasses with read-only arrays). Units: kinetic
energies in eV, delays and times in fs, intensities in eV^-1 (per unit kinetic
energy, normalised as chosen when the map was made).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from ..errors import SchemaError

__all__ = ["TRPESMap", "StickSpectrum"]


def _ro(a: Any, name: str, *, dtype: Any = np.float64, ndim: int | None = None) -> np.ndarray:
    """A read-only array; writable input is copied, so the caller's own array stays theirs."""
    arr = np.asarray(a, dtype=dtype)
    if arr.flags.writeable:
        arr = arr.copy()
    if ndim is not None and arr.ndim != ndim:
        raise SchemaError(f"{name} must be a {ndim}-D array; got shape {arr.shape}.")
    arr.setflags(write=False)
    return arr


def _per_delay(a: Any, name: str, n_delays: int) -> np.ndarray:
    """A read-only (n_delays,) array of `a`, or NaN (unknown) when `a` is None."""
    arr = _ro(np.full(n_delays, np.nan) if a is None else a, name, ndim=1)
    if arr.shape != (n_delays,):
        raise SchemaError(f"{name} must have shape (n_delays={n_delays},); got {arr.shape}.")
    return arr


def _json_safe(value: Any) -> Any:
    """Turn numpy scalars/arrays and tuples into JSON-friendly values (recursively)."""
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return _json_safe(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float | int | str | bool) or value is None:
        return value
    return repr(value)


@dataclass(frozen=True, eq=False, repr=False, slots=True)
class TRPESMap:
    """A broadened time-resolved photoelectron map (immutable).

    Attributes
    ----------
    kinetic_energies : ndarray, shape (n_energies,)
        Photoelectron kinetic energies in eV (increasing).
    delays : ndarray, shape (n_delays,)
        Pump-probe delays in fs (increasing).
    intensity : ndarray, shape (n_delays, n_energies)
        Signal in eV^-1 (see ``params["normalise"]``).
    components : dict of str to ndarray, shape (n_delays, n_energies) each
        Additive decomposition of `intensity` (empty when none was asked for);
        labels such as ``"S1"``, ``"D0"``, ``"S1->D0"``.
    alive : ndarray, shape (n_delays,)
        Alive trajectory weight (count for unit weights) behind each delay of the
        pure signal, interpolated to the delay grid: the normaliser of
        ``normalise="alive"``.
    alive_count : ndarray, shape (n_delays,)
        Number of trajectories alive at each delay of the pure signal (whatever their
        weights), interpolated to the delay grid; NaN where unknown.
    uncertainty : ndarray, shape (n_delays, n_energies), or None
        One standard deviation of `intensity` (a measured map's noise, same unit);
        None when unknown. NaN or 0 marks a pixel without a usable uncertainty.
    params : dict
        The parameters used (JSON-serialisable).
    lower, upper : ndarray, shape (n_delays, n_energies), or None
        Interval of `intensity` (``params["interval"]``, ``params["ci"]``); None
        without one (``compute_trpes(..., interval="bootstrap")``).
    rel_se : ndarray, shape (n_delays, n_energies), or None
        Relative standard error of `intensity` per pixel (NaN where it is 0).
    component_lower, component_upper : dict of str to ndarray
        Interval of each component (empty without one).

    A map carries nothing besides these fields (``slots``): the stick model that made
    it is a separate object (``compute_trpes(..., return_model=True)``). Files:
    :func:`ensemblelab.io.maps.save_map` and :func:`ensemblelab.io.maps.load_map`.

    Examples
    --------
    >>> import numpy as np
    >>> m = TRPESMap(kinetic_energies=np.linspace(0, 2, 5), delays=np.array([0.0, 10.0]),
    ...              intensity=np.ones((2, 5)), alive=np.array([3.0, 3.0]))
    >>> m.shape
    (2, 5)
    >>> len(m.to_frame())
    10
    """

    kinetic_energies: np.ndarray
    delays: np.ndarray
    intensity: np.ndarray
    components: dict[str, np.ndarray] = field(default_factory=dict)
    alive: np.ndarray | None = None
    params: dict[str, Any] = field(default_factory=dict)
    alive_count: np.ndarray | None = None
    uncertainty: np.ndarray | None = None
    lower: np.ndarray | None = None
    upper: np.ndarray | None = None
    rel_se: np.ndarray | None = None
    component_lower: dict[str, np.ndarray] = field(default_factory=dict)
    component_upper: dict[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        e = _ro(self.kinetic_energies, "kinetic_energies", ndim=1)
        d = _ro(self.delays, "delays", ndim=1)
        inten = _ro(self.intensity, "intensity", ndim=2)
        shape = (d.size, e.size)
        if inten.shape != shape:
            raise SchemaError(
                f"intensity must have shape (n_delays, n_energies) = {shape}; got {inten.shape}."
            )
        for name, arr in (("kinetic_energies", e), ("delays", d)):
            if arr.size > 1 and np.any(np.diff(arr) <= 0):
                raise SchemaError(f"{name} must increase strictly; got {arr[:5]!r}...")
        comps: dict[str, np.ndarray] = {}
        for label, arr in dict(self.components).items():
            c = _ro(arr, f"components[{label!r}]", ndim=2)
            if c.shape != shape:
                raise SchemaError(
                    f"components[{label!r}] must have shape {shape} like intensity; got {c.shape}."
                )
            comps[str(label)] = c
        alive = _per_delay(self.alive, "alive", d.size)
        count = _per_delay(self.alive_count, "alive_count", d.size)
        set_(self, "kinetic_energies", e)
        set_(self, "delays", d)
        set_(self, "intensity", inten)
        set_(self, "components", comps)
        set_(self, "alive", alive)
        set_(self, "alive_count", count)
        if self.uncertainty is not None:
            unc = _ro(self.uncertainty, "uncertainty", ndim=2)
            if unc.shape != shape:
                raise SchemaError(f"uncertainty must have shape {shape} like intensity; got "
                                  f"{unc.shape}.")
            if np.any(unc < 0):
                raise SchemaError("uncertainty must be >= 0 (one standard deviation).")
            set_(self, "uncertainty", unc)
        set_(self, "params", _json_safe(dict(self.params)))
        self._set_intervals(shape, comps)

    def _set_intervals(self, shape: tuple[int, int], comps: dict[str, np.ndarray]) -> None:
        """Check and freeze ``lower`` / ``upper`` / ``rel_se`` and the component intervals."""
        for name in ("lower", "upper", "rel_se"):
            a = getattr(self, name)
            if a is not None:
                a = _ro(a, name, ndim=2)
                if a.shape != shape:
                    raise SchemaError(f"{name} must have shape {shape} like intensity; got "
                                      f"{a.shape}.")
                object.__setattr__(self, name, a)
        for name in ("component_lower", "component_upper"):
            out: dict[str, np.ndarray] = {}
            for label, arr in dict(getattr(self, name)).items():
                if str(label) not in comps:
                    raise SchemaError(f"{name}[{label!r}] names no component; components: "
                                      f"{sorted(comps)}.")
                a = _ro(arr, f"{name}[{label!r}]", ndim=2)
                if a.shape != shape:
                    raise SchemaError(f"{name}[{label!r}] must have shape {shape}; got "
                                      f"{a.shape}.")
                out[str(label)] = a
            object.__setattr__(self, name, out)

    @property
    def has_interval(self) -> bool:
        """Whether the map carries ``lower`` / ``upper``."""
        return self.lower is not None and self.upper is not None

    def median_rel_se(self, *, threshold: float = 0.05) -> float | None:
        """Median relative standard error over the pixels above ``threshold`` times the
        peak of ``|intensity|`` (None without ``rel_se``)."""
        if self.rel_se is None or not self.intensity.size:
            return None
        peak = float(np.max(np.abs(self.intensity)))
        sel = (np.abs(self.intensity) > threshold * peak) & np.isfinite(self.rel_se)
        return float(np.median(self.rel_se[sel])) if peak > 0 and sel.any() else None

    # ------------------------------------------------------------------ basics
    @property
    def shape(self) -> tuple[int, int]:
        """(n_delays, n_energies)."""
        return self.intensity.shape

    @property
    def n_delays(self) -> int:
        """Number of delays."""
        return self.delays.size

    @property
    def n_energies(self) -> int:
        """Number of kinetic energies."""
        return self.kinetic_energies.size

    @property
    def effective_sample_size(self) -> float | None:
        """Kish effective sample size ``(sum w)^2 / sum w^2`` of the trajectory weights
        behind the map (``params["effective_sample_size"]``; None if not recorded)."""
        v = self.params.get("effective_sample_size")
        return None if v is None else float(v)

    @property
    def n_missing_data(self) -> int | None:
        """Snapshots that lacked electronic data (NaN) for some cation channel and were
        left out of that channel (``params["n_missing_data"]``; None if not recorded)."""
        v = self.params.get("n_missing_data")
        return None if v is None else int(v)

    def component_sum(self) -> np.ndarray:
        """Sum of all components, shape (n_delays, n_energies) (zeros if there are none)."""
        total = np.zeros(self.shape)
        for arr in self.components.values():
            total = total + arr
        return total

    def replace(self, **changes: Any) -> TRPESMap:
        """Return a new TRPESMap with some fields replaced.

        An interval describes the values it was made for: replacing the intensity,
        components or grids without new ``lower`` / ``upper`` / ``rel_se`` /
        ``component_lower`` / ``component_upper`` drops it (and the interval fields of
        ``params``)."""
        fields_ = {name: getattr(self, name) for name in self.__dataclass_fields__}
        interval = ("lower", "upper", "rel_se", "component_lower", "component_upper")
        if (set(changes) & {"intensity", "components", "kinetic_energies", "delays"}
                and not set(changes) & set(interval)):
            fields_.update(lower=None, upper=None, rel_se=None, component_lower={},
                           component_upper={})
            fields_["params"] = {k: v for k, v in self.params.items()
                                 if k not in ("interval", "ci", "n_boot", "random_state",
                                              "interval_method")}
        fields_.update(changes)
        return type(self)(**fields_)

    def to_frame(self, *, components: bool = True) -> pd.DataFrame:
        """The map as a tidy long frame.

        Parameters
        ----------
        components : bool, default True
            Also add one row block per component.

        Returns
        -------
        DataFrame
            Columns ``component`` (``"total"`` then each component label),
            ``delay`` (fs), ``energy`` (eV), ``intensity`` (eV^-1), ``alive``
            (weight) and ``alive_count``; one row per (component, delay, energy),
            delay-major.
        """
        blocks = [("total", self.intensity)]
        if components:
            blocks += list(self.components.items())
        nd, ne = self.shape
        assert self.alive is not None and self.alive_count is not None  # set in __post_init__
        delay = np.repeat(self.delays, ne)
        energy = np.tile(self.kinetic_energies, nd)
        alive = np.repeat(self.alive, ne)
        count = np.repeat(self.alive_count, ne)
        frames = [
            pd.DataFrame({"component": label, "delay": delay, "energy": energy,
                          "intensity": arr.reshape(-1), "alive": alive,
                          "alive_count": count})
            for label, arr in blocks
        ]
        out = pd.concat(frames, ignore_index=True)
        out["component"] = out["component"].astype(str)
        return out

    def to_xarray(self) -> Any:
        """The map as an ``xarray.Dataset`` with units and coordinates (``xarray`` extra).

        Returns
        -------
        xarray.Dataset
            Coordinates ``delay`` (fs) and ``kinetic_energy`` (eV); variables
            ``intensity`` and ``component_<label>`` (eV^-1, dims (delay, kinetic_energy)),
            ``alive`` and ``alive_count`` (per delay); attribute ``params`` (JSON).
            ``.to_netcdf(path)`` writes it as NetCDF.
        """
        import json

        from .._optional import import_optional

        xr = import_optional("xarray", extra="xarray", purpose="TRPESMap.to_xarray()")
        dims = ("delay", "kinetic_energy")
        data: dict[str, Any] = {"intensity": (dims, np.array(self.intensity),
                                              {"units": "1/eV"})}
        for label, arr in self.components.items():
            data[f"component_{label}"] = (dims, np.array(arr), {"units": "1/eV",
                                                                "label": label})
        data["alive"] = (("delay",), np.array(self.alive), {"units": "trajectory weight"})
        data["alive_count"] = (("delay",), np.array(self.alive_count),
                               {"units": "trajectories"})
        coords = {"delay": ("delay", np.array(self.delays), {"units": "fs"}),
                  "kinetic_energy": ("kinetic_energy", np.array(self.kinetic_energies),
                                     {"units": "eV"})}
        return xr.Dataset(data, coords=coords,
                          attrs={"kind": "TRPESMap", "params": json.dumps(self.params)})

    # ------------------------------------------------------------------ display
    def _weights_note(self) -> str:
        ess, n = self.effective_sample_size, self.params.get("n_trajectories")
        out = "" if ess is None else (
            f"; effective sample size {ess:.1f}" + (f" of {int(n)} trajectories" if n else ""))
        if self.n_missing_data:
            out += f"; {self.n_missing_data} snapshots without data"
        return out

    def __repr__(self) -> str:
        comps = ", ".join(self.components) or "-"
        return (
            f"<ensemblelab.TRPESMap {self.n_delays} delays x {self.n_energies} energies; "
            f"delay {self.delays[0]:.6g}..{self.delays[-1]:.6g} fs, energy "
            f"{self.kinetic_energies[0]:.6g}..{self.kinetic_energies[-1]:.6g} eV; components: "
            f"{comps}{self._weights_note()}>"
            if self.n_delays and self.n_energies else "<ensemblelab.TRPESMap (empty)>"
        )


@dataclass(frozen=True, eq=False, repr=False)
class StickSpectrum:
    """Raw photoionisation sticks of an ensemble (never resampled).

    One entry per (snapshot, ionisation channel the probe spectrum reaches). A stick
    may sit slightly below 0 eV (the tail of the probe spectrum above threshold); the
    map keeps only its part above zero kinetic energy.

    Attributes
    ----------
    snapshot : ndarray of int64, shape (n_sticks,)
        Row of ``ens.snapshots`` the stick comes from.
    traj : ndarray of int64, shape (n_sticks,)
        Trajectory id.
    time : ndarray, shape (n_sticks,)
        Time since launch in fs.
    state : ndarray of int64, shape (n_sticks,)
        Active neutral state.
    channel : ndarray of int64, shape (n_sticks,)
        Cation state.
    energy : ndarray, shape (n_sticks,)
        Photoelectron kinetic energy n*h*nu - IP in eV.
    weight : ndarray, shape (n_sticks,)
        Cross section times trajectory weight (unnormalised).
    info : dict
        How the sticks were made (probe photon energy, n_photons, cross section...).

    Examples
    --------
    >>> s = StickSpectrum(snapshot=[0, 0], traj=[0, 0], time=[0.0, 0.0], state=[1, 1],
    ...                   channel=[0, 1], energy=[1.0, 0.4], weight=[0.9, 0.1])
    >>> s.n_sticks, float(s.weight.sum())
    (2, 1.0)
    """

    snapshot: np.ndarray
    traj: np.ndarray
    time: np.ndarray
    state: np.ndarray
    channel: np.ndarray
    energy: np.ndarray
    weight: np.ndarray
    info: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        ints = ("snapshot", "traj", "state", "channel")
        n = None
        for name in ("snapshot", "traj", "time", "state", "channel", "energy", "weight"):
            arr = _ro(getattr(self, name), name, dtype=np.int64 if name in ints else np.float64,
                      ndim=1)
            if n is None:
                n = arr.size
            elif arr.size != n:
                raise SchemaError(
                    f"{name} must have n_sticks={n} entries like snapshot; got {arr.size}."
                )
            set_(self, name, arr)
        set_(self, "info", _json_safe(dict(self.info)))

    @property
    def n_sticks(self) -> int:
        """Number of sticks."""
        return self.energy.size

    def to_frame(self) -> pd.DataFrame:
        """The sticks as a DataFrame (snapshot, traj, time, state, channel, energy, weight)."""
        return pd.DataFrame({name: np.array(getattr(self, name)) for name in
                             ("snapshot", "traj", "time", "state", "channel", "energy",
                              "weight")})

    @classmethod
    def from_arrays(cls, *, info: Mapping[str, Any] | None = None,
                    **arrays: npt.ArrayLike) -> StickSpectrum:
        """Build from keyword arrays (same names as the attributes)."""
        return cls(info=dict(info or {}), **arrays)  # type: ignore[arg-type]

    def __repr__(self) -> str:
        return f"<ensemblelab.StickSpectrum {self.n_sticks} sticks>"
