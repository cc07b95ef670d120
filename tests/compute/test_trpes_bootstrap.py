"""Bootstrap intervals of TRPES maps (resampling whole trajectories).

Check values: the percentile bootstrap and its nominal coverage (Stat. Sci. 1986,
"Bootstrap methods for standard errors, confidence intervals, and other measures of
statistical accuracy"; a 95% interval should hold the true value in about 95% of
repeated experiments: common practice); maps of explicitly resampled ensembles built by
hand and run through compute_trpes (the naive reference twin; computed independently
(not published)).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import _kernels_bootstrap as KBS
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import bootstrap_fused as BF
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy._reference_bootstrap import (
    naive_bootstrap_maps,
    resample_ensemble,
)
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.errors import SchemaError
from ensemblelab.testing import make_toy_ensemble

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=30.0)
SMALL = {"kinetic_energies": np.linspace(0.0, 2.0, 41), "delays": np.arange(-40.0, 161.0, 20.0),
         "probe": PROBE, "pump": PUMP}


def _quiet(fn, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*a, **k)


def _naive_summary(ens, n_boot, seed, ci=0.95, **kw):
    counts = KBS.bootstrap_counts(ens.n_trajectories, n_boot, np.random.default_rng(seed))
    tot, comps = naive_bootstrap_maps(ens, counts, **kw)
    a = (1 - ci) / 2
    return np.quantile(tot, [a, 1 - a], axis=0), tot, {
        k: np.quantile(v, [a, 1 - a], axis=0) for k, v in comps.items()}


def _absorbing_weighted(n=18, seed=5):
    """Toy ensemble: a few trajectories stop early on S0 (absorbing), unequal weights."""
    ens = make_toy_ensemble(n, seed=seed, t_max=120.0)
    snaps = ens.snapshots.copy()
    keep = np.ones(len(snaps), dtype=bool)
    for tr, t_stop in ((1, 50.0), (4, 73.0)):
        sel = snaps["traj"].to_numpy() == tr
        keep &= ~(sel & (snaps["time"].to_numpy() > t_stop))
        last = np.flatnonzero(sel & (snaps["time"].to_numpy() == t_stop))
        snaps.loc[last, "active"] = 0
    ens = ens.replace(snapshots=snaps).select(keep)
    w = np.random.default_rng(seed).uniform(0.3, 2.0, ens.n_trajectories)
    trajs = ens.trajectories.copy()
    trajs["weight"] = w
    return ens.replace(trajectories=trajs)


# ------------------------------------------------------------------ the naive twin
def test_bootstrap_equals_naive_loop_for_a_fixed_seed():
    ens = make_toy_ensemble(25, seed=4, t_max=160.0)
    kw = dict(SMALL, decompose="neutral")
    m = _quiet(compute_trpes, ens, interval="bootstrap", n_boot=15, random_state=7,
               progress=False, **kw)
    (lo, hi), tot, comps = _naive_summary(ens, 15, 7, **kw)
    peak = np.abs(m.intensity).max()
    np.testing.assert_allclose(m.lower, lo, rtol=0, atol=1e-10 * peak)
    np.testing.assert_allclose(m.upper, hi, rtol=0, atol=1e-10 * peak)
    se = tot.std(axis=0, ddof=1)
    ok = m.intensity != 0
    np.testing.assert_allclose(m.rel_se[ok], se[ok] / np.abs(m.intensity[ok]), rtol=1e-8)
    for lab, (clo, chi) in comps.items():
        np.testing.assert_allclose(m.component_lower[lab], clo, rtol=0, atol=1e-10 * peak)
        np.testing.assert_allclose(m.component_upper[lab], chi, rtol=0, atol=1e-10 * peak)
    assert m.params["interval"] == "bootstrap" and m.params["n_boot"] == 15
    # the interval is not degenerate and holds the map where there is signal
    sig = m.intensity > 0.05 * peak
    assert np.all(m.upper[sig] > m.lower[sig])


@pytest.mark.parametrize("normalise", ["alive", "initial"])
def test_naive_twin_with_weights_time_split_and_absorbing_state(normalise):
    ens = _absorbing_weighted()
    kw = dict(SMALL, weights="ensemble", time_step=2.0, normalise=normalise,
              decompose="cation")
    m = _quiet(compute_trpes, ens, interval="bootstrap", n_boot=10, random_state=3,
               progress=False, **kw)
    (lo, hi), _, comps = _naive_summary(ens, 10, 3, **kw)
    peak = np.abs(m.intensity).max()
    np.testing.assert_allclose(m.lower, lo, rtol=0, atol=1e-10 * peak)
    np.testing.assert_allclose(m.upper, hi, rtol=0, atol=1e-10 * peak)
    np.testing.assert_allclose(m.component_upper["D0"], comps["D0"][1], rtol=0,
                               atol=1e-10 * peak)


def test_resampled_ensemble_copies_whole_trajectories():
    ens = make_toy_ensemble(4, seed=1, t_max=10.0)
    r = resample_ensemble(ens, np.array([2, 0, 1, 1]))
    assert r.n_trajectories == 4 and r.n_snapshots == ens.n_snapshots
    np.testing.assert_array_equal(r.energies[:11], ens.energies[:11])
    np.testing.assert_array_equal(r.energies[11:22], ens.energies[:11])


# ------------------------------------------------------------------ kernels
@pytest.mark.parametrize("with_tfrac,threads", [(False, False), (True, False), (True, True)])
def test_replicate_deposit_equals_reweighted_deposits(with_tfrac, threads, monkeypatch):
    if threads:  # resamples split over the usable cores even for few sticks
        monkeypatch.setattr(KD, "MIN_STICKS_PER_THREAD", 1)
        monkeypatch.setattr(KD, "usable_cores", lambda: 2)
    rng = np.random.default_rng(0)
    n, n_traj, n_time, n_fine, order = 3000, 9, 12, 40, 8
    tbin = rng.integers(0, n_time - 1, n)
    energy = rng.uniform(0.0, 39 * 0.05, n)
    weight = rng.uniform(0, 1, n)
    src = rng.integers(0, n_traj, n)
    comp = rng.integers(0, 3, n)
    tfrac = rng.uniform(0, 1, n) if with_tfrac else None
    rw = KBS.bootstrap_counts(n_traj, 5, rng).T.copy()
    backends = ["numpy"] + (["numba"] if KD.numba_available() else [])
    for backend in backends:
        acc = np.zeros((4, n_time, n_fine, order, 5))
        KBS.deposit_replicates(acc, tbin, energy, weight, src, rw, e_lo=0.0, h=0.05,
                               tfrac=tfrac, backend=backend)
        KBS.deposit_replicates(acc, tbin, energy, weight, src, rw, e_lo=0.0, h=0.05,
                               comp=comp, n_comp=3, c0=1, tfrac=tfrac, backend=backend)
        for r in range(5):
            ref = KD.deposit_moments(tbin, energy, weight * rw[src, r], n_time=n_time,
                                     e_lo=0.0, h=0.05, n_fine=n_fine, order=order,
                                     tfrac=tfrac)
            ref_c = KD.deposit_moments(tbin, energy, weight * rw[src, r], n_time=n_time,
                                       e_lo=0.0, h=0.05, n_fine=n_fine, order=order,
                                       comp=comp, n_comp=3, tfrac=tfrac)
            got = KBS.per_resample(acc, r)
            np.testing.assert_allclose(got[:, :1], ref, rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(got[:, 1:], ref_c, rtol=1e-12, atol=1e-12)


def test_bootstrap_counts_draw_n_with_replacement():
    c = KBS.bootstrap_counts(50, 300, np.random.default_rng(1))
    assert c.shape == (300, 50) and np.all(c.sum(axis=1) == 50)
    # P(trajectory absent from a resample) = (1 - 1/n)^n -> 0.364 for n = 50 (from memory)
    assert np.mean(c == 0) == pytest.approx((1 - 1 / 50) ** 50, abs=0.02)


def test_replicate_chunk_respects_the_budget():
    assert KBS.replicate_chunk(200, 10 * 2**20, budget=64 * 2**20) == 6
    assert KBS.replicate_chunk(200, 2**40, budget=64 * 2**20) == 1
    assert KBS.replicate_chunk(5, 1, budget=64 * 2**20) == 5


# ------------------------------------------------------------------ lazy and chunked
def test_lazy_and_chunked_intervals_equal_in_memory(tmp_path, monkeypatch):
    pytest.importorskip("dask")
    from ensemblelab import load
    from ensemblelab.io.chunked import save_chunked

    ens = make_toy_ensemble(17, seed=9, t_max=120.0)
    kw = dict(SMALL, decompose="neutral", interval="bootstrap", n_boot=12, random_state=11,
              progress=False)
    a = _quiet(compute_trpes, ens, **kw)
    monkeypatch.setattr(KBS, "MEMORY_BUDGET", 1)  # one resample per chunk
    lazy = load(save_chunked(ens, tmp_path / "c.ens", chunk_size=5), lazy=True)
    b = _quiet(compute_trpes, lazy, **kw)
    c = _quiet(compute_trpes, ens, **kw)
    peak = np.abs(a.intensity).max()
    for other in (b, c):
        np.testing.assert_allclose(other.lower, a.lower, rtol=0, atol=1e-12 * peak)
        np.testing.assert_allclose(other.upper, a.upper, rtol=0, atol=1e-12 * peak)
        for lab in a.component_lower:
            np.testing.assert_allclose(other.component_lower[lab], a.component_lower[lab],
                                       rtol=0, atol=1e-12 * peak)


# ------------------------------------------------------------------ weights and ESS
def test_uneven_weights_widen_the_interval():
    ens = make_toy_ensemble(40, seed=2, t_max=120.0)
    trajs = ens.trajectories.copy()
    w = np.ones(ens.n_trajectories)
    w[:3] = 30.0  # Kish effective size ~ 4.8 of 40 (computed independently (not published))
    trajs["weight"] = w
    heavy = ens.replace(trajectories=trajs)
    kw = dict(SMALL, weights="ensemble", interval="bootstrap", n_boot=400, progress=False)
    even = _quiet(compute_trpes, ens, **kw)
    uneven = _quiet(compute_trpes, heavy, **kw)
    # ratio of median relative standard errors 1.24..1.43 over random_state 0..4 with
    # 400 resamples (computed independently (not published)); weights not kept with
    # their trajectory would give ~1
    assert uneven.median_rel_se() > 1.15 * even.median_rel_se()


# ------------------------------------------------------------------ coverage
def test_coverage_of_the_95_percent_interval():
    """200 replicate ensembles of 60 trajectories from a 4000-trajectory parent whose map
    is the truth; nominal coverage 95% (common practice), accepted 95 +- 3%."""
    grid = {"kinetic_energies": np.linspace(0.2, 1.8, 9), "delays": np.arange(0.0, 121.0, 30.0),
            "probe": PROBE, "pump": PUMP, "progress": False}
    parent = make_toy_ensemble(4000, seed=123, t_max=120.0, dt=2.0)
    truth = _quiet(compute_trpes, parent, **grid).intensity
    sig = truth > 0.05 * truth.max()
    rng = np.random.default_rng(2024)
    ids = parent.trajectories["traj"].to_numpy()
    hits = []
    n_rep = 200
    for k in range(n_rep):
        sub = parent.select(rng.choice(ids, 60, replace=False))
        m = _quiet(compute_trpes, sub, interval="bootstrap", n_boot=200, random_state=k,
                   **grid)
        hits.append((m.lower[sig] <= truth[sig]) & (truth[sig] <= m.upper[sig]))
    coverage = float(np.mean(hits))
    assert 0.92 <= coverage <= 0.98, coverage


# ------------------------------------------------------------------ files and errors
def test_intervals_saved_and_loaded(tmp_path):
    from ensemblelab.io.maps import load_map, save_map

    ens = make_toy_ensemble(12, seed=3, t_max=80.0)
    m = _quiet(compute_trpes, ens, decompose="neutral", interval="bootstrap", n_boot=8,
               progress=False, **SMALL)
    back = load_map(save_map(m, tmp_path / "m.npz"))
    for name in ("lower", "upper", "rel_se"):
        np.testing.assert_array_equal(getattr(back, name), getattr(m, name))
    for lab in m.components:
        np.testing.assert_array_equal(back.component_lower[lab], m.component_lower[lab])
        np.testing.assert_array_equal(back.component_upper[lab], m.component_upper[lab])
    assert back.params["interval"] == "bootstrap" and back.params["ci"] == 0.95
    plain = load_map(save_map(m.replace(lower=None, upper=None, rel_se=None,
                                        component_lower={}, component_upper={}),
                              tmp_path / "p.npz"))
    assert plain.lower is None and not plain.component_lower


@pytest.mark.parametrize("bad", [{"interval": "jackknife"},
                                 {"interval": "bootstrap", "n_boot": 1},
                                 {"interval": "bootstrap", "ci": 1.5}])
def test_bad_interval_arguments(bad):
    ens = make_toy_ensemble(5, seed=1, t_max=20.0)
    with pytest.raises(SchemaError):
        compute_trpes(ens, progress=False, **SMALL, **bad)


def test_snapshots_without_any_data_leave_numerator_and_alive_together(monkeypatch):
    # the map's own moments in float64 (to rounding; the default recentred float32
    # replicates are checked against these in test_trpes_bootstrap_fused.py)
    monkeypatch.setattr(BF, "DEFAULT_GRID", BF.EXACT)
    ens = make_toy_ensemble(10, seed=1, t_max=60.0)
    ce = ens.cation_energies.copy()
    ce[[3, 40, 41], 0] = np.nan  # every channel of these snapshots missing
    holes = ens.replace(cation_energies=ce)
    m = _quiet(compute_trpes, holes, interval="bootstrap", n_boot=6, random_state=2,
               progress=False, **SMALL)
    (lo, hi), _, _ = _naive_summary(holes, 6, 2, **SMALL)
    peak = np.abs(m.intensity).max()
    np.testing.assert_allclose(m.lower, lo, rtol=0, atol=1e-10 * peak)
    np.testing.assert_allclose(m.upper, hi, rtol=0, atol=1e-10 * peak)


def test_grid_times_without_data_are_refused_with_a_hint():
    ens = make_toy_ensemble(6, seed=1, t_max=40.0, dt=2.0)
    with pytest.raises(SchemaError, match="missing electronic"):
        _quiet(compute_trpes, ens, interval="bootstrap", n_boot=4, time_step=1.0,
               progress=False, **SMALL)


def test_interval_shape_is_checked():
    from ensemblelab.data.spectrum import TRPESMap

    with pytest.raises(SchemaError, match="lower"):
        TRPESMap(kinetic_energies=[0.0, 1.0], delays=[0.0], intensity=np.ones((1, 2)),
                 lower=np.ones((2, 2)))


def test_replacing_the_values_drops_a_stale_interval():
    ens = make_toy_ensemble(8, seed=3, t_max=60.0)
    m = _quiet(compute_trpes, ens, interval="bootstrap", n_boot=5, progress=False, **SMALL)
    assert m.has_interval
    scaled = m.replace(intensity=2 * m.intensity)
    assert not scaled.has_interval and scaled.rel_se is None
    assert "interval" not in scaled.params
    kept = m.replace(params={**m.params, "note": "x"})
    assert kept.has_interval



def test_bootstrap_with_exclusions_resamples_only_the_kept_trajectories():
    # an excluded trajectory must not be drawn: the interval equals that of the reduced
    # ensemble for the same seed (computed independently (not published): same draws)
    ens = make_toy_ensemble(14, seed=9, t_max=100.0)
    kw = dict(SMALL, convolve=False, progress=False, interval="bootstrap", n_boot=40,
              random_state=3)
    masked = _quiet(compute_trpes, ens, exclude=[2, 7], **kw)
    reduced = _quiet(compute_trpes, ens.without([2, 7]), **kw)
    np.testing.assert_allclose(masked.intensity, reduced.intensity, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(masked.lower, reduced.lower, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(masked.upper, reduced.upper, rtol=1e-10, atol=1e-14)
