"""Hostile session files: a typed error in the message area, the explorer keeps its defaults."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ensemblelab.errors import SchemaError
from ensemblelab.widgets import load_session

GOOD = {"format": "ensemblelab-session", "version": 1, "excluded": [1],
        "selection": {"selected": [0, 1], "group_by": "state"}, "labels": {}, "map": {}}

CASES = {
    "excluded_text": ({**GOOD, "excluded": ["1; rm -rf"]}, "excluded"),
    "version_dict": ({**GOOD, "version": {"a": 1}}, "version"),
    "version_bool": ({**GOOD, "version": True}, "version"),
    "selection_list": ({**GOOD, "selection": [1, 2]}, "selection"),
    "range_text": ({**GOOD, "selection": {"energy_range": ["a", "b"]}}, "energy_range"),
    "range_nan": ({**GOOD, "selection": {"delay_range": [0.0, float("nan")]}}, "delay_range"),
    "group_by_odd": ({**GOOD, "selection": {"group_by": "__class__"}}, "group_by"),
    "map_unknown_key": ({**GOOD, "map": {"__init__": 1}}, "map"),
    "map_nested": ({**GOOD, "map": {"photon_energy": [1, 2]}}, "photon_energy"),
    "labels_list": ({**GOOD, "labels": [1]}, "labels"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_session_wrong_types_are_schema_errors(tmp_path, case):
    state, field = CASES[case]
    path = tmp_path / "s.json"
    path.write_text(json.dumps(state, allow_nan=True))
    with pytest.raises(SchemaError, match=field):
        load_session(path)


def test_session_deeply_nested_and_huge_files_are_refused(tmp_path):
    path = tmp_path / "s.json"
    path.write_text('{"format": "ensemblelab-session", "labels": ' + "[" * 50_000
                    + "]" * 50_000 + "}")
    with pytest.raises(SchemaError):
        load_session(path)
    path.write_text(json.dumps({**GOOD, "labels": {"x": [[[[[[[[[[[[[[[[[[1]]]]]]]]]]]]]]]]]]}}))
    with pytest.raises(SchemaError, match="nests deeper"):
        load_session(path)
    with open(path, "w") as fh:
        fh.write('{"format": "ensemblelab-session", "pad": "')
        fh.write("x" * (17 * 2**20))
        fh.write('"}')
    with pytest.raises(SchemaError, match="more than the limit"):
        load_session(path)


def test_explorer_shows_a_hostile_session_error_and_keeps_defaults(tmp_path):
    from ensemblelab.testing import make_toy_ensemble
    from ensemblelab.widgets import Explorer

    path = tmp_path / "s.json"
    path.write_text(json.dumps({**GOOD, "excluded": [0, "x"]}))
    ens = make_toy_ensemble(4, t_max=40.0, dt=4.0)
    app = Explorer(ens, map_kwargs={"kinetic_energies": np.linspace(0.0, 2.0, 21),
                                    "delays": np.arange(-20.0, 41.0, 10.0)},
                   debounce=0, session_path=path, restore=True, clusters=False,
                   export_folder=tmp_path / "exports")
    assert any("excluded" in m["text"] for m in app.messages.errors), app.messages.errors
    assert app.model.excluded == ()  # defaults kept: nothing of the bad session applied
