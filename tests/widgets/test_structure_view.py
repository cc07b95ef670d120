from __future__ import annotations

import numpy as np
import pytest

from ensemblelab.data.ensemble import Ensemble
from ensemblelab.widgets import SelectionModel, StructureView


def _rotation(angle: float) -> np.ndarray:
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


@pytest.fixture
def rigid():
    # one molecule moved rigidly from frame to frame: aligned copies coincide (analytic)
    rng = np.random.default_rng(0)
    base = rng.normal(size=(5, 3))
    frames = np.stack([base @ _rotation(0.3 * i).T + i for i in range(6)])
    return Ensemble.from_arrays(traj=[0, 0, 0, 1, 1, 1], time=[0.0, 1, 2, 0, 1, 2],
                                active=[1] * 6, geometries=frames,
                                symbols=["C", "N", "O", "H", "H"],
                                energies=np.zeros((6, 2)))


def test_structureview_overlays_top_n_of_selection(model, toy):
    view = StructureView(model, n_top=3, align=False)
    model.selected = (10, 40, 70, 100, 130)
    assert view.shown_ids == (10, 40, 70)
    coords = view.coordinates()
    assert coords.shape == (1, 3 * toy.n_atoms, 3)
    np.testing.assert_allclose(coords[0, toy.n_atoms: 2 * toy.n_atoms],
                               toy.geometries[40], atol=1e-5)  # float32 in the viewer
    caption = view.caption.value
    info = model.snapshot_info(10)
    assert f"trajectory {info['traj']}" in caption and f"t = {info['time']:.1f} fs" in caption
    assert caption.count("<tr>") == 4  # header + 3 overlaid snapshots
    assert model.frame == 10


def test_structureview_overlay_colours_match_their_table_rows(model, monkeypatch):
    """Each overlaid copy has one fixed colour (an NGL representation selecting its chain)
    and its table row carries the same colour as a key (common practice for overlays)."""
    from ensemblelab.widgets._ngl import CHAINS
    from ensemblelab.widgets.structure_view import OVERLAY_COLORS

    view = StructureView(model, n_top=3, align=False)
    calls = []
    real_add = view.view.add_trajectory

    def add_trajectory(*args, **kwargs):
        comp = real_add(*args, **kwargs)
        monkeypatch.setattr(comp, "add_representation",
                            lambda *a, **k: calls.append((a, k)))
        return comp

    monkeypatch.setattr(view.view, "add_trajectory", add_trajectory)
    model.selected = (10, 40, 70)
    assert [k["selection"] for _, k in calls] == [f":{c}" for c in CHAINS[:3]]
    assert [k["color"] for _, k in calls] == list(OVERLAY_COLORS[:3])
    rows = view.caption.value.split("<tr>")[2:]  # after the header row
    for row, color in zip(rows, OVERLAY_COLORS[:3], strict=True):
        assert f"color:{color}" in row


def test_structureview_aligns_rigidly_moved_copies(rigid):
    model = SelectionModel(rigid)
    view = StructureView(model, n_top=6, align=True)
    model.selected = tuple(range(6))
    xyz = view.coordinates()[0].reshape(6, 5, 3)
    spread = np.abs(xyz - xyz[0]).max()
    assert spread < 1e-4  # identical after Kabsch (float32 storage)
    view.align.value = False
    xyz = view.coordinates()[0].reshape(6, 5, 3)
    assert np.abs(xyz - xyz[0]).max() > 1.0  # and really moved without alignment


def test_structureview_step_mode_syncs_frame_both_ways(model):
    view = StructureView(model, mode="step", align=False)
    model.selected = (5, 50, 95)
    assert view.shown_ids == (5, 50, 95) and view.view.frame == 0
    view.step.value = 2  # the user steps
    assert model.frame == 95 and view.view.frame == 2
    model.frame = 50  # another view moves the current snapshot
    assert view.view.frame == 1 and view.step.value == 1
    assert f"t = {model.snapshot_info(50)['time']:.1f} fs" in view.caption.value


def test_structureview_follows_a_snapshot_outside_the_selection(model, toy):
    view = StructureView(model, align=False)
    model.selected = (5, 50)
    target = int(toy.snapshots["snapshot"].iat[400])
    model.frame = target
    traj = int(toy.snapshots["traj"].iat[400])
    n_steps = int((toy.snapshots["traj"] == traj).sum())
    assert view.mode.value == "step" and len(view.shown_ids) == n_steps
    assert view.shown_ids[view.view.frame] == target


def test_structureview_medoids_need_clusters(model):
    view = StructureView(model, align=False)
    view.medoids.click()  # a click without clusters: a visible error, not an exception
    assert view.messages.errors
    assert "no cluster medoids are known" in view.messages.errors[-1]["text"]
    model.cluster_medoids = (3, 30, 300)
    view.medoids.click()
    assert model.selected == (3, 30, 300) and view.shown_ids == (3, 30, 300)


def test_structureview_mirror_images_shown_with_one_handedness():
    """A molecule and its mirror image (z -> -z), rigidly moved: proper rotations cannot
    superpose them, a reflection can (analytic: Kabsch with an improper rotation; computed
    independently (not published)). Only when the user allows it."""
    rng = np.random.default_rng(3)
    base = rng.normal(size=(5, 3))
    mirror = base * np.array([1.0, 1.0, -1.0])
    frames = np.stack([base, mirror @ _rotation(0.7).T + 2.0])
    ens = Ensemble.from_arrays(traj=[0, 1], time=[0.0, 0.0], active=[1, 1], geometries=frames,
                               symbols=["C", "N", "O", "H", "H"], energies=np.zeros((2, 2)))
    model = SelectionModel(ens)
    view = StructureView(model, n_top=2, align=True)
    model.selected = (0, 1)
    xyz = view.coordinates()[0].reshape(2, 5, 3)
    assert np.abs(xyz[1] - xyz[0]).max() > 0.1  # handedness kept by default
    view.mirror.value = True
    xyz = view.coordinates()[0].reshape(2, 5, 3)
    assert np.abs(xyz[1] - xyz[0]).max() < 1e-4  # one handedness (float32 storage)
    np.testing.assert_allclose(ens.geometries[1], frames[1], atol=1e-6)  # data untouched
