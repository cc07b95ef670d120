"""The report's sections of the further observables: present with figure and table when
the data allow, missing with the reason when they do not (checks against the files the
report itself wrote; no external numbers)."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from ensemblelab import Ensemble
from ensemblelab.testing import make_toy_ensemble


def _with_strengths(ens: Ensemble) -> Ensemble:
    ts = np.random.default_rng(0).uniform(0.0, 0.2, (ens.n_snapshots, 3, 3))
    return Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                                active=ens.snapshots["active"], geometries=ens.geometries,
                                symbols=ens.symbols, energies=ens.energies,
                                transition_strengths=ts)


def test_report_has_a_section_per_observable(tmp_path):
    pytest.importorskip("xraydb")
    from ensemblelab.report import build_report

    ens = _with_strengths(make_toy_ensemble(12, seed=2, t_max=100.0, dt=2.0))
    page = build_report(ens, tmp_path / "rep", n_boot=0, energies=np.linspace(0, 2.5, 51))
    text = page.read_text()
    assert "<h2>Time-resolved X-ray scattering</h2>" in text
    assert "<h2>Transient absorption</h2>" in text
    for name in ("scattering", "transient_absorption"):
        assert (tmp_path / "rep" / "figures" / f"{name}.png").is_file()
        table = pd.read_csv(tmp_path / "rep" / "tables" / f"{name}.csv")
        assert {"component", "delay", "value"} <= set(table.columns)
    comps = set(pd.read_csv(tmp_path / "rep" / "tables" / "transient_absorption.csv")
                ["component"])
    assert {"total", "GSB", "SE", "ESA"} <= comps
    links = set(re.findall(r"(?:src|href)='([^']+)'", text))
    assert all((tmp_path / "rep" / link).is_file() for link in links)


def test_without_transition_strengths_the_absorption_section_says_why(tmp_path):
    pytest.importorskip("xraydb")
    from ensemblelab.report import build_report

    ens = make_toy_ensemble(12, seed=2, t_max=100.0, dt=2.0)
    page = build_report(ens, tmp_path / "rep", n_boot=0, energies=np.linspace(0, 2.5, 51))
    text = page.read_text()
    assert "<h2>Time-resolved X-ray scattering</h2>" in text
    assert re.search(r"Transient absorption</h2><p class='missing'>.*transition_strengths",
                     text)


def test_absorption_section_names_where_the_strengths_come_from(tmp_path):
    from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
    from ensemblelab.demo.strengths import with_demo_transition_strengths
    from ensemblelab.report_observables import absorption_section

    ens = with_demo_transition_strengths(make_toy_ensemble(8, seed=4, t_max=60.0, dt=2.0))
    text = absorption_section(ens, tmp_path, probe=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                              pump=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                              delays=np.linspace(-30.0, 60.0, 19))
    # invented strengths are labelled so on the page (house rule: demo data say they are
    # invented; common practice)
    assert "Transition strengths: invented" in text
