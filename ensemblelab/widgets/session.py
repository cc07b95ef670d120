"""Save and restore an explorer session (selections, exclusions, labels) as JSON.

The session file lives beside the data (``<data>.session.json`` next to the
data file or folder); the data files themselves are never written. Writes are
atomic (temporary file + ``os.replace``).

File format (``"format": "ensemblelab-session"``, ``"version": 1``)::

    {"format": "ensemblelab-session", "version": 1,
     "data": "<name of the data file or folder>",
     "excluded": [3, 17],
     "selection": {"energy_range": [e0, e1] | null, "delay_range": [d0, d1] | null,
                   "selected": [snapshot ids], "frame": -1, "trajectory": null,
                   "cluster": null, "group_by": "cluster"},
     "labels": {...},
     "map": {"photon_energy": 5.0, ...}}
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .._atomic import atomic_write_text
from ._selection import SelectionModel

__all__ = ["session_path_for", "session_state", "save_session", "load_session",
           "apply_session", "SESSION_FORMAT", "SESSION_VERSION"]

SESSION_FORMAT = "ensemblelab-session"
SESSION_VERSION = 1


def session_path_for(data_path: str | os.PathLike[str]) -> Path:
    """The session file beside `data_path` (a file or a folder): ``<name>.session.json``."""
    p = Path(data_path).expanduser().resolve()
    name = p.name
    for suffix in (".gz", ".xyz", ".csv", ".parquet", ".npz"):
        if name.endswith(suffix) and p.is_file():
            name = name[: -len(suffix)]
    return p.parent / f"{name}.session.json"


def session_state(model: SelectionModel, *, map_params: dict[str, Any] | None = None,
                  data_name: str | None = None) -> dict[str, Any]:
    """The JSON-ready state of `model` (see the module docstring for the keys)."""
    def pair(v: Any) -> list[float] | None:
        return None if v is None else [float(v[0]), float(v[1])]

    return {
        "format": SESSION_FORMAT,
        "version": SESSION_VERSION,
        "data": data_name,
        "excluded": [int(t) for t in model.excluded],
        "selection": {
            "energy_range": pair(model.energy_range),
            "delay_range": pair(model.delay_range),
            "selected": [int(s) for s in model.selected],
            "frame": int(model.frame),
            "trajectory": None if model.trajectory is None else int(model.trajectory),
            "cluster": None if model.cluster is None else int(model.cluster),
            "group_by": model.group_by,
        },
        "labels": _json_ready(model.labels),
        "map": _json_ready(dict(map_params or {})),
    }


def save_session(model: SelectionModel, path: str | os.PathLike[str], *,
                 map_params: dict[str, Any] | None = None,
                 data_name: str | None = None) -> Path:
    """Write the session of `model` to `path` atomically; returns the path."""
    state = session_state(model, map_params=map_params, data_name=data_name)
    path = Path(path)
    text = json.dumps(state, indent=2, sort_keys=True, allow_nan=False)
    return atomic_write_text(path, text + "\n")


def load_session(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read and check a session file; returns its dictionary.

    Raises
    ------
    SchemaError
        When the file is too large, too deeply nested, not JSON, or any field has
        the wrong type (see :mod:`ensemblelab.widgets._session_check`); nothing is
        applied then.
    """
    from ._session_check import read_session_file

    return read_session_file(Path(path), format_name=SESSION_FORMAT, version=SESSION_VERSION)


def apply_session(model: SelectionModel, state: dict[str, Any]) -> None:
    """Restore exclusions, labels and the selection of `state` into `model`.

    Exclusions of trajectories not in the ensemble are dropped. The band's
    contributions are recomputed when a map is shown.
    """
    known = set(model.ens.trajectories["traj"].tolist())
    model.excluded = tuple(int(t) for t in state.get("excluded", []) if int(t) in known)
    model.labels = dict(state.get("labels", {}))
    sel = state.get("selection", {}) or {}
    if sel.get("group_by") in ("cluster", "state", "traj"):
        model.group_by = sel["group_by"]
    e, d = sel.get("energy_range"), sel.get("delay_range")
    if e is not None and d is not None and model.trpes_map is not None:
        model.select_band(energy_range=tuple(e), delay_range=tuple(d))
    else:
        ids = [int(s) for s in sel.get("selected", [])]
        valid = set(model.ens.snapshots["snapshot"].tolist())
        model.selected = tuple(s for s in ids if s in valid)
    if sel.get("trajectory") is not None and int(sel["trajectory"]) in known:
        model.trajectory = int(sel["trajectory"])
    if sel.get("cluster") is not None:
        model.cluster = int(sel["cluster"])


def _json_ready(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if hasattr(value, "item") and callable(value.item):
        return value.item()
    return value
