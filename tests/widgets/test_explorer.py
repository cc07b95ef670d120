"""The explorer end to end in the kernel: brush a band, check every linked view.

The toy ensemble (ensemblelab.testing, an invented scenario; computed independently
(not published)): S2 ionises to D0 at IP 3.5 eV and S1 at IP 4.5 eV, so with a 5.0 eV
probe the S2 band sits at 1.5 eV and the S1 band at 0.5 eV kinetic energy; the
S2 -> S1 lifetime is 100 fs.

Each test builds its own Explorer (function scope): no test sees what another did, so
the order they run in does not matter.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest

from ensemblelab.widgets import Explorer

MAP = {"photon_energy": 5.0, "probe_fwhm": 30.0, "pump_fwhm": 30.0,
       "kinetic_energies": np.linspace(0.0, 2.5, 126), "delays": np.arange(-60.0, 201.0, 5.0)}


@pytest.fixture
def app(toy, tmp_path):
    return Explorer(toy, map_kwargs=MAP, debounce=0, data_path=tmp_path / "toy_store",
                    export_folder=tmp_path / "export", restore=False)


def test_explorer_builds_every_view_without_errors(app):
    for name in ("map_view", "population_view", "structure_view", "selection_table",
                 "trajectory_view", "quality_view", "export"):
        assert getattr(app, name) is not None, name
    assert app.messages.errors == []
    assert app.model.trpes_map is not None
    assert app.model.clusters is not None and len(app.model.cluster_names) >= 2


def test_explorer_brush_on_s2_band_links_all_views(app, toy):
    ms = app.brush((1.35, 1.65), (0.0, 60.0))
    model = app.model
    # selection table: grouped by state, the S2 band is made by S2 snapshots
    model.group_by = "state"
    table = app.selection_table.table
    assert table["label"].iloc[0] == "S2"
    assert table["share"].iloc[0] > 0.99
    assert table["share"].sum() == pytest.approx(1.0, abs=1e-9)
    # structure view: the strongest contributing geometries, captioned
    view = app.structure_view
    assert view.shown_ids == tuple(model.band["snapshot"].iloc[: view.n_top.value])
    first = model.snapshot_info(view.shown_ids[0])
    assert first["state"] == "S2"
    assert f"trajectory {first['traj']}" in view.caption.value
    # population view: the selected delay range is shaded
    np.testing.assert_allclose(app.population_view.delay_band.x, [0.0, 0.0, 60.0, 60.0])
    assert app.population_view.delay_band.visible
    # map view: the box is drawn, the cuts follow
    np.testing.assert_allclose(app.map_view.box.x, [1.35, 1.65, 1.65, 1.35, 1.35])
    print(f"\nin-kernel brush -> all views updated: {ms:.1f} ms (toy ensemble)")


def test_explorer_brush_on_s1_band_at_late_delays(app):
    app.brush((0.35, 0.65), (150.0, 200.0))
    app.model.group_by = "state"
    table = app.selection_table.table
    assert table["label"].iloc[0] == "S1" and table["share"].iloc[0] > 0.99
    app.model.group_by = "cluster"
    names = app.selection_table.table["label"].tolist()
    assert all(n.startswith("cluster S1") for n in names)  # clusters are split by state


def test_explorer_choosing_a_table_row_shows_its_structures(app):
    app.brush((1.35, 1.65), (0.0, 60.0))
    app.model.group_by = "traj"
    key = int(app.selection_table.table["key"].iloc[1])
    app.selection_table.rows.value = key
    assert {app.model.snapshot_info(s)["traj"] for s in app.structure_view.shown_ids} == {key}
    assert app.model.trajectory == key
    assert app.trajectory_view.shown == key


def test_explorer_exclusion_changes_map_and_populations(app):
    app.brush((1.35, 1.65), (0.0, 60.0))
    assert set(app.model.band["traj"]) & {0, 1, 2, 3, 4, 5}
    before = np.array(app.model.trpes_map.intensity)
    n_map, n_pop = app.map_view.n_computed, app.population_view.n_computed
    app.model.exclude([0, 1, 2, 3, 4, 5])
    assert app.map_view.n_computed == n_map + 1
    assert app.population_view.n_computed == n_pop + 1
    after = np.array(app.model.trpes_map.intensity)
    assert not np.allclose(before, after)
    assert not set(app.model.band["traj"]) & {0, 1, 2, 3, 4, 5}  # the band followed
    app.model.restore(app.model.excluded)
    np.testing.assert_allclose(app.model.trpes_map.intensity, before, rtol=1e-12)


def test_explorer_decomposition_grid_and_controls(app):
    mv = app.map_view
    mv.decomposition.value = "neutral state"
    comps = app.model.trpes_map.components
    assert len(mv.grid.children) == len(comps) >= 2
    # the small maps share one colour scale
    scales = {id(fig.marks[0].scales["color"]) for fig in mv.grid.children}
    assert len(scales) == 1
    n = mv.n_computed
    mv.probe_fwhm.value = 60.0  # a wider probe broadens the band (debounce 0: at once)
    assert mv.n_computed == n + 1
    assert app.model.trpes_map.params["probe"]["fwhm"] == 60.0
    mv.probe_fwhm.value = 30.0
    mv.decomposition.value = "total"
    assert mv.grid.children == ()


def test_explorer_callback_error_is_shown_not_raised(app):
    mv = app.map_view
    mv.photon_energy.value = 5.0
    mv.probe_fwhm.value = 0.1  # allowed by the control
    app.model.trpes_map = None  # a broken state: brushing needs a map
    app.brush((1.0, 1.2), (0.0, 10.0))
    assert app.messages.errors
    assert "no map is shown yet" in app.messages.errors[-1]["text"]
    assert "Traceback" in app.messages.widget.value
    mv.probe_fwhm.value = 30.0  # recompute restores a map
    assert app.model.trpes_map is not None
    app.messages.clear()


def test_explorer_session_round_trip_beside_the_data(app, toy, tmp_path):
    import ensemblelab

    store = ensemblelab.save(toy, tmp_path / "toy_store")
    digest = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in store.rglob("*")
              if p.is_file()}
    first = Explorer(toy, map_kwargs=MAP, debounce=0, data_path=store, restore=False,
                     clusters=False)
    first.model.exclude([7, 8])
    first.brush((1.35, 1.65), (0.0, 60.0))
    first.model.labels = {"bands": {"A": [1.35, 1.65, 0.0, 60.0]}}
    path = first.save_session()
    assert path == tmp_path / "toy_store.session.json"  # beside the data, not inside
    state = json.loads(path.read_text())
    assert state["excluded"] == [7, 8] and state["selection"]["energy_range"] == [1.35, 1.65]
    second = Explorer(toy, map_kwargs=MAP, debounce=0, data_path=store, clusters=False)
    assert second.model.excluded == (7, 8)
    assert second.model.energy_range == (1.35, 1.65)
    assert second.model.selected == first.model.selected
    assert second.model.labels == first.model.labels
    after = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in store.rglob("*")
             if p.is_file()}
    assert after == digest  # the data files were never written


def test_explorer_exports_structures_figures_tables(app):
    app.brush((1.35, 1.65), (0.0, 60.0))
    out = app.export.root / "band"  # exports stay inside the folder chosen at start
    app.export.folder.value = "band"
    app.export.click("structures XYZ")
    app.export.click("structures PDB")
    app.export.click("figures PNG")
    app.export.click("figures SVG")
    app.export.click("tables CSV")
    assert app.messages.errors == [], app.messages.errors
    xyz = (out / "selection.xyz").read_text().splitlines()
    n_atoms = app.model.ens.n_atoms
    assert int(xyz[0]) == n_atoms
    assert len(xyz) == len(app.model.selected) * (n_atoms + 2)  # XYZ layout (common practice)
    assert (out / "selection.pdb").read_text().count("MODEL") >= len(app.model.selected)
    assert (out / "trpes_map.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG magic
    assert b"<svg" in (out / "populations.svg").read_bytes()[:2000]
    import pandas as pd

    by_state = pd.read_csv(out / "band_by_state.csv")
    assert by_state["share"].sum() == pytest.approx(1.0, abs=1e-9)
    assert {"populations.csv", "band_snapshots.csv", "trpes_map.csv"} <= {
        p.name for p in Path(out).iterdir()}


def test_explorer_empty_brush_says_no_signal_and_shows_nothing(app):
    # far above both toy bands (1.5 and 0.5 eV; see the module docstring) and late
    app.brush((2.2, 2.5), (150.0, 200.0))
    model = app.model
    band = model.band
    assert band is not None and band.empty and band.attrs["no_signal"]
    assert band.attrs["signal_fraction"] < model.min_signal_fraction  # stated: 0.1 %
    assert model.selected == ()
    assert "No signal here" in app.selection_table.summary.value
    assert "below 0.1 %" in app.selection_table.summary.value
    assert app.selection_table.rows.options == ()
    assert app.structure_view.shown_ids == ()
    assert "no signal here" in app.map_view.band_label.value
    # a band on the S2 signal is not empty
    app.brush((1.35, 1.65), (0.0, 60.0))
    assert not model.band.attrs["no_signal"] and model.band.attrs["signal_fraction"] > 0.01
    assert app.messages.errors == []


def test_explorer_header_counts_after_exclusion_and_show_switches_tabs(app, toy):
    assert f"{toy.n_trajectories} trajectories" in app.header.value
    assert "excluded" not in app.header.value
    n_map, n_pop = app.map_view.n_computed, app.population_view.n_computed
    app.model.exclude([3, 5])
    n_left = toy.n_trajectories - 2
    assert f"{n_left} trajectories" in app.header.value
    assert f"2 of {toy.n_trajectories} excluded (trajectories 3, 5)" in app.header.value
    # every view uses the same exclusion state: the map and the populations are of
    # the remaining trajectories
    assert app.model.current.n_trajectories == n_left
    assert (app.map_view.n_computed, app.population_view.n_computed) == (n_map + 1, n_pop + 1)
    assert "<b class='ensemblelab-n-excluded'>2</b> excluded: 3, 5" in \
        app.quality_view.summary.value
    app.model.restore([3, 5])
    assert "excluded" not in app.header.value
    # "show trajectory" in the quality tab switches to the trajectory tab
    app.tabs.selected_index = 1
    qv = app.quality_view
    key = 7
    qv.rows.options = [(f"trajectory {key}", key)]  # as if flagged
    qv.rows.value = (key,)
    qv.show_button.click()
    assert app.tabs.selected_index == 0
    assert app.model.trajectory == key and app.trajectory_view.shown == key
    assert app.messages.errors == []


def test_explorer_exclusion_is_a_mask_not_a_copy(toy, tmp_path, monkeypatch):
    """Exclusions reach every computation as ``exclude=`` (no Ensemble copy is made), and
    give the numbers of the reduced ensemble (computed independently (not published):
    the same functions on ``toy.without(...)``)."""
    from ensemblelab.compute.kinetics.populations import populations
    from ensemblelab.compute.spectroscopy import compute_trpes
    from ensemblelab.data.ensemble import Ensemble

    app = Explorer(toy, map_kwargs=MAP, debounce=0, restore=False, clusters=False,
                   export_folder=tmp_path / "export")
    app.brush((1.35, 1.65), (0.0, 60.0))

    def no_copy(self, rows):
        raise AssertionError("an exclusion copied the ensemble")

    monkeypatch.setattr(Ensemble, "_take", no_copy)
    app.model.exclude([3, 5])
    monkeypatch.undo()
    assert app.messages.errors == []
    reduced = toy.without([3, 5])
    probe, pump = app.map_view.pulses()
    energies, delays = app.map_view.grids()
    ref = compute_trpes(reduced, probe=probe, pump=pump, kinetic_energies=energies,
                        delays=delays, progress=False)
    shown = app.model.trpes_map
    np.testing.assert_allclose(shown.intensity, ref.intensity, rtol=0,
                               atol=1e-12 * np.abs(ref.intensity).max())
    pop = populations(reduced, time_grid=app.population_view.table["time"].unique())
    np.testing.assert_allclose(app.population_view.table["population"].to_numpy(),
                               pop["population"].to_numpy(), atol=1e-12)
    band = app.model.band
    assert not set(band["traj"]) & {3, 5}  # excluded trajectories never contribute
    assert app.model.band_summary()["n_trajectories"] <= toy.n_trajectories - 2


def test_explorer_exclude_argument_starts_with_one_exclusion_state(toy, tmp_path):
    import pandas as pd

    flags = pd.DataFrame({"traj": [2, 4, 9], "flagged": [True, False, True],
                          "reason": ["invented", "", "invented"]})
    app = Explorer(toy, map_kwargs=MAP, debounce=0, restore=False, clusters=False,
                   flags=flags, exclude=flags, export_folder=tmp_path / "export")
    assert app.model.excluded == (2, 9)  # the flagged rows of the table
    n_left = toy.n_trajectories - 2
    assert f"{n_left} trajectories" in app.header.value
    assert app.model.trpes_map.params["n_trajectories"] == n_left
    assert app.population_view.table.attrs["excluded"] == [2, 9]
    assert "<b class='ensemblelab-n-excluded'>2</b> excluded: 2, 9" in \
        app.quality_view.summary.value
    app2 = Explorer(toy, map_kwargs=MAP, debounce=0, restore=False, clusters=False,
                    exclude=[1], export_folder=tmp_path / "export2")
    assert app2.model.excluded == (1,) and app2.model.n_trajectories == toy.n_trajectories - 1
    assert app2.model.n_snapshots == toy.without([1]).n_snapshots


def test_explorer_clusters_and_flags_in_the_background(toy, tmp_path):
    """Inside a running event loop (as in a kernel) the explorer returns with the map
    usable, then clustering and flags arrive from a worker thread with a status line."""
    import asyncio

    async def main():
        app = Explorer(toy, map_kwargs=MAP, debounce=0, restore=False, background=True,
                       export_folder=tmp_path / "export")
        # built: the map is there, the background results are not applied yet (they are
        # handed to this loop, which has not run since)
        state = (app.model.trpes_map is not None, app.model.clusters, app.model.flags,
                 "in the background" in app.jobs.status.value,
                 "checking the trajectories" in app.quality_view.summary.value)
        app.brush((1.35, 1.65), (0.0, 60.0))  # usable while the jobs run
        for _ in range(600):
            if app.jobs.done.is_set():
                break
            await asyncio.sleep(0.05)
        return app, state

    app, state = asyncio.run(main())
    assert state == (True, None, None, True, True)
    assert app.jobs.done.is_set() and app.jobs.status.value == ""
    assert app.model.clusters is not None and app.model.flags is not None
    assert set(app.jobs.seconds) == {"clustering the snapshots", "checking the trajectories"}
    # the band brushed meanwhile keeps its snapshots (the medoid does not replace them)
    assert app.model.selected == tuple(app.model.band["snapshot"][:len(app.model.selected)])
    assert "trajectories flagged" in app.quality_view.summary.value
    assert app.messages.errors == []


def test_explorer_without_a_loop_starts_with_the_largest_clusters_medoid(toy, tmp_path):
    app = Explorer(toy, map_kwargs=MAP, debounce=0, restore=False,
                   export_folder=tmp_path / "export")
    assert not app.jobs.background and app.jobs.done.is_set()
    summary = app.cluster_result.summary
    biggest = int(summary.sort_values("fraction", ascending=False)["medoid_snapshot"].iloc[0])
    assert app.model.selected == (biggest,)
    with pytest.raises(RuntimeError, match="running event loop"):
        Explorer(toy, map_kwargs=MAP, debounce=0, restore=False, background=True,
                 export_folder=tmp_path / "export2")


def test_explorer_message_heading_only_with_messages(app):
    assert app.messages.messages == [] and app.messages_head.layout.display == "none"
    app.messages.info("invented message")
    assert app.messages_head.layout.display == "block"
