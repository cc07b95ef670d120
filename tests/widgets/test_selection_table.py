from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab.widgets import SelectionTable, group_band


def _fake_band(toy, rows):
    # a hand-made per-snapshot contribution table (shape of SelectionModel.band)
    rng = np.random.default_rng(1)
    intensity = rng.uniform(0.1, 1.0, size=rows.size)
    snap = toy.snapshots.iloc[rows]
    band = pd.DataFrame({
        "snapshot": snap["snapshot"].to_numpy(), "traj": snap["traj"].to_numpy(),
        "time": snap["time"].to_numpy(), "active": snap["active"].to_numpy(),
        "intensity": intensity, "share": intensity / intensity.sum(),
        "cluster": rows % 3, "weight": 1.0,
    })
    return band.sort_values("share", ascending=False).reset_index(drop=True)


def test_group_band_sums_shares_like_bincount(toy):
    band = _fake_band(toy, np.arange(0, 600, 7))
    table = group_band(band, "cluster")
    expected = np.bincount(band["cluster"], weights=band["share"])  # independent sum
    got = table.set_index("key")["share"].sort_index().to_numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert table["share"].is_monotonic_decreasing
    assert table["share"].sum() == pytest.approx(1.0)
    by_state = group_band(band, "state", state_labels=toy.state_labels)
    assert set(by_state["label"]) <= set(toy.state_labels)


def test_selectiontable_lists_groups_and_row_choice_selects(model, toy):
    view = SelectionTable(model)
    assert view.table is None and "No band" in view.summary.value
    band = _fake_band(toy, np.arange(0, 900, 5))
    model.band = band
    assert len(view.rows.options) == 3
    model.group_by = "traj"
    assert view.group.value == "traj"
    assert len(view.table) == band["traj"].nunique()
    top = view.table["key"].iloc[0]
    view.rows.value = int(top)  # the user chooses the first row
    expected = band.loc[band["traj"] == top, "snapshot"].tolist()
    assert list(model.selected) == expected and model.trajectory == int(top)


def test_format_percent_has_sensible_digits():
    from ensemblelab.widgets._util import format_percent

    # expected strings: common practice for percentages in tables
    assert format_percent(0.8671) == "86.7 %"
    assert format_percent(1.0) == "100.0 %"
    assert format_percent(0.00067) == "0.067 %"
    assert format_percent(6.7e-19) == "< 0.001 %"
    assert format_percent(0.0) == "0 %"
    assert format_percent(None) == "-" and format_percent(float("nan")) == "-"


def test_selectiontable_is_one_table_hidden_before_a_band(model, toy):
    """Before a band: no empty bordered list; after: one table (the clickable rows) with
    its column heads, not the same rows twice (common practice: show data once)."""
    from ensemblelab.widgets import SelectionTable

    model.group_by = "state"
    view = SelectionTable(model)
    assert view.rows.layout.display == "none" and view.html.value == ""
    shares = np.linspace(0.1, 0.9, toy.n_snapshots)  # an invented band: weights by row
    band = toy.snapshots.assign(share=shares / shares.sum(), intensity=shares,
                                state=toy.snapshots["active"], cluster=-1)
    model.band = band
    assert view.rows.layout.display == "flex"
    assert len(view.rows.options) == len(view.table) > 0
    assert "<tr>" not in view.html.value and "share" in view.html.value
    model.band = None
    assert view.rows.layout.display == "none"
