"""The info and convert sub-commands, through ensemblelab.cli.main and capsys."""

from __future__ import annotations

from pathlib import Path

import pytest

from ensemblelab.cli import main
from ensemblelab.io import load, save, write_extxyz
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble

BAD = Path(__file__).resolve().parent / "data" / "bad"


@pytest.fixture()
def toy_folder(tmp_path):
    # 6 trajectories, every third ends early (ragged=True): ids 2 and 5
    ens = make_toy_ensemble(6, ragged=True, seed=3)
    return ens, write_extxyz(ens, tmp_path / "toy", compress=True)


def _table(out: str) -> dict[str, str]:
    rows = {}
    for line in out.splitlines()[1:]:
        key, _, value = line.strip().partition("  ")
        rows[key.strip()] = value.strip()
    return rows


def test_cli_info_summary_table(toy_folder, capsys):
    ens, folder = toy_folder
    assert main(["info", str(folder), "--no-progress"]) == 0
    out = capsys.readouterr().out
    rows = _table(out)
    assert out.splitlines()[0].endswith("[extxyz]")
    assert rows["trajectories"] == "6"
    assert rows["snapshots"].startswith(f"{ens.n_snapshots} (")
    assert rows["time span"] == "0 .. 300 fs"
    assert rows["neutral states"] == "3 (S0, S1, S2)"
    assert rows["cation states"] == "1 (D0)"
    assert rows["initial states"] == "S2: 6"
    assert rows["weights"] == "1 .. 1 (sum 6)"
    assert rows["early-ending"] == "2 trajectories end before 300 fs: 2, 5"
    assert "dyson" in rows["arrays"] and "amplitudes" in rows["arrays"]
    assert rows["snapshot columns"] == "e_kin, e_tot"
    assert rows["hops"] == str(len(ens.hops()))
    assert rows["sources"].startswith("7 (6 extxyz, 1 csv)")  # 6 trajectory files + the csv


def test_cli_info_on_store_and_progress_bar(toy_folder, tmp_path, capsys):
    ens, _ = toy_folder
    path = save(ens, tmp_path / "s.ens")
    assert main(["info", str(path)]) == 0
    out, err = capsys.readouterr()
    assert "[store]" in out.splitlines()[0]
    assert main(["info", str(toy_folder[1])]) == 0
    assert "loading" in capsys.readouterr().err  # the progress bar goes to stderr


def test_cli_info_bad_input_is_one_clean_error_line(capsys):
    assert main(["info", str(BAD / "decreasing_time.xyz"), "--no-progress"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert err[0].startswith("ensemblelab info: error: ")
    assert "frame 2, line 12, field 'time': decreasing time" in err[0]


def test_cli_info_nonfinite_keep_prints_warning_note(capsys):
    assert main(["info", str(BAD / "nan_energy.xyz"), "--nonfinite", "keep",
                 "--no-progress"]) == 0
    out, err = capsys.readouterr()
    assert "non-finite values   energies" in out
    assert "ensemblelab: EnsembleWarning: " in err and "first at frame 1" in err


def test_cli_convert_to_store_round_trip(toy_folder, tmp_path, capsys):
    ens, folder = toy_folder
    dst = tmp_path / "out.ens"
    assert main(["convert", str(folder), str(dst), "--no-progress"]) == 0
    assert f"wrote {dst} (store): 6 trajectories" in capsys.readouterr().out
    assert_ensemble_equal(ens, load(dst), check_metadata=True)
    # a second convert without --overwrite refuses, with the hint
    assert main(["convert", str(folder), str(dst), "--no-progress"]) == 1
    assert "pass overwrite=True" in capsys.readouterr().err
    assert main(["convert", str(folder), str(dst), "--overwrite", "--no-progress"]) == 0


def test_cli_convert_units(tmp_path, capsys):
    src = tmp_path / "h_0.xyz"
    src.write_text('1\ntime=0 active=0 energies="0.0 0.1"\nH 0 0 0\n'
                   '1\ntime=1 active=1 energies="0.0 0.11"\nH 0 0 1\n')
    dst = tmp_path / "h.ens"
    assert main(["convert", str(src), str(dst), "--energy-unit", "hartree", "--time-unit", "au",
                 "--length-unit", "bohr", "--no-progress"]) == 0
    ens = load(dst)
    # CODATA 2022 literals (via scipy.constants), rel 1e-8
    assert ens.energies[0, 1] == pytest.approx(0.1 * 27.211386245981, rel=1e-8)
    assert ens.snapshots["time"].iloc[1] == pytest.approx(0.024188843265864, rel=1e-8)
    assert ens.geometries[1, 0, 2] == pytest.approx(0.529177210544, rel=1e-8)


def test_cli_convert_to_extxyz(toy_folder, tmp_path, capsys):
    ens, _ = toy_folder
    store = save(ens, tmp_path / "s.ens")
    dst = tmp_path / "open"
    assert main(["convert", str(store), str(dst), "--to", "extxyz", "--compress",
                 "--no-progress"]) == 0
    assert len(list(dst.glob("traj_*.xyz.gz"))) == 6
    assert_ensemble_equal(ens, load(dst, progress=False))


def test_cli_convert_refuses_foreign_folder(toy_folder, tmp_path, capsys):
    foreign = tmp_path / "home"
    foreign.mkdir()
    (foreign / "notes.md").write_text("mine")
    assert main(["convert", str(toy_folder[1]), str(foreign), "--overwrite",
                 "--no-progress"]) == 1
    assert "refusing to overwrite a folder that is not a native store" in capsys.readouterr().err
    assert (foreign / "notes.md").read_text() == "mine"


def test_cli_demo_refuses_existing_output_before_simulating(tmp_path, capsys, monkeypatch):
    # an existing, non-empty --out is refused up front (common practice: fail before the
    # long work), and the hint names the command-line flag, not the Python keyword
    import ensemblelab.demo as demo

    def must_not_run(*args, **kw):
        raise AssertionError("the demo was simulated before the output was checked")

    monkeypatch.setattr(demo, "make_ensemble", must_not_run)
    out = tmp_path / "mine"
    (out / "xyz").mkdir(parents=True)
    (out / "xyz" / "notes.txt").write_text("the user's file")
    assert main(["demo", "--out", str(out), "--no-progress"]) == 1
    err = capsys.readouterr().err
    assert "--overwrite" in err and "overwrite=True" not in err
    assert (out / "xyz" / "notes.txt").read_text() == "the user's file"


def test_cli_input_format_the_hint_names_exists(tmp_path, capsys):
    # a snapshot table under a name that does not tell its format: the hint's flag works
    # (common practice: a hint names an option the user can type)
    ens = make_toy_ensemble(3, seed=2)
    from ensemblelab.io.table import write_table

    csv = tmp_path / "snapshots.csv"
    write_table(ens, csv)
    odd = tmp_path / "snapshots.dat"
    odd.write_bytes(csv.read_bytes())
    assert main(["info", str(odd)]) == 1
    err = capsys.readouterr().err
    assert "--input-format" in err
    assert main(["info", str(odd), "--input-format", "table", "--no-progress"]) == 0
    assert f"{ens.n_trajectories}" in capsys.readouterr().out
