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
                "figures/convergence.png", "tables/convergence.csv", "tables/trpes_map.csv",
                "tables/populations.csv", "tables/flags.csv",
                "tables/clusters.csv", "tables/representatives.csv",
                "structures/representatives.xyz"):
        assert (out / rel).is_file(), rel
    for png in (out / "figures").glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (common practice)
    text = page.read_text()
    links = set(re.findall(r"(?:src|href)='([^']+)'", text))
    assert links and all((out / link).is_file() for link in links)
    assert "Flagged trajectories" in text and "Representative structures" in text
    assert "Is the ensemble large enough?" in text and "1/sqrt(N) law" in text


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


# ---------------------------------------------------------------- issue 20 items
#: invented suggested pulses (not physical; chosen to differ from the package defaults)
SUGGESTED = {"suggested_probe": {"photon_energy": 4.2, "fwhm": 20.0},
             "suggested_pump": {"photon_energy": 3.9, "fwhm": 15.0}}
#: the issue's example atom list (11 atoms, as in the demo's summary line)
ATOMS = ("C", "C", "H", "C", "O", "H", "N", "H", "H", "C", "N")


def _text(page) -> str:
    """The page's visible text, tags removed."""
    import html as _html

    raw = re.sub(r"<style>.*?</style>", "", page.read_text(), flags=re.S)
    return _html.unescape(re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", raw)))


@pytest.fixture(scope="module")
def suggested(tmp_path_factory):
    """A toy with suggested pulses and an 11-atom formula; report with default pulses."""
    from ensemblelab.report import build_report
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(30, seed=2, t_max=200.0, dt=2.0, n_atoms=len(ATOMS))
    ens = ens.replace(symbols=ATOMS, metadata={**ens.metadata, **SUGGESTED})
    out = tmp_path_factory.mktemp("rep_suggested") / "report"
    return ens, out, build_report(ens, out, exclude_flagged=False, n_boot=200)


def test_report_starts_from_and_states_the_suggested_pulses(suggested):
    _, out, page = suggested
    text = _text(page)
    assert "Probe 4.2 eV, FWHM 20 fs; pump 3.9 eV, FWHM 15 fs" in text
    assert "the ensemble's suggested pulses" in text
    # the default kinetic-energy grid runs to the probe photon energy (as in the explorer)
    grid = pd.read_csv(out / "tables" / "trpes_map.csv")
    energy_col = next(c for c in grid.columns if "energ" in c)
    assert grid[energy_col].max() == pytest.approx(4.2)


def test_report_pulses_match_the_explorer_defaults(suggested):
    from ensemblelab.report import report_pulses

    pytest.importorskip("bqplot")
    from ensemblelab.widgets.map_view import MapView

    ens = suggested[0]
    probe, pump = MapView(ens, compute=False).pulses()
    mine = report_pulses(ens)
    assert (mine["photon_energy"], mine["probe_fwhm"]) == (probe.photon_energy, probe.fwhm)
    assert (mine["pump_photon_energy"], mine["pump_fwhm"]) == (pump.photon_energy, pump.fwhm)
    given = report_pulses(ens, photon_energy=6.0, pump_fwhm=0.0)
    assert given["photon_energy"] == 6.0 and given["pump_fwhm"] == 0.0
    assert given["probe_fwhm"] == 20.0  # still the suggestion
    assert "photon energy: given" in given["source"]


def test_hill_formula_orders_carbon_hydrogen_then_alphabetical():
    from ensemblelab.report import hill_formula

    # Hill system (common practice): C, H, then alphabetical; without C all alphabetical
    assert hill_formula(ATOMS) == "C4H4N2O"  # counted by hand (computed independently)
    assert hill_formula(["Cl", "C", "H", "Cl", "Cl"]) == "CHCl3"  # chloroform (from memory)
    assert hill_formula(["O", "H", "H"]) == "H2O"  # no carbon: H sorts alphabetically
    assert hill_formula(["Na", "Cl"]) == "ClNa"  # no carbon: alphabetical (from memory)


def test_report_lists_atoms_as_a_formula(suggested):
    text = _text(suggested[2])
    assert "11 (C4H4N2O)" in text
    assert "".join(ATOMS) not in text


def test_report_names_fits_by_scheme_with_bootstrap_intervals(suggested):
    _, out, page = suggested
    text = _text(page)
    assert "fit A" not in text and "covariance" not in text
    fits = pd.read_csv(out / "tables" / "kinetics.csv")
    # every toy trajectory starts on S2 (make_toy_ensemble's construction)
    assert "single-exponential decay of S2" in set(fits["scheme"])
    free = fits[~fits["fixed"].astype(bool)]
    assert len(free) and free["interval"].str.startswith("95 % bootstrap (200 resamples").all()
    assert (free["lower"] <= free["value"]).all() and (free["value"] <= free["upper"]).all()
    tau = free.loc[free["parameter"] == "tau"].iloc[0]
    assert f"{tau['value']:.4g} fs [{tau['lower']:.4g}, {tau['upper']:.4g}]" in text
    assert "95 % bootstrap (200 resamples" in text  # method and level beside the numbers


def test_report_representatives_name_the_cluster_fraction(suggested):
    _, out, page = suggested
    reps = pd.read_csv(out / "tables" / "representatives.csv")
    clusters = pd.read_csv(out / "tables" / "clusters.csv")
    assert "cluster_fraction" in reps.columns and "weight" not in reps.columns
    frac = clusters.set_index("cluster")["fraction"]
    np.testing.assert_allclose(reps["cluster_fraction"], frac.loc[reps["group"]].to_numpy())
    xyz = (out / "structures" / "representatives.xyz").read_text().splitlines()
    assert "cluster_fraction=" in xyz[1] and "weight=" not in xyz[1]
    assert "<th>cluster_fraction</th>" in page.read_text()


def test_report_figures_are_column_width_at_300_dpi(suggested):
    from PIL import Image

    out = suggested[1]
    # journal widths (common practice): 3.3 in single, 7.0 in double column; 300 dpi
    for name, inches in (("trpes_map", 3.3), ("populations", 3.3), ("trpes_by_state", 7.0)):
        with Image.open(out / "figures" / f"{name}.png") as im:
            assert im.size[0] == round(inches * 300), name
            assert im.info["dpi"][0] == pytest.approx(300, abs=0.5), name


def test_report_on_a_fully_flagged_small_ensemble_says_why_sections_are_missing(tmp_path):
    from ensemblelab.compute.structures.outliers import flag_trajectories
    from ensemblelab.report import build_report
    from ensemblelab.testing import make_toy_ensemble

    # a toy hop S2 -> S1 crosses a 1 eV gap, which the quality checks flag; with a 10 fs
    # lifetime all 6 trajectories hop (toy construction)
    ens = make_toy_ensemble(6, seed=1, tau=10.0)
    assert flag_trajectories(ens)["flagged"].astype(bool).all()  # precondition
    page = build_report(ens, tmp_path / "rep")
    text = _text(page)
    # map, scattering, transient absorption, populations, convergence, clusters
    assert text.count("Section missing:") == 6
    assert "every trajectory is flagged (6 of 6)" in text
    assert "6 of 6 flagged" in text  # the flag section itself is still there
    links = set(re.findall(r"(?:src|href)='([^']+)'", page.read_text()))
    assert all((tmp_path / "rep" / link).is_file() for link in links)


def test_report_with_an_empty_map_grid_says_why(toy, tmp_path):
    from ensemblelab.report import build_report

    page = build_report(toy, tmp_path / "rep", delays=np.array([]), exclude_flagged=False,
                        n_boot=0)
    text = _text(page)
    assert "Section missing: the map's grid is empty (241 kinetic energies x 0 delays)" in text
    assert "Populations" in text and "Representative structures" in text  # rest written
    assert not (tmp_path / "rep" / "figures" / "trpes_map.png").exists()


def test_report_states_the_map_median_relative_standard_error(report):
    # the percentile bootstrap of the map (Stat. Sci. 1986, "Bootstrap methods for standard
    # errors, confidence intervals, and other measures of statistical accuracy"); 30
    # trajectories: a few to some tens of percent (computed independently (not published))
    _, page = report
    found = re.search(r"Median relative standard error over the pixels above 5 % of the "
                      r"peak: ([0-9.]+) %", page.read_text())
    assert found is not None
    assert 0.5 < float(found.group(1)) < 60.0

