from __future__ import annotations

import pandas as pd

from ensemblelab.widgets import QualityView


def _flags():
    return pd.DataFrame({"traj": [2, 5, 7], "flagged": [True, False, True],
                         "reason": ["energy jump without a hop", "", "NaN energies"],
                         "first_bad_time": [40.0, float("nan"), 12.0], "score": [3.0, 0.1, 9.0]})


def test_qualityview_lists_flagged_rows_with_reasons(model):
    view = QualityView(model, flags=_flags())
    labels = [label for label, _ in view.rows.options]
    assert len(labels) == 2
    assert "energy jump without a hop" in labels[0] and "from 40.0 fs" in labels[0]


def test_qualityview_exclude_and_restore_write_the_model(model):
    view = QualityView(model, flags=_flags())
    view.rows.value = (7,)
    view.exclude_button.click()
    assert model.excluded == (7,)
    assert "excluded" in view.rows.options[1][0]
    view.exclude_all.click()
    assert model.excluded == (2, 7)
    view.rows.value = (2,)
    view.restore_button.click()
    assert model.excluded == (7,)
    view.restore_all.click()
    assert model.excluded == ()
