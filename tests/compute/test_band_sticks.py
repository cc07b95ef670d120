"""Band sticks: a band's per-snapshot intensities for new widths and photon energies.

Check values: ``region_intensity`` with the stick model of a fresh ``compute_trpes(...,
return_model=True)`` call at the same settings (computed independently (not
published): the region integral decomposed exactly into sticks, J. Chem. Phys. 2004,
"Classical doorway-window approximation for time-resolved pump-probe spectra"). A new
photon energy moves every stick by ``n (h nu' - h nu)`` (energy conservation,
``E_kin = n h nu - IP``); the part of a stick's line above 0 eV is its open fraction.
Agreement to 1e-9 relative to the band's largest snapshot term (common practice for
sums of the same terms in another order), and the same contributing snapshots.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.bands import _kernels_region as KR
from ensemblelab.compute.bands import analyse_band, prepare_band_sticks
from ensemblelab.compute.spectroscopy import compute_trpes, region_intensity
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import SchemaError

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=25.0)
GRID = {"kinetic_energies": np.linspace(0.0, 3.0, 121), "delays": np.arange(-40.0, 161.0, 4.0)}


def invented_ensemble(seed: int, *, n_traj: int = 16, dt: float = 0.7, missing: bool = True,
                      stop: bool = True) -> Ensemble:
    """Invented: ragged trajectories written every `dt` fs (off the time grid), S1 -> S0
    hops, three cation channels (one near threshold at 5 eV), NaN holes, stops in S0."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_traj):
        n = int(rng.integers(60, 220))
        t = np.arange(n) * dt + (0.3 if k % 3 == 0 else 0.0)
        hop = rng.uniform(10.0, 120.0)
        if stop and k % 4 == 1:  # stops soon after reaching S0 (the absorbing state)
            t = t[t < hop + 5.0]
        rows.append((np.full(t.size, k), t, np.where(t < hop, 1, 0)))
    traj, time, active = (np.concatenate([r[i] for r in rows]) for i in range(3))
    n = time.size
    en = np.c_[0.2 * rng.standard_normal(n), 3.6 + 0.3 * rng.standard_normal(n)]
    cat = np.c_[5.4, 6.2, 8.4] + 0.2 * rng.standard_normal((n, 3))  # S1: 1.8 / 2.6 / 4.8 eV
    dy = rng.uniform(0.1, 1.0, (n, 3))
    if missing:
        cat[rng.random((n, 3)) < 0.05] = np.nan
        dy[rng.random(dy.shape) < 0.02] = np.nan
        cat[::9] = np.nan  # whole snapshots without data
    w = pd.DataFrame({"traj": np.arange(n_traj), "weight": rng.uniform(0.2, 2.0, n_traj)})
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, trajectories=w,
                                metadata={"sampling": "weighted"})


