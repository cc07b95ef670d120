"""The selection table shows every group's share with its trajectory-bootstrap interval
and greys the groups whose interval reaches zero.

Check values are computed independently (not published): ``band_share_table`` on the
model's own band analysis (the compute path), and the interval text of ``format_share``.
"""

from __future__ import annotations

import numpy as np

from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.uncertainty import band_share_table, format_share
from ensemblelab.widgets import SelectionModel, SelectionTable


def test_selection_rows_carry_intervals_and_grey_zero_groups(toy):
    trpes = compute_trpes(toy, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                          kinetic_energies=np.linspace(0.0, 2.5, 126),
                          delays=np.arange(-60.0, 201.0, 5.0), progress=False)
    model = SelectionModel(toy)
    model.trpes_map = trpes
    model.select_band(energy_range=(0.2, 1.8), delay_range=(0.0, 150.0))
    view = SelectionTable(model)
    model.group_by = "traj"
    assert {"lower", "upper", "includes_zero"} <= set(view.table.columns)
    ref = band_share_table(model.analysis, "traj")
    np.testing.assert_allclose(view.table["upper"], ref["upper"])
    first = ref.iloc[0]
    text = format_share(first["label"], first["share"], first["lower"], first["upper"])
    assert view.rows.options[0][0].startswith(text)
    # one trajectory among many: its interval reaches zero, so its row is greyed
    assert ref["includes_zero"].all()
    assert view.html.value.count("color:#999") == min(len(ref), 25)
