"""Loading defaults for NaN/Inf agree with the README: what is checked, what warns, what raises.

README (io section): the default ``nonfinite="raise"`` refuses a NaN/Inf in coordinates,
velocities, energies, the per-snapshot arrays and ``e_kin``/``e_pot``/``e_tot``; the demo needs
``nonfinite="keep"``, which warns and records which trajectories had them.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import constants

import ensemblelab as el
from ensemblelab.errors import EnsembleWarning, ParseError
from ensemblelab.io import load, load_table

DEMO = Path(__file__).resolve().parents[2] / "demo_data" / "ensemble"


def _nan_trajs(ens: el.Ensemble) -> set[int]:
    return {int(t) for t, kind in ens.metadata["injected_faults"].items() if kind == "nan_step"}


def test_demo_default_load_raises_naming_file_frame_line_field():
    with pytest.raises(ParseError) as info:
        load(DEMO, progress=False)
    err = info.value
    assert err.field in ("e_kin", "e_pot", "e_tot")
    assert err.frame is not None and err.line is not None and "nonfinite='keep'" in err.hint
    assert str(err.path).startswith(str(DEMO))


def test_demo_keep_warns_and_flags_exactly_the_broken_trajectory():
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ens = load(DEMO, progress=False, nonfinite="keep")
    mine = [w for w in caught if issubclass(w.category, EnsembleWarning)]
    assert len(mine) == 1 and "e_tot" in str(mine[0].message)  # one summary, not one per file
    broken = _nan_trajs(ens)  # the demo's ground truth (invented scenario)
    assert broken and set(ens.metadata["nonfinite"]) == broken
    for t in broken:
        assert "e_tot" in ens.metadata["nonfinite"][t]
    report = el.nonfinite_report(ens)
    assert len(report) == ens.n_trajectories
    assert set(report.loc[report["nonfinite"], "traj"]) == broken
    row = report.set_index("traj").loc[min(broken)]
    assert "e_tot" in row["fields"] and row["n_snapshots"] >= 1 and np.isfinite(row["first_time"])
    clean = report.loc[~report["nonfinite"]]
    assert (clean["fields"] == "").all() and clean["first_time"].isna().all()


def _xyz(path: Path, extra: str, *, unit: str = "") -> Path:
    """Three frames; XX in `extra` is nan in frame 1 and 2.5 elsewhere."""
    lines = []
    for k in range(3):
        keys = extra.replace("XX", "nan" if k == 1 else "2.5")
        lines += ["2", f"{unit} time={k} active=0 energies=\"0.0 2.0\" {keys}",
                  "H 0 0 0", "H 0 0 0.74"]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_user_columns_are_not_checked_but_energy_columns_are(tmp_path):
    # a user column: NaN means "missing", loads without a warning
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ens = load(_xyz(tmp_path / "a.xyz", "e_pot=1.0 score=XX"), progress=False)
    assert np.isnan(ens.snapshots["score"].iloc[1]) and "nonfinite" not in ens.metadata
    with pytest.raises(ParseError) as info:  # e_pot is checked (it was not before)
        load(_xyz(tmp_path / "b.xyz", "e_pot=XX score=1"), progress=False)
    assert (info.value.field, info.value.frame, info.value.line) == ("e_pot", 1, 6)


def test_e_pot_is_an_energy_and_converted(tmp_path):
    ens = load(_xyz(tmp_path / "a.xyz", "e_pot=1.0", unit="energy_unit=hartree"), progress=False)
    # 1 hartree in eV: CODATA via scipy.constants
    hartree_ev = constants.physical_constants["hartree-electron volt relationship"][0]
    assert ens.snapshots["e_pot"].iloc[1] == pytest.approx(hartree_ev, rel=1e-12)


def test_table_loader_checks_the_same_fields(tmp_path):
    table = pd.DataFrame({"traj": [0, 0, 1, 1], "time": [0.0, 1.0, 0.0, 1.0],
                          "active": [1, 1, 1, 0], "e_0": [0.0] * 4, "e_1": [3.0] * 4,
                          "e_tot": [3.1, 3.1, np.nan, 3.1], "note": [1.0, np.nan, 2.0, 3.0]})
    path = tmp_path / "run.csv"
    table.to_csv(path, index=False)
    with pytest.raises(ParseError) as info:
        load_table(path, geometries=False)
    assert (info.value.field, info.value.line) == ("e_tot", 4)  # header is line 1
    with pytest.warns(EnsembleWarning):
        ens = load_table(path, geometries=False, nonfinite="keep")
    assert ens.metadata["nonfinite"] == {1: ["e_tot"]}
    flags = el.nonfinite_report(ens).set_index("traj")["nonfinite"]
    assert flags.to_dict() == {0: False, 1: True}


def test_chunked_conversion_keeps_the_same_record(tmp_path):
    from ensemblelab.io.chunked import convert_extxyz_chunked

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EnsembleWarning)
        eager = load(DEMO, progress=False, nonfinite="keep")
        store = convert_extxyz_chunked(DEMO, tmp_path / "big.ens", chunk_size=20,
                                       progress=False, nonfinite="keep")
    lazy = load(store, lazy=True)
    assert lazy.metadata["nonfinite"] == eager.metadata["nonfinite"]


def test_cli_info_names_the_trajectories_with_nonfinite_values(capsys):
    from ensemblelab.cli import main

    assert main(["info", str(DEMO), "--no-progress"]) == 1  # the default raises, as documented
    assert "nonfinite='keep'" in capsys.readouterr().err
    assert main(["info", str(DEMO), "--nonfinite", "keep", "--no-progress"]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.strip().startswith("non-finite values"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EnsembleWarning)
        broken = sorted(_nan_trajs(load(DEMO, progress=False, nonfinite="keep")))
    assert "e_tot" in line and line.rstrip().endswith(", ".join(map(str, broken)))
