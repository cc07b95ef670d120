"""The explorer: every view around one shared SelectionModel."""

from __future__ import annotations

import html
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import ipywidgets as widgets
import numpy as np

from ..data.ensemble import Ensemble
from ._messages import MessageArea
from ._selection import SelectionModel
from .session import apply_session, load_session, save_session, session_path_for

__all__ = ["Explorer"]


class Explorer:
    """Linked views of one ensemble: map, populations, structures, table, trajectory, quality.

    Box-select a band in the map: the selection table lists what contributes
    (by cluster, state or trajectory, with shares), the structure view shows the
    strongest contributing geometries and the population view marks the delay
    range. All views observe :attr:`model`; none links to another.

    Parameters
    ----------
    ens : Ensemble
        The ensemble (never modified).
    map_kwargs : dict, optional
        Keyword arguments of :class:`~ensemblelab.widgets.MapView`
        (``photon_energy``, ``probe_fwhm``, ``pump_fwhm``, ``energies``, ...).
    population_kwargs, structure_kwargs : dict, optional
        Keyword arguments of :class:`PopulationView` and :class:`StructureView`.
    clusters : "auto", array_like, False or None
        Cluster label per snapshot; ``"auto"`` (default) runs
        :func:`ensemblelab.compute.structures.clustering.cluster_snapshots`; False: none.
    cluster_kwargs : dict, optional
        Keyword arguments of ``cluster_snapshots`` (default ``n_clusters=3``).
    flags : DataFrame, optional
        Flagged-trajectory table (default: computed by ``flag_trajectories``).
    measured : TRPESMap, optional
        A measured map to overlay in the map view.
    exclude : iterable of int or DataFrame, optional
        Trajectory ids to leave out from the start (for example the flagged rows of a
        ``flag_trajectories`` table, the same ones a notebook's fit leaves out). Every
        view uses one exclusion state (:attr:`SelectionModel.excluded`, shown in the
        header); a restored session replaces it.
    data_path : path, optional
        Where the ensemble was loaded from: the session file goes beside it.
    session_path : path, optional
        Session file (default: beside `data_path`, else ``./ensemblelab.session.json``).
    restore : bool
        Restore the session file if it exists.
    export_folder : path, optional
        Folder of the export buttons.
    debounce : float
        Seconds of quiet before a recomputation after a control change.
    background : bool, optional
        Cluster the snapshots and flag the trajectories after the explorer is shown,
        in a worker thread with a status line (default: inside a kernel). The map,
        populations and band table are usable at once; the selection table gains its
        clusters and the quality tab its flags when they are ready. False: compute
        them before returning (plain Python and tests do).

    Attributes
    ----------
    model : SelectionModel
    messages : MessageArea
    map_view, population_view, structure_view, selection_table, trajectory_view,
    quality_view, export : the views (None where one failed to build; see :attr:`messages`)
    observable_switch : ObservableSwitch or None
        Photoelectron / absorption / scattering switch around the map view.
    widget : ipywidgets.VBox
    header : ipywidgets.HTML
        Trajectories and snapshots used by every view (after exclusions), and the
        excluded trajectories.
    tabs : ipywidgets.Tab
        Trajectory, quality and export tabs.
    last_update_ms : float or None
        In-kernel time of the last band selection, from the brush event to every
        view updated.
    jobs : BackgroundJobs
        The clustering and flagging run after building (:meth:`wait` waits for them).
    build_seconds : float
        Time to build the views (the map usable), without the background jobs.
    """

    def __init__(
        self,
        ens: Ensemble,
        *,
        map_kwargs: dict[str, Any] | None = None,
        population_kwargs: dict[str, Any] | None = None,
        structure_kwargs: dict[str, Any] | None = None,
        clusters: Any = "auto",
        cluster_kwargs: dict[str, Any] | None = None,
        flags: Any = None,
        measured: Any = None,
        exclude: Any = None,
        data_path: str | os.PathLike[str] | None = None,
        session_path: str | os.PathLike[str] | None = None,
        restore: bool = True,
        export_folder: str | os.PathLike[str] | None = None,
        debounce: float = 0.3,
        background: bool | None = None,
    ) -> None:
        # imported here, on the widget thread: a module first imported by the worker
        # thread while a view imports it too would be seen half initialised
        from ..compute.structures.clustering import cluster_snapshots  # noqa: F401
        from ..compute.structures.geometry import kabsch_align  # noqa: F401
        from ..compute.structures.outliers import flag_trajectories  # noqa: F401
        from ._background import BackgroundJobs, Job
        from .export import ExportPanel
        from .map_view import MapView
        from .population_view import PopulationView
        from .quality_view import QualityView
        from .selection_table import SelectionTable
        from .structure_view import StructureView
        from .trajectory_view import TrajectoryView

        self.messages = MessageArea()
        self.model = SelectionModel(ens)
        if exclude is not None:
            if hasattr(exclude, "columns"):  # a flags table: its flagged rows
                table = exclude
                if "flagged" in table.columns:
                    table = table.loc[table["flagged"].astype(bool)]
                exclude = table["traj"].to_numpy()
            self.model.excluded = tuple(int(t) for t in exclude)
        self.data_path = None if data_path is None else Path(data_path)
        if session_path is not None:
            self.session_path = Path(session_path)
        elif self.data_path is not None:
            self.session_path = session_path_for(self.data_path)
        else:
            self.session_path = Path.cwd() / "ensemblelab.session.json"
        self.last_update_ms: float | None = None
        start = time.perf_counter()
        self.jobs = BackgroundJobs(self.messages, background=background)
        jobs: list[Job] = []
        if isinstance(clusters, str):
            if clusters != "auto":
                raise ValueError(f"clusters must be 'auto', labels or False; got {clusters!r}.")
            options = {"n_clusters": 3, **dict(cluster_kwargs or {})}
            jobs.append(("clustering the snapshots",
                         lambda: self._cluster(options), self._apply_clusters))
        else:
            self._set_clusters(clusters)
        if flags is not None:
            self.model.flags = flags
        else:
            jobs.append(("checking the trajectories", self._flags, self._apply_flags))

        m, msg = self.model, self.messages
        mk = {"debounce": debounce, "measured": measured, **dict(map_kwargs or {})}
        self.map_view = self._build("map view", lambda: MapView(m, messages=msg, **mk))
        # the observable switch (photoelectron / absorption / scattering) around the map view
        from .observable_switch import ObservableSwitch
        self.observable_switch = self._build("observable switch", lambda: ObservableSwitch(
            m, self.map_view, messages=msg))
        pk = {"debounce": debounce, **dict(population_kwargs or {})}
        self.population_view = self._build(
            "population view", lambda: PopulationView(m, messages=msg, **pk))
        self.structure_view = self._build(
            "structure view",
            lambda: StructureView(m, messages=msg, **dict(structure_kwargs or {})))
        self.selection_table = self._build("selection table",
                                           lambda: SelectionTable(m, messages=msg))
        self.trajectory_view = self._build("trajectory view",
                                           lambda: TrajectoryView(m, messages=msg))
        self.quality_view = self._build("quality view", lambda: QualityView(
            m, messages=msg, compute_flags=False))
        self.export = self._build("export", lambda: ExportPanel(
            m, messages=msg, folder=export_folder, populations=self._populations,
            save_session=self.save_session, restore_session=self.restore_session))

        self.widget = self._layout()
        self.widget.add_class("ensemblelab-explorer")
        if restore and self.session_path.exists():
            try:
                self.restore_session()
            except Exception as exc:  # noqa: BLE001 - shown, the explorer still works
                self.messages.exception(exc, where="restoring the session")
        self.build_seconds = time.perf_counter() - start
        self.jobs.run(jobs)

    def wait(self, timeout: float | None = None) -> bool:
        """Wait for the background clustering and flags; True when they are applied."""
        return self.jobs.wait(timeout)

    # ------------------------------------------------------------------ building
    def _cluster(self, options: dict[str, Any]) -> Any:
        from ..compute.structures.clustering import cluster_snapshots

        return cluster_snapshots(self.model.ens, **options)

    def _apply_clusters(self, result: Any) -> None:
        self.cluster_result = result
        summary = result.summary
        with self.model.hold_trait_notifications():
            self.model.cluster_names = {str(int(c)): str(n) for c, n in
                                        zip(summary["code"], summary["cluster"], strict=True)}
            self.model.cluster_medoids = tuple(
                int(s) for s in summary["medoid_snapshot"].to_numpy() if s >= 0)
            self.model.clusters = np.asarray(result.codes)
        if not self.model.selected and self.structure_view is not None:
            # something to look at before the first band: the strongest group's medoid
            order = summary.sort_values("fraction", ascending=False)
            medoids = [int(s) for s in order["medoid_snapshot"].to_numpy() if s >= 0]
            if medoids:
                self.model.selected = (medoids[0],)

    def _flags(self) -> Any:
        from ..compute.structures.outliers import flag_trajectories

        return flag_trajectories(self.model.ens)

    def _apply_flags(self, table: Any) -> None:
        self.model.flags = table

    def _set_clusters(self, clusters: Any) -> None:
        if clusters is None or clusters is False:
            return
        codes, names = np.unique(np.asarray(clusters), return_inverse=True)
        if np.issubdtype(codes.dtype, np.integer):
            self.model.clusters = np.asarray(clusters, dtype=np.int64)
        else:  # string labels: integer codes plus names
            self.model.clusters = names.astype(np.int64)
            self.model.cluster_names = {str(i): str(c) for i, c in enumerate(codes)}

    def _build(self, name: str, factory: Callable[[], Any]) -> Any:
        try:
            return factory()
        except Exception as exc:  # noqa: BLE001 - one broken view must not hide the others
            self.messages.exception(exc, where=f"building the {name}")
            return None

    def _panel(self, view: Any, name: str) -> widgets.Widget:
        if view is not None:
            return view.widget
        return widgets.HTML(f"<i>The {html.escape(name)} is unavailable (see the messages).</i>")

    def header_text(self) -> str:
        """The header: trajectories and snapshots used by every view, and the exclusions."""
        ens, m = self.model.ens, self.model
        excluded = self.model.excluded
        text = (f"{m.n_trajectories} trajectories, {m.n_snapshots} snapshots, "
                f"{ens.n_atoms} atoms")
        if excluded:
            listed = ", ".join(str(t) for t in excluded[:12]) + (" ..." if len(excluded) > 12
                                                                 else "")
            text += (f" · {len(excluded)} of {ens.n_trajectories} excluded "
                     f"(trajectories {listed})")
        return text

    def _on_excluded_change(self, change: dict | None = None) -> None:
        self.header.value = (f"<span class='ensemblelab-header-counts'>"
                             f"{html.escape(self.header_text())}</span>")

    def _show_trajectory(self, traj: int) -> None:
        """Bring the trajectory tab forward (the quality view's "show trajectory")."""
        self.tabs.selected_index = 0

    def _layout(self) -> widgets.VBox:
        self.header = widgets.HTML()
        self.header.add_class("ensemblelab-header")
        self._on_excluded_change()
        self.model.observe(self.messages.guard(self._on_excluded_change), names="excluded")
        title = widgets.VBox([widgets.HTML("<h3 style='margin:4px 0'>ensemblelab explorer</h3>"),
                              widgets.HBox([self.header, self.jobs.status],
                                           layout=widgets.Layout(grid_gap="16px"))])
        switch = self.observable_switch  # wraps the map view (observable switch)
        map_panel = (switch.widget if switch is not None
                     else self._panel(self.map_view, "map view"))
        top = widgets.HBox([map_panel,
                            self._panel(self.structure_view, "structure view")])
        middle = widgets.HBox([
            widgets.VBox([self._panel(self.selection_table, "selection table")],
                         layout=widgets.Layout(width="40%")),
            widgets.VBox([self._panel(self.population_view, "population view")],
                         layout=widgets.Layout(width="60%")),
        ])
        self.tabs = tabs = widgets.Tab(children=[
            self._panel(self.trajectory_view, "trajectory view"),
                                     self._panel(self.quality_view, "quality view"),
                                     self._panel(self.export, "export")])
        for i, name in enumerate(("trajectory", "quality", "export")):
            tabs.set_title(i, name)
        if self.quality_view is not None:
            self.quality_view.on_show(self._show_trajectory)
        head = widgets.HTML("<b>messages</b>")

        def show_head(change: Any = None) -> None:  # no empty message area
            head.layout.display = "block" if self.messages.messages else "none"

        show_head()
        self.messages.widget.observe(show_head, names="value")
        self.messages_head = head
        return widgets.VBox([title, top, middle, tabs, head, self.messages.widget])

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        return self.widget._repr_mimebundle_(**kwargs)

    def _populations(self) -> Any:
        return None if self.population_view is None else self.population_view.table

    # ------------------------------------------------------------------ interaction
    def brush(self, energy_range: tuple[float, float],
              delay_range: tuple[float, float]) -> float:
        """Select a band as the browser does (brush traits, then ``brushing=False``).

        Returns
        -------
        float
            In-kernel milliseconds from the brush event to every view updated
            (also stored in :attr:`last_update_ms`).
        """
        if self.map_view is None:
            raise RuntimeError("the map view is unavailable (see the messages).")
        brush = self.map_view.brush
        brush.brushing = True
        brush.selected_x = np.asarray(energy_range, dtype=float)
        brush.selected_y = np.asarray(delay_range, dtype=float)
        start = time.perf_counter()
        brush.brushing = False
        self.last_update_ms = 1e3 * (time.perf_counter() - start)
        return self.last_update_ms

    # ------------------------------------------------------------------ session
    def map_params(self) -> dict[str, Any]:
        """The map controls' values (saved with the session)."""
        v = self.map_view
        if v is None:
            return {}
        return {"photon_energy": v.photon_energy.value, "probe_fwhm": v.probe_fwhm.value,
                "pump_fwhm": v.pump_fwhm.value, "n_photons": v.n_photons.value,
                "resolution": v.resolution.value, "convolve": v.convolve.value,
                "decomposition": v.decomposition.value}

    def save_session(self, path: str | os.PathLike[str] | None = None) -> Path:
        """Save selections, exclusions and labels as JSON beside the data; returns the path."""
        target = Path(path) if path is not None else self.session_path
        name = self.data_path.name if self.data_path is not None else None
        out = save_session(self.model, target, map_params=self.map_params(), data_name=name)
        self.messages.info(f"session saved to {out}")
        return out

    def restore_session(self, path: str | os.PathLike[str] | None = None) -> dict[str, Any]:
        """Restore a saved session (map controls first, then exclusions and selection)."""
        target = Path(path) if path is not None else self.session_path
        state = load_session(target)
        params = state.get("map", {}) or {}
        if self.map_view is not None and params:
            v = self.map_view
            with v.figure.hold_sync():
                for key, w in (("photon_energy", v.photon_energy), ("probe_fwhm", v.probe_fwhm),
                               ("pump_fwhm", v.pump_fwhm), ("n_photons", v.n_photons),
                               ("resolution", v.resolution), ("convolve", v.convolve),
                               ("decomposition", v.decomposition)):
                    if key in params and w.value != params[key]:
                        w.value = params[key]
            v.flush()
        apply_session(self.model, state)
        if self.map_view is not None:
            self.map_view.flush()
        self.messages.info(f"session restored from {target}")
        return state
