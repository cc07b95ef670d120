"""The headless report: every promised file exists, the page links only to real files."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from ensemblelab.errors import StoreError


@pytest.fixture(scope="module")
def toy():
    from ensemblelab.testing import make_toy_ensemble

    return make_toy_ensemble(30, seed=2, t_max=200.0, dt=2.0)


@pytest.fixture(scope="module")
def report(toy, tmp_path_factory):
    from ensemblelab.report import build_report

    out = tmp_path_factory.mktemp("rep") / "report"
    page = build_report(toy, out, energies=np.linspace(0, 2.5, 101),
                        delays=np.arange(-60.0, 201.0, 10.0), exclude_flagged=False)
    return out, page


def test_report_writes_page_figures_tables_structures(report):
    out, page = report
    assert page == out / "index.html"
    for rel in ("figures/trpes_map.png", "figures/trpes_by_state.png", "figures/populations.png",
                "tables/trpes_map.csv", "tables/populations.csv", "tables/flags.csv",
                "tables/clusters.csv", "tables/representatives.csv",
                "structures/representatives.xyz"):
        assert (out / rel).is_file(), rel
    for png in (out / "figures").glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (common practice)
    text = page.read_text()
    links = set(re.findall(r"(?:src|href)='([^']+)'", text))
    assert links and all((out / link).is_file() for link in links)
    assert "Flagged trajectories" in text and "Representative structures" in text


def test_report_tables_hold_consistent_numbers(report, toy):
    out, _ = report
    pop = pd.read_csv(out / "tables" / "populations.csv")
    sums = pop.groupby("time")["population"].sum()
    np.testing.assert_allclose(sums, 1.0, atol=1e-9)  # sum rule (common practice)
    clusters = pd.read_csv(out / "tables" / "clusters.csv")
    xyz = (out / "structures" / "representatives.xyz").read_text().splitlines()
    n_frames = len(xyz) // (toy.n_atoms + 2)  # XYZ layout: count, comment, atoms
    assert n_frames == len(pd.read_csv(out / "tables" / "representatives.csv"))
    assert n_frames == len(clusters)  # one medoid per cluster
    flags = pd.read_csv(out / "tables" / "flags.csv")
    assert set(flags["traj"]) == set(toy.trajectories["traj"])


def test_report_refuses_to_overwrite_and_leaves_no_temporaries(report, toy):
    from ensemblelab.report import build_report

    out, page = report
    before = page.read_bytes()
    with pytest.raises(StoreError, match="exists; pass overwrite=True"):
        build_report(toy, out)
    assert page.read_bytes() == before
    assert [p.name for p in out.parent.iterdir()] == ["report"]


def test_report_command_line(toy, tmp_path, capsys):
    import ensemblelab
    from ensemblelab.cli import main

    store = ensemblelab.save(toy, tmp_path / "toy")
    status = main(["report", str(store), "--out", str(tmp_path / "rep")])
    assert status == 0
    assert "report written to" in capsys.readouterr().out
    assert (tmp_path / "rep" / "index.html").is_file()
    assert main(["report", str(store), "--out", str(tmp_path / "rep")]) == 1  # exists
    assert "exists" in capsys.readouterr().err
