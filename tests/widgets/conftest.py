"""Fixtures of the widget tests: everything runs without a browser or a kernel.

Widgets created outside a kernel use dummy comms; we simulate what the
browser sends by setting the traits it would set.
"""

from __future__ import annotations

import pytest

pytest.importorskip("ipywidgets")
pytest.importorskip("bqplot")
pytest.importorskip("nglview")


@pytest.fixture(scope="module")
def toy():
    from ensemblelab.testing import make_toy_ensemble

    return make_toy_ensemble(24, seed=7, t_max=200.0, dt=2.0)


@pytest.fixture
def model(toy):
    from ensemblelab.widgets import SelectionModel

    return SelectionModel(toy)
