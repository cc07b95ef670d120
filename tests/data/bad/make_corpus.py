"""Regenerate the bad-input corpus in this folder: one file or folder per case.

Run ``python tests/data/bad/make_corpus.py`` from the repository root. Every case
is small and hand-made (invented numbers); tests/io/test_bad_input.py asserts the
error type and message of each.
"""

from __future__ import annotations

import gzip
import json
import shutil
from pathlib import Path

HERE = Path(__file__).resolve().parent


def frame(t, active=1, energies="0.0 3.1 4.2", atoms=(("O", "0.0 0.0 0.1173"),
                                                     ("H", "0.0 0.7572 -0.4692"),
                                                     ("H", "0.0 -0.7572 -0.4692")),
          extra="", count=None):
    lines = [str(len(atoms) if count is None else count),
             f'time={t} active={active} energies="{energies}"{extra}']
    lines += [f"{sym} {xyz}" for sym, xyz in atoms]
    return "\n".join(lines) + "\n"


WATER = (("O", "0.0 0.0 0.1173"), ("H", "0.0 0.7572 -0.4692"), ("H", "0.0 -0.7572 -0.4692"))

XYZ_CASES: dict[str, str] = {
    "empty.xyz": "",
    "truncated_last_frame.xyz": frame(0.0) + frame(0.5) + "3\ntime=1.0 active=1 "
                                'energies="0.0 3.1 4.2"\nO 0.0 0.0 0.1173\n',
    "atom_lines_exceed_count.xyz": frame(0.0) + frame(0.5).replace(
        "H 0.0 -0.7572", "H 0.0 0.1 0.2\nH 0.0 -0.7572") + frame(1.0),
    "atom_count_changes.xyz": frame(0.0) + frame(0.5, atoms=WATER[:2]) + frame(1.0),
    "non_numeric_coordinate.xyz": frame(0.0) + frame(0.5).replace("0.7572 -0.4692",
                                                                   "0.75.72 -0.4692"),
    "nan_energy.xyz": frame(0.0) + frame(0.5, energies="0.0 nan 4.2") + frame(1.0),
    "inf_coordinate.xyz": frame(0.0) + frame(0.5).replace("0.0 0.0 0.1173", "0.0 inf 0.1173"),
    "element_changes.xyz": frame(0.0) + frame(0.5, atoms=(WATER[0], WATER[1], ("F", "0 0 0"))),
    "duplicated_time.xyz": frame(0.0) + frame(0.5) + frame(0.5),
    "decreasing_time.xyz": frame(0.0) + frame(0.5) + frame(0.25),
    "active_out_of_range.xyz": frame(0.0) + frame(0.5, active=3),
    "energies_varying_length.xyz": frame(0.0) + frame(0.5, energies="0.0 3.1"),
    "missing_energies.xyz": "3\ntime=0.0 active=1\n" + "\n".join(
        f"{s} {x}" for s, x in WATER) + "\n",
    "missing_key_later_frame.xyz": frame(0.0) + frame(0.5).replace(" active=1", ""),
    "atom_line_wrong_columns.xyz": frame(0.0).replace("O 0.0 0.0 0.1173", "O 0.0 0.0"),
    "unknown_unit.xyz": frame(0.0, extra=" energy_unit=furlong") + frame(0.5),
    "dyson_without_cation.xyz": frame(0.0, extra=' dyson="0.9"') + frame(0.5, extra=' dyson="0.9"'),
    "adt_wrong_size.xyz": frame(0.0, extra=' adt="1 0 0 1"') + frame(0.5, extra=' adt="1 0 0 1"'),
    "hartree_declared_ev.xyz": frame(0.0, energies="-76.40 -76.12 -76.08",
                                     extra=" energy_unit=eV")
    + frame(0.5, energies="-76.41 -76.13 -76.09"),
}

FOLDER_CASES: dict[str, dict[str, str]] = {
    "elements_differ_between_trajectories": {
        "traj_0.xyz": frame(0.0) + frame(0.5),
        "traj_1.xyz": frame(0.0, atoms=(("O", "0 0 0"), ("H", "0 1 0"), ("D", "0 -1 0"))),
    },
    "states_differ_between_trajectories": {
        "traj_0.xyz": frame(0.0) + frame(0.5),
        "traj_1.xyz": frame(0.0, energies="0.0 3.0 4.0 5.0"),
    },
    "trajectories_csv_without_traj": {
        "traj_0.xyz": frame(0.0) + frame(0.5),
        "trajectories.csv": "id,weight\n0,1.0\n",
    },
    "two_files_same_trajectory": {
        "traj_3.xyz": frame(0.0),
        "traj_3.xyz.gz": "",  # replaced by real gzip bytes below
    },
}


def write_stores() -> None:
    import numpy as np
    import pandas as pd

    from ensemblelab import Ensemble
    from ensemblelab.io import save

    ens = Ensemble.from_arrays(
        traj=[0, 0], time=[0.0, 0.5], active=[1, 1], geometries=np.zeros((2, 1, 3)),
        symbols=["H"], energies=np.array([[0.0, 3.0], [0.0, 3.1]]),
        trajectories=pd.DataFrame({"traj": [0]}),
        metadata={"producer": "tests/data/bad/make_corpus.py (invented)"},
    )
    cases = {}
    for name in ("store_missing_array", "store_bad_json", "store_shape_mismatch",
                 "store_future_schema"):
        path = HERE / name
        if path.exists():
            shutil.rmtree(path)
        cases[name] = save(ens, path)
    (cases["store_missing_array"] / "energies.npy").unlink()
    manifest = cases["store_bad_json"] / "manifest.json"
    manifest.write_text(manifest.read_text()[:-40])
    np.save(cases["store_shape_mismatch"] / "geometries.npy", np.zeros((2, 2, 3)))
    manifest = cases["store_future_schema"] / "manifest.json"
    data = json.loads(manifest.read_text())
    data["schema_version"] = 99
    manifest.write_text(json.dumps(data, indent=2) + "\n")


def main() -> None:
    for name, text in XYZ_CASES.items():
        (HERE / name).write_text(text)
    (HERE / "truncated_gzip.xyz.gz").write_bytes(
        gzip.compress((frame(0.0) * 3).encode(), mtime=0)[:-12])
    for folder, files in FOLDER_CASES.items():
        path = HERE / folder
        if path.exists():
            shutil.rmtree(path)
        path.mkdir()
        for name, text in files.items():
            if name.endswith(".gz"):
                (path / name).write_bytes(gzip.compress(frame(0.0).encode(), mtime=0))
            else:
                (path / name).write_text(text)
    write_stores()


if __name__ == "__main__":
    main()
