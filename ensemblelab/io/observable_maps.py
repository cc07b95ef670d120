"""Files of the scattering and transient-absorption maps (``.npz``, no pickle).

One ``.npz`` per map, written atomically (temporary file, then rename) and read with
``allow_pickle=False``. Keys:

* ``format``: ``ensemblelab-scattering-map-v1`` or ``ensemblelab-absorption-map-v1``;
* one array per array field of the map, under its field name (``q`` or
  ``photon_energies``, ``delays``, ``intensity``, ``reference``, ``percent_difference``,
  ``atomic``, ``delta_sm``, ``r``, ``delta_pdf``, ``steady_state``, ``alive``,
  ``alive_count``; absent fields are not written);
* ``component_labels`` (unicode array) and ``components`` (n_components, n_delays, n_axis);
* ``params``: the parameters as a JSON string;
* ``units``: a JSON string mapping each field to its unit.

The photoelectron map keeps its own files (:mod:`ensemblelab.io.maps`).
"""

from __future__ import annotations

import io as _io
import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from .._atomic import atomic_write_bytes
from ..data.observables import AbsorptionMap, ScatteringMap
from ..errors import ParseError

__all__ = ["save_observable_map", "load_observable_map", "FORMATS"]

#: format tag -> map class
FORMATS: dict[str, type[ScatteringMap] | type[AbsorptionMap]] = {
    "ensemblelab-scattering-map-v1": ScatteringMap,
    "ensemblelab-absorption-map-v1": AbsorptionMap,
}


def save_observable_map(obs_map: ScatteringMap | AbsorptionMap, path: str | os.PathLike[str],
                        *, overwrite: bool = False) -> Path:
    """Write a scattering or absorption map atomically as ``.npz``.

    Parameters
    ----------
    obs_map : ScatteringMap or AbsorptionMap
    path : path-like
        Target file ending in ``.npz``.
    overwrite : bool, default False
        Replace an existing file (never done unless asked).

    Returns
    -------
    Path
    """
    path = Path(path)
    if path.suffix.lower() != ".npz":
        raise ValueError(f"path must end in .npz; got {path.name!r}.")
    if path.exists() and not overwrite:
        raise FileExistsError(f"{path} exists; pass overwrite=True to replace it.")
    tag = next((k for k, cls in FORMATS.items() if type(obs_map) is cls), None)
    if tag is None:
        raise TypeError(f"expected a ScatteringMap or AbsorptionMap; got "
                        f"{type(obs_map).__name__}.")
    arrays: dict[str, Any] = {}
    units: dict[str, str] = {}
    for name in obs_map.__dataclass_fields__:
        value = getattr(obs_map, name)
        if isinstance(value, np.ndarray):
            arrays[name] = value
            units[name] = obs_map.unit_of(name)
    labels = list(obs_map.components)
    comps = (np.stack([obs_map.components[k] for k in labels]) if labels
             else np.zeros((0, *obs_map.shape)))
    buf = _io.BytesIO()
    np.savez_compressed(buf, format=np.array(tag), component_labels=np.array(labels,
                                                                            dtype=np.str_),
                        components=comps, params=np.array(json.dumps(obs_map.params)),
                        units=np.array(json.dumps(units)), **arrays)
    atomic_write_bytes(path, buf.getvalue())
    return path


def load_observable_map(path: str | os.PathLike[str]) -> ScatteringMap | AbsorptionMap:
    """Read a map written by :func:`save_observable_map`.

    Raises
    ------
    ParseError
        When the file is not a saved scattering or absorption map.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (OSError, ValueError) as exc:
        raise ParseError(f"not a readable npz file ({exc})", path=path) from exc
    tag = str(data.get("format", ""))
    if tag not in FORMATS:
        raise ParseError(f"not a saved scattering or absorption map (format {tag!r})",
                         path=path, hint="write maps with save_observable_map(...); "
                         "photoelectron maps are read by load_map(...).")
    cls = FORMATS[tag]
    fields = cls.__dataclass_fields__
    kwargs: dict[str, Any] = {k: v for k, v in data.items() if k in fields
                              and k not in ("components", "params")}
    labels = [str(x) for x in data.get("component_labels", np.array([], dtype=str))]
    comps = data.get("components", np.zeros((0,)))
    kwargs["components"] = {lab: comps[i] for i, lab in enumerate(labels)}
    kwargs["params"] = json.loads(str(data["params"])) if "params" in data else {}
    try:
        return cls(**kwargs)
    except TypeError as exc:
        raise ParseError(f"incomplete map file ({exc})", path=path) from exc
