"""Decomposition fractions with trajectory-bootstrap intervals.

Check values are computed independently (not published): the region fractions against
``region_intensity`` summed per active state, the per-delay fractions against the map's
own components (a Riemann sum over a fine energy grid), and the neutral-state interval
against the band-share path (another code path over the same per-trajectory sums).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.bands import analyse_band
from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes, region_intensity
from ensemblelab.compute.uncertainty import band_share_table, decomposition_fractions
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import SchemaError

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=20.0)
REGION = {"energy_range": (0.2, 1.6), "delay_range": (10.0, 150.0)}


def _ensemble(n_traj: int = 24, steps: int = 90, n_cation: int = 3, seed: int = 0) -> Ensemble:
    """Invented three-state ensemble with several cation states (no real molecule)."""
    rng = np.random.default_rng(seed)
    n = n_traj * steps
    traj = np.repeat(np.arange(n_traj), steps)
    time_ = np.tile(np.arange(steps) * 2.0, n_traj)
    hop = rng.exponential(60.0, size=n_traj)
    active = np.where(time_ < hop[traj], 2, 1)
    energies = np.column_stack([np.zeros(n), 3.0 + 0.1 * rng.standard_normal(n),
                                3.6 + 0.1 * rng.standard_normal(n)])
    cation = 7.2 + 0.35 * np.arange(n_cation) + 0.05 * rng.standard_normal((n, n_cation))
    dyson = rng.uniform(0.2, 1.0, size=(n, n_cation))
    geoms = rng.standard_normal((n, 2, 3))
    return Ensemble.from_arrays(traj=traj, time=time_, active=active, geometries=geoms,
                                symbols=["C", "O"], energies=energies, cation_energies=cation,
                                dyson=dyson, metadata={"producer": "test (invented)"})


@pytest.fixture(scope="module")
def case():
    ens = _ensemble()
    m, model = compute_trpes(ens, probe=PROBE, kinetic_energies=np.linspace(0.0, 3.0, 601),
                             delays=np.arange(0.0, 171.0, 10.0), progress=False,
                             return_model=True)
    return ens, m, model


def test_region_fractions_match_region_intensity_per_state(case):
    ens, m, model = case
    f = decomposition_fractions(ens, m, decompose="neutral", model=model, **REGION)
    ri = region_intensity(ens, m, model=model, **REGION)
    ref = pd.Series(ri).groupby(ens.snapshots["active"].to_numpy()).sum()
    got = f.set_index("component")["intensity"]
    np.testing.assert_allclose(got.reindex(ref.index), ref, rtol=1e-10)
    assert f["fraction"].sum() == pytest.approx(1.0, abs=1e-12)
    assert (f["lower"] <= f["fraction"] + 1e-15).all()
    assert (f["fraction"] <= f["upper"] + 1e-15).all()


@pytest.mark.parametrize("decompose", ["neutral", "cation", "pair"])
def test_per_delay_fractions_match_the_map_components(decompose):
    ens = _ensemble(seed=1)
    m, model = compute_trpes(ens, probe=PROBE, kinetic_energies=np.linspace(0.0, 3.0, 601),
                             delays=np.arange(0.0, 171.0, 10.0), progress=False,
                             decompose=decompose, return_model=True)
    f = decomposition_fractions(ens, m, decompose=decompose, per_delay=True, model=model,
                                interval=None)
    total = m.intensity.sum(axis=1)
    for lab, comp in m.components.items():
        got = f.loc[f["label"] == lab, "fraction"].to_numpy()
        np.testing.assert_allclose(got, comp.sum(axis=1) / total, atol=2e-3)


def test_neutral_interval_equals_the_band_share_interval(case):
    ens, m, model = case
    f = decomposition_fractions(ens, m, decompose="neutral", model=model, n_boot=500,
                                random_state=3, **REGION).set_index("component")
    band = analyse_band(ens, m, model=model, **REGION)
    b = band_share_table(band, "state", n_boot=500, random_state=3).set_index("key")
    for k in b.index:
        np.testing.assert_allclose(f.loc[k, ["fraction", "lower", "upper"]].astype(float),
                                   b.loc[k, ["share", "lower", "upper"]].astype(float),
                                   rtol=1e-9)


def test_cation_fractions_have_proper_intervals(case):
    ens, m, model = case
    f = decomposition_fractions(ens, m, decompose="cation", model=model, **REGION)
    assert f["fraction"].sum() == pytest.approx(1.0, abs=1e-12)
    assert list(f["label"]) == list(ens.cation_labels)
    # every channel is open in the window: a strictly positive, non-degenerate interval
    assert ((f["lower"] > 0) & (f["lower"] < f["fraction"]) & (f["fraction"] < f["upper"])).all()
    assert not f["includes_zero"].any()


def test_decomposition_fraction_errors(case):
    ens, m, model = case
    with pytest.raises(SchemaError, match="'decompose' parameter"):
        decomposition_fractions(ens, m, decompose="snapshot")
    with pytest.raises(SchemaError, match="diabatic decomposition"):
        decomposition_fractions(ens, m, decompose="diabatic", model=model)
    with pytest.raises(SchemaError, match="low < high"):
        decomposition_fractions(ens, m, energy_range=(2.0, 1.0))


def test_diabatic_fractions_equal_pair_fractions_for_identity_adt():
    # the toy ensemble's ADT matrices are identities: every diabatic pair is the adiabatic
    # pair (from the definition, computed independently)
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(20, seed=1, t_max=100.0, dt=2.0)
    m, model = compute_trpes(ens, probe=PROBE, kinetic_energies=np.linspace(0, 2, 81),
                             delays=np.arange(0.0, 101.0, 10.0), progress=False,
                             decompose="diabatic", return_model=True)
    kw = {"model": model, "delay_range": (0.0, 100.0), "random_state": 2}
    dia = decomposition_fractions(ens, m, decompose="diabatic", **kw)
    pair = decomposition_fractions(ens, m, decompose="pair", **kw)
    cols = ["fraction", "lower", "upper"]
    np.testing.assert_allclose(dia[cols].to_numpy(float), pair[cols].to_numpy(float),
                               rtol=1e-10, atol=1e-15)
    assert dia["fraction"].max() < 1.0  # two populated pairs: a non-trivial split