def fresh(ens, **kw):
    """Map and stick model of a fresh compute_trpes call (the reference)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return compute_trpes(ens, progress=False, return_model=True, **GRID, **kw)


def assert_same(x, ref):
    assert x.shape == ref.shape
    scale = max(float(np.abs(ref).max()), 1e-300)
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-9 * scale)


CASES = [  # seed, exclusions, settings of the map, band (eV, fs)
    (1, [], {"resolution": 0.0}, ((0.5, 2.0), (0.0, 60.0))),
    (2, [3, 7], {"resolution": 0.05}, ((1.0, 2.8), (-20.0, 40.0))),
    (3, [0], {"convolve": False}, ((0.0, 3.0), (10.0, 130.0))),
    (4, [5, 6, 11], {"time_step": 0.5, "absorbing": "carry"}, ((0.0, 0.4), (30.0, 150.0))),
]


@pytest.mark.parametrize("seed,excluded,settings,band", CASES)
@pytest.mark.parametrize("hv,fwhm", [(5.0, 30.0), (5.15, 45.0), (4.7, 24.0), (4.85, 30.0)])
def test_band_sticks_equal_a_fresh_stick_model(seed, excluded, settings, band, hv, fwhm):
    ens = invented_ensemble(seed)
    build = {k: v for k, v in settings.items() if k in ("time_step", "absorbing")}
    sticks = prepare_band_sticks(ens, probe=PROBE, pump=PUMP, photon_energies=(4.6, 5.2),
                                 weights="ensemble", exclude=excluded, **build)
    probe = GaussianPulse(photon_energy=hv, fwhm=fwhm)
    m, model = fresh(ens, probe=probe, pump=PUMP, weights="ensemble", exclude=excluded,
                     **settings)
    (er, dr) = band
    ref = region_intensity(ens, m, energy_range=er, delay_range=dr, model=model)
    assert ref.sum() > 0  # the band holds signal
    for backend in ("numba", "numpy"):
        x = sticks.region_intensity(m, energy_range=er, delay_range=dr, backend=backend)
        assert_same(x, ref)
        assert np.all(x[np.isin(ens.snapshots["traj"].to_numpy(), excluded)] == 0)


def test_a_photon_energy_change_moves_the_band_near_threshold():
    # the 4.8 eV channel of S1 opens between 4.6 and 5.0 eV: its open fraction changes
    ens = invented_ensemble(8, missing=False, stop=False)
    sticks = prepare_band_sticks(ens, probe=PROBE, photon_energies=(4.6, 5.2),
                                 weights="uniform")
    totals = []
    for hv in (4.7, 4.8, 4.9):
        m, model = fresh(ens, probe=GaussianPulse(photon_energy=hv, fwhm=30.0),
                         weights="uniform")
        kw = {"energy_range": (0.0, 0.3), "delay_range": (0.0, 60.0)}
        x = sticks.region_intensity(m, **kw)
        assert_same(x, region_intensity(ens, m, model=model, **kw))
        totals.append(x.sum())
    assert totals[0] < totals[1] < totals[2]  # more of the channel's line above 0 eV


def test_energy_dependent_resolution_is_served_too():
    from ensemblelab.compute.spectroscopy.resolution import ProportionalResolution

    ens = invented_ensemble(5)
    sticks = prepare_band_sticks(ens, probe=PROBE, photon_energies=(4.8, 5.2),
                                 weights="ensemble")
    m, model = fresh(ens, probe=GaussianPulse(photon_energy=4.9, fwhm=35.0),
                     weights="ensemble",
                     resolution=ProportionalResolution(fraction=0.02, floor=0.01))
    kw = {"energy_range": (0.5, 2.5), "delay_range": (0.0, 100.0)}
    assert_same(sticks.region_intensity(m, **kw),
                region_intensity(ens, m, model=model, **kw))


def test_analyse_band_with_sticks_gives_the_fresh_tables():
    ens = invented_ensemble(9)
    sticks = prepare_band_sticks(ens, probe=PROBE, pump=PUMP, photon_energies=(4.8, 5.2),
                                 weights="ensemble", exclude=[2])
    m, model = fresh(ens, probe=GaussianPulse(photon_energy=5.1, fwhm=40.0), pump=PUMP,
                     weights="ensemble", exclude=[2])
    kw = {"energy_range": (0.8, 2.4), "delay_range": (0.0, 80.0)}
    a = analyse_band(ens, m, sticks=sticks, **kw)
    b = analyse_band(ens, m, model=model, **kw)
    assert a.total == pytest.approx(b.total, rel=1e-9)
    for by in ("state", "traj"):
        ta, tb = a.group_table(by), b.group_table(by)
        assert ta["key"].tolist() == tb["key"].tolist()
        np.testing.assert_allclose(ta["share"], tb["share"], rtol=0, atol=1e-9)
        assert ta["n_snapshots"].tolist() == tb["n_snapshots"].tolist()


def test_maps_the_sticks_cannot_serve_are_refused():
    ens = invented_ensemble(6)
    sticks = prepare_band_sticks(ens, probe=PROBE, photon_energies=(4.8, 5.2),
                                 weights="ensemble", exclude=[1])
    kw = {"energy_range": (0.5, 2.0), "delay_range": (0.0, 50.0)}
    bad = [
        {"probe": GaussianPulse(photon_energy=5.4, fwhm=30.0), "exclude": [1]},  # above
        {"probe": PROBE, "exclude": [1, 2]},  # other exclusions
        {"probe": PROBE},  # none
        {"probe": GaussianPulse(photon_energy=5.0, fwhm=15.0), "exclude": [1]},  # too broad
        {"probe": PROBE, "exclude": [1], "time_step": 0.5},
    ]
    for settings in bad:
        m, _ = fresh(ens, weights="ensemble", **settings)
        assert sticks.serves(m)
        with pytest.raises(SchemaError, match="cannot serve"):
            sticks.region_intensity(m, **kw)
    m, _ = fresh(ens, weights="uniform", probe=PROBE, exclude=[1])
    assert "weights" in sticks.serves(m)
    m, _ = fresh(ens, weights="ensemble", probe=GaussianPulse(photon_energy=4.9, fwhm=20.0),
                 exclude=[1])
    assert sticks.serves(m) == ""  # 20 fs: within the 1.5x wider threshold tail


def test_index_and_kernel_against_a_direct_sum():
    # the band term of every stick summed directly (scipy's ndtr), on random sticks
    from scipy.special import ndtr

    rng = np.random.default_rng(4)
    n, n_time, n_snap = 4000, 30, 300
    tbin = rng.integers(0, n_time, n)
    energy = rng.uniform(-0.5, 3.0, n)
    weight = rng.uniform(0.0, 1.0, n)
    snap = rng.integers(0, n_snap, n)
    tfrac = rng.uniform(0.0, 1.0, n)
    tw = np.where(np.arange(n_time) % 7 == 3, 0.0, rng.uniform(0.0, 2.0, n_time))
    lo, hi, s = 0.4, 1.1, 0.08
    ew = ndtr((hi - energy) / s) - ndtr((lo - energy) / s)
    dw = (1 - tfrac) * tw[tbin] + tfrac * tw[np.minimum(tbin + 1, n_time - 1)]
    ref = np.bincount(snap, weight * ew * dw, minlength=n_snap)
    order, starts = KR.index_sticks(tbin, energy, n_time)
    # the order of a stable sort by (time index, energy): numpy's lexsort
    np.testing.assert_array_equal(order, np.lexsort((energy, tbin)))
    np.testing.assert_array_equal(starts, np.searchsorted(tbin[order], np.arange(n_time + 1)))
    for backend in ("numba", "numpy"):
        x = KR.region_sums(energy[order], weight[order], snap[order], tfrac[order], starts,
                           tw, lo=lo, hi=hi, sigma=s, n_snapshots=n_snap, backend=backend)
        np.testing.assert_allclose(x, ref, rtol=0, atol=1e-12 * ref.max())


def test_cell_sums_equal_bincount():
    # the one-pass group sums against numpy's bincount (its naive twin)
    from ensemblelab.compute.bands._kernels_bands import cell_sums

    rng = np.random.default_rng(12)
    codes = rng.integers(0, 57, 20_000)
    x = np.where(rng.random(codes.size) < 0.6, 0.0, rng.exponential(1.0, codes.size))
    sums, counts = cell_sums(codes, x, 60)
    np.testing.assert_allclose(sums, np.bincount(codes, x, minlength=60), rtol=1e-14)
    np.testing.assert_array_equal(counts, np.bincount(codes[x > 0], minlength=60))


def test_prepare_sticks_exclude_equals_the_copy():
    # trajectories excluded by weight 0 give the map of the ensemble without them (a
    # weighted mean over trajectories; computed independently (not published))
    from ensemblelab.compute.spectroscopy import prepare_sticks

    ens = invented_ensemble(13)
    ids = [2, 3, 10]
    kw = {"probe": PROBE, "weights": "ensemble", "progress": False}
    a = prepare_sticks(ens, exclude=ids, **kw)
    b = prepare_sticks(ens.without(ids), **kw)
    np.testing.assert_allclose(a.alive, b.alive, rtol=0, atol=1e-12 * b.alive.max())
    assert a.total_weight == pytest.approx(b.total_weight, rel=1e-12)
    kept = ~np.isin(a.sticks.traj, ids)
    assert np.all(a.sticks.weight[~kept] == 0)

    def table(s, rows):
        cols = [s.traj[rows], s.time[rows], s.channel[rows], s.energy[rows], s.weight[rows]]
        return np.array(cols)[:, np.lexsort(cols[3::-1])]

    np.testing.assert_allclose(table(a.sticks, kept), table(b.sticks, slice(None)),
                               rtol=1e-10)  # alive-weight ratios: rounding (common practice)


def test_without_numba_the_numpy_twins_give_the_same(monkeypatch):
    # the fallbacks of a platform without numba: numpy's stable sorts and bincount
    from ensemblelab.compute.bands import _kernels_bands as KB

    rng = np.random.default_rng(5)
    tbin, energy = rng.integers(0, 40, 3000), rng.normal(1.0, 0.5, 3000)
    codes, x = rng.integers(0, 9, 3000), np.where(rng.random(3000) < 0.5, 0.0, 1.0)
    compiled = KR.index_sticks(tbin, energy, 40), KB.cell_sums(codes, x, 9)
    monkeypatch.setitem(KR._COMPILED, "kernel", None)
    monkeypatch.setitem(KB._COMPILED, "kernel", None)
    assert KR.region_backend() == "numpy"
    plain = KR.index_sticks(tbin, energy, 40), KB.cell_sums(codes, x, 9)
    for a, b in zip(compiled, plain, strict=True):
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
