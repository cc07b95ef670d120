"""Layer 4: Jupyter widgets (the only layer that imports ipywidgets, bqplot, nglview).

``Explorer(ens)`` composes every view around one shared :class:`SelectionModel`;
each view is also usable on its own, e.g. ``MapView(ens)``.
"""

from __future__ import annotations

from .._optional import import_optional

for _name in ("ipywidgets", "bqplot", "nglview"):
    import_optional(_name, extra="widgets")

from ._messages import MessageArea  # noqa: E402
from ._ngl import EnsembleStructure  # noqa: E402
from ._selection import SelectionModel  # noqa: E402
from .explorer import Explorer  # noqa: E402
from .export import ExportPanel, export_figures, export_structures, export_tables  # noqa: E402
from .map_view import MapView  # noqa: E402
from .observable_switch import ObservableSwitch  # noqa: E402
from .population_view import PopulationView  # noqa: E402
from .quality_view import QualityView  # noqa: E402
from .selection_table import SelectionTable, group_band  # noqa: E402
from .session import apply_session, load_session, save_session, session_path_for  # noqa: E402
from .structure_view import StructureView  # noqa: E402
from .trajectory_view import TrajectoryView  # noqa: E402

__all__ = [
    "Explorer",
    "SelectionModel",
    "MessageArea",
    "EnsembleStructure",
    "MapView",
    "ObservableSwitch",
    "PopulationView",
    "StructureView",
    "SelectionTable",
    "TrajectoryView",
    "QualityView",
    "ExportPanel",
    "export_structures",
    "export_tables",
    "export_figures",
    "group_band",
    "save_session",
    "load_session",
    "apply_session",
    "session_path_for",
]
