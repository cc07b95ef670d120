"""The part of a map's axis that holds signal, for default plot ranges.

A map is usually computed up to the probe photon energy, while the signal ends
well before it; a figure drawn over the whole grid is then partly empty.
:func:`signal_extent` finds the range of kinetic energies (or delays) where the
map exceeds a stated fraction of its maximum, widened by a margin. Views and
static figures use it as their default axis range; the user can always pass a
range of their own.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, cast

import numpy as np

from ...errors import SchemaError

if TYPE_CHECKING:
    from ...data.spectrum import TRPESMap

__all__ = ["signal_extent"]

_AXES = ("energy", "delay")


def _axis_values(trpes_map: TRPESMap, axis: str) -> np.ndarray:
    if axis == "delay":
        return np.asarray(trpes_map.delays, dtype=np.float64)
    # the kinetic-energy axis (read under its newer name when the map has it)
    values = getattr(trpes_map, "kinetic_energies", None)
    if values is None:
        values = cast(Any, trpes_map).energies  # older map objects name the axis so
    return np.asarray(values, dtype=np.float64)


def signal_extent(
    trpes_map: TRPESMap,
    *,
    fraction: float = 0.01,
    pad: float = 0.05,
    axis: str = "energy",
) -> tuple[float, float]:
    """Range of an axis of a map where the signal exceeds a fraction of its maximum.

    For every grid point of `axis`, the largest absolute intensity over the other
    axis is compared with ``fraction`` times the largest absolute intensity of the
    whole map; the range spans the first to the last point above it, widened on
    each side by ``pad`` times its width (at least one grid step) and clipped to
    the grid.

    Parameters
    ----------
    trpes_map : TRPESMap
        The map (total intensity; NaN cells are ignored).
    fraction : float
        Threshold as a fraction of the map's maximum absolute intensity, in
        [0, 1). Default 0.01 (1 %).
    pad : float
        Margin added on each side, as a fraction of the width with signal (>= 0).
    axis : {"energy", "delay"}
        Kinetic energy (eV) or delay (fs).

    Returns
    -------
    (float, float)
        Lower and upper end in the axis' unit (eV or fs). The whole grid when the
        map has no signal (all zero or NaN) or a single grid point.

    Raises
    ------
    SchemaError
        For a `fraction`, `pad` or `axis` out of range.

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.data.spectrum import TRPESMap
    >>> e = np.linspace(0.0, 5.0, 51)
    >>> m = TRPESMap(energies=e, delays=np.array([0.0, 10.0]),
    ...              intensity=np.tile(np.exp(-((e - 1.0) / 0.2) ** 2), (2, 1)))
    >>> lo, hi = signal_extent(m, fraction=0.01, pad=0.0)  # 0.6 .. 1.4 eV, one step added
    >>> round(lo, 2), round(hi, 2)
    (0.5, 1.5)
    """
    if not (np.isfinite(fraction) and 0.0 <= float(fraction) < 1.0):
        raise SchemaError("The 'fraction' parameter of signal_extent must be a float in the "
                          f"range [0, 1). Got {fraction!r} instead.")
    if not (np.isfinite(pad) and float(pad) >= 0.0):
        raise SchemaError("The 'pad' parameter of signal_extent must be a float >= 0. Got "
                          f"{pad!r} instead.")
    if axis not in _AXES:
        raise SchemaError(f"The 'axis' parameter of signal_extent must be one of {_AXES}. "
                          f"Got {axis!r} instead.")
    grid = _axis_values(trpes_map, axis)
    full = (float(grid[0]), float(grid[-1])) if grid.size else (0.0, 0.0)
    if grid.size < 2:
        return full
    data = np.abs(np.asarray(trpes_map.intensity, dtype=np.float64))
    data = np.where(np.isfinite(data), data, 0.0)
    profile = data.max(axis=0 if axis == "energy" else 1) if data.size else data
    top = float(profile.max()) if profile.size else 0.0
    if not top > 0.0:
        return full
    above = np.flatnonzero(profile > float(fraction) * top)
    lo, hi = float(grid[above[0]]), float(grid[above[-1]])
    step = float(np.min(np.diff(grid)))
    margin = max(float(pad) * (hi - lo), step)
    return max(full[0], lo - margin), min(full[1], hi + margin)
