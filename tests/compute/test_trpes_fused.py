"""The fused compiled TRPES pass against the numpy stick path (its naive twin), the
public redraw cache, and the sparse time matrix of the assembly.

Every reference value here is the same quantity computed independently by the numpy
path of the package (``block_sticks`` + ``deposit``; computed independently, not
published) or by a dense matrix product (common practice).
"""

from __future__ import annotations

import tracemalloc
import warnings

import numpy as np
import pandas as pd
import pytest

from ensemblelab import load
from ensemblelab.compute.spectroscopy import _kernels_broadening as KB
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import _kernels_fused as KF
from ensemblelab.compute.spectroscopy import compute_trpes, fused, maps
from ensemblelab.compute.spectroscopy.cache import prepare_map_cache
from ensemblelab.compute.spectroscopy.cross_sections import AnionThresholdLaw, HydrogenicPWA
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.errors import SchemaError

pytestmark = pytest.mark.skipif(not KD.numba_available(), reason="needs numba (fast extra)")

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
GRID = {"kinetic_energies": np.linspace(0.0, 3.0, 121), "delays": np.arange(-40.0, 161.0, 4.0),
        "progress": False}


def _ensemble(seed: int = 0, *, n_traj: int = 14, n_cat: int = 3, missing: bool = True,
              stop: bool = True, by_state: bool = False, dt: float = 0.7) -> Ensemble:
    """Invented: ragged trajectories (output every `dt` fs, off the grid), S1 -> S0 hops,
    NaN holes per channel and whole snapshots, some trajectories stopped in S0."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_traj):
        n = int(rng.integers(60, 200))
        t = np.arange(n) * dt + (0.3 if k % 3 == 0 else 0.0)
        hop = rng.uniform(10.0, 120.0)
        if stop and k % 4 == 1:  # stops 5 fs after reaching S0 (absorbing state)
            t = t[t < hop + 5.0]
        rows.append((np.full(t.size, k), t, np.where(t < hop, 1, 0)))
    traj = np.concatenate([r[0] for r in rows])
    time = np.concatenate([r[1] for r in rows])
    active = np.concatenate([r[2] for r in rows])
    n = time.size
    en = np.c_[0.2 * rng.standard_normal(n), 3.6 + 0.3 * rng.standard_normal(n)]
    cat = 5.8 + np.linspace(0.0, 1.0, n_cat) + 0.2 * rng.standard_normal((n, n_cat))
    dy = rng.uniform(0.1, 1.0, (n, 2, n_cat) if by_state else (n, n_cat))
    if missing:
        cat[rng.random((n, n_cat)) < 0.05] = np.nan  # one channel missing
        dy[rng.random(dy.shape) < 0.02] = np.nan
        cat[::7] = np.nan  # whole snapshots without data
    w = pd.DataFrame({"traj": np.arange(n_traj), "weight": rng.uniform(0.2, 2.0, n_traj)})
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, trajectories=w,
                                metadata={"sampling": "weighted"})


def _numpy_path(monkeypatch):
    monkeypatch.setattr(maps, "use_fused", lambda **kw: False)


def _pair(monkeypatch, ens, **kw):
    calls = []
    real = maps.fused_partial

    def spy(*a, **k):
        calls.append(1)
        return real(*a, **k)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        monkeypatch.setattr(maps, "fused_partial", spy)
        a = compute_trpes(ens, **kw)
        monkeypatch.undo()
        _numpy_path(monkeypatch)
        b = compute_trpes(ens, **kw)
        monkeypatch.undo()
    assert calls, "the fused pass was not used"
    return a, b


def _same(a, b, rtol=1e-10):
    # reference: the numpy stick path on the same ensemble (computed independently)
    scale = np.abs(b.intensity).max()
    assert scale > 0
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=rtol, atol=rtol * scale)
    np.testing.assert_allclose(a.alive, b.alive, rtol=1e-12, atol=1e-12 * b.alive.max())
    for key in ("n_missing_data", "n_absorbed", "n_absorbed_ionisable", "n_sticks"):
        assert a.params[key] == b.params[key], key
    assert a.effective_sample_size == pytest.approx(b.effective_sample_size, rel=1e-12)


@pytest.mark.parametrize("cross_section", ["dyson", "hydrogenic", "anion-threshold",
                                           "anion-hydrogenic", HydrogenicPWA(zeta=1.3),
                                           AnionThresholdLaw(l=0)])
def test_fused_equals_numpy_path_for_each_cross_section(monkeypatch, cross_section):
    ens = _ensemble(1)
    a, b = _pair(monkeypatch, ens, probe=PROBE, cross_section=cross_section, **GRID)
    assert a.params["n_missing_data"] > 0  # the ensemble exercises the missing data
    assert a.params["n_absorbed"] > 0  # and the absorbing state
    _same(a, b)


@pytest.mark.parametrize("absorbing", ["zero", "end"])
@pytest.mark.parametrize("seed", [2, 3])
def test_fused_equals_numpy_with_shifts_resolution_convolution(monkeypatch, absorbing, seed):
    ens = _ensemble(seed, n_cat=4, dt=0.5 + 0.1 * seed)
    kw = {"probe": GaussianPulse(photon_energy=2.6, fwhm=25.0, n_photons=2),
          "pump": GaussianPulse(photon_energy=3.6, fwhm=40.0), "resolution": 0.04,
          "ionisation_shifts": {0: 0.2, 2: -0.35}, "absorbing": absorbing,
          "normalise": "initial" if seed == 3 else "alive", **GRID}
    _same(*_pair(monkeypatch, ens, **kw))


def test_fused_equals_numpy_without_missing_data_and_on_grid_times(monkeypatch):
    ens = _ensemble(4, missing=False, stop=False, dt=1.0)
    a, b = _pair(monkeypatch, ens, probe=PROBE, convolve=False, **GRID)
    assert a.params["n_missing_data"] == 0
    _same(a, b)


def test_fused_equals_numpy_with_dyson_per_neutral_state(monkeypatch):
    ens = _ensemble(5, by_state=True)
    _same(*_pair(monkeypatch, ens, probe=PROBE, **GRID))


def test_fused_chunked_equals_numpy_in_memory(monkeypatch, tmp_path):
    pytest.importorskip("dask")
    from ensemblelab.io.chunked import save_chunked

    ens = _ensemble(6)
    lazy = load(save_chunked(ens, tmp_path / "c.ens", chunk_size=4), lazy=True)
    calls = []
    real = maps.fused_partial
    monkeypatch.setattr(maps, "fused_partial", lambda *a, **k: calls.append(1) or real(*a, **k))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = compute_trpes(lazy, probe=PROBE, scheduler="synchronous", **GRID)
        monkeypatch.undo()
        _numpy_path(monkeypatch)
        b = compute_trpes(ens, probe=PROBE, **GRID)
    assert len(calls) >= 2  # chunk by chunk (missing data: a second pass with the fill)
    _same(a, b)


def test_numpy_path_kept_where_the_fused_pass_does_not_apply(monkeypatch):
    ens = _ensemble(7)
    calls = []
    monkeypatch.setattr(maps, "fused_partial", lambda *a, **k: calls.append(1))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        compute_trpes(ens, probe=PROBE, decompose="cation", **GRID)
        compute_trpes(ens, probe=PROBE, absorbing="carry", **GRID)
        compute_trpes(ens, probe=PROBE, cross_section=lambda e, ch: 1.0 + 0.1 * ch, **GRID)
        compute_trpes(ens, probe=PROBE, return_model=True, **GRID)
        monkeypatch.setitem(KF._COMPILED, "pass", None)  # as without numba
        compute_trpes(ens, probe=PROBE, **GRID)
    assert calls == []


def test_fused_energy_range_equals_numpy():
    from ensemblelab.compute.spectroscopy.sticks import energy_range

    ens = _ensemble(8)
    shifts = np.array([0.1, -0.2, 0.3])
    for tail in (0.0, 0.4):
        # reference: the numpy energy_range (computed independently)
        assert fused.energy_range_partial(ens, None, 5.0, tail, shifts) == \
            energy_range(ens, None, 5.0, tail, shifts)


def test_fused_pass_makes_no_stick_sized_temporaries(monkeypatch):
    # ~1.4e6 (snapshot, channel) pairs; the numpy path's sticks (8 arrays of 8 bytes per
    # stick) alone would be ~90 MB; the fused pass may hold the inputs' size at most
    # beyond its accumulators (issue goal: no step allocates more than a small multiple
    # of the input arrays; common practice)
    rng = np.random.default_rng(9)
    n_traj, n_steps, n_cat = 140, 2000, 5
    n = n_traj * n_steps
    t = np.tile(np.arange(n_steps) * 0.5, n_traj)
    ens = Ensemble.from_arrays(
        traj=np.repeat(np.arange(n_traj), n_steps), time=t, active=np.ones(n, int),
        geometries=np.zeros((n, 1, 3)), symbols=["H"],
        energies=np.c_[np.zeros(n), 4.0 + 0.1 * rng.standard_normal(n)],
        cation_energies=6.0 + 0.2 * rng.standard_normal((n, n_cat)),
        dyson=rng.uniform(0.1, 1.0, (n, n_cat)), copy=False)
    inputs = ens.energies.nbytes + ens.cation_energies.nbytes + ens.dyson.nbytes + 24 * n
    kw = {"probe": PROBE, "kinetic_energies": np.linspace(0, 3, 200),
          "delays": np.linspace(0, 999, 300), "convolve": False, "weights": "uniform",
          "progress": False}

    def peak(fn):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fn()  # warm (compilation, pools)
            tracemalloc.start()
            fn()
            out = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
        return out

    _, model = compute_trpes(ens, return_model=True, **kw)
    hist_bytes = model._cache["hist"].nbytes
    del model
    p_fused = peak(lambda: compute_trpes(ens, **kw))
    assert p_fused - 3 * hist_bytes < 1.0 * inputs, (p_fused, hist_bytes, inputs)
    _numpy_path(monkeypatch)
    p_numpy = peak(lambda: compute_trpes(ens, **kw))
    assert p_numpy - 3 * hist_bytes > 1.0 * inputs  # the check can fail (old path)


def test_cache_redraws_equal_fresh_maps():
    ens = _ensemble(10)
    cache = prepare_map_cache(ens, probe=PROBE, photon_energies=(4.7, 5.2))
    cases = [(5.0, 30.0, 0.0), (4.8, 30.0, 0.0), (5.2, 44.0, 0.03), (4.75, 22.0, 0.0),
             (5.0, 30.0, 0.05)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for hv, fwhm, res in cases:
            a = cache.map(photon_energy=hv, probe_fwhm=fwhm, resolution=res, **_grid())
            b = compute_trpes(ens, probe=GaussianPulse(photon_energy=hv, fwhm=fwhm),
                              resolution=res, **GRID)
            # reference: compute_trpes from scratch (computed independently); the moment
            # expansion at another width is exact to REUSE_TOLERANCE (3e-5) of the peak
            np.testing.assert_allclose(a.intensity, b.intensity, rtol=0,
                                       atol=3e-5 * np.abs(b.intensity).max())
            assert a.params["probe"]["photon_energy"] == hv
    assert cache.rebuilds == 1  # all served from the first pass


def test_cache_rebuilds_outside_its_range_and_for_energy_dependent_cross_sections():
    ens = _ensemble(11)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cache = prepare_map_cache(ens, probe=PROBE, cross_section="hydrogenic")
        a = cache.map(photon_energy=5.1, **_grid())
        assert cache.rebuilds == 2
        b = compute_trpes(ens, probe=GaussianPulse(photon_energy=5.1, fwhm=30.0),
                          cross_section="hydrogenic", **GRID)
        np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-10,
                                   atol=1e-10 * np.abs(b.intensity).max())
        dy = prepare_map_cache(ens, probe=PROBE)
        dy.map(photon_energy=5.3, **_grid())  # above the range: one new pass
        dy.map(probe_fwhm=10.0, **_grid())  # 3x wider sticks: one new pass
        assert dy.rebuilds == 3
    with pytest.raises(SchemaError, match="photon_energies"):
        prepare_map_cache(ens, probe=PROBE, photon_energies=(5.2, 4.0))


def _grid():
    return {k: v for k, v in GRID.items() if k != "progress"}


def test_sparse_time_matrix_assembly_equals_dense_product():
    rng = np.random.default_rng(12)
    order, n_time, n_fine = 8, 90, 40
    hist = rng.standard_normal((order, 2, n_time, n_fine))
    bmat = KB.broadening_blocks(np.linspace(0.1, 0.5, 33), e_lo=0.0, h=0.015, n_fine=n_fine,
                                fwhm=0.06, order=order)
    cmat = np.zeros((50, n_time))
    for i in range(50):  # linear interpolation: two nonzeros per row (one row empty)
        j = int(rng.integers(0, n_time - 1))
        f = rng.random()
        cmat[i, j], cmat[i, j + 1] = 1 - f, f
    cmat[17] = 0.0
    cmat[30, :5] = 0.25  # one row with more
    full = KB.assemble(hist, bmat, None)
    # reference: the time matrix applied after the broadening, densely (common practice)
    expect = np.einsum("dt,cte->cde", cmat, full)
    np.testing.assert_allclose(KB.assemble(hist, bmat, cmat), expect, rtol=1e-12,
                               atol=1e-12 * np.abs(expect).max())


def test_end_to_end_benchmark_quick_run(capsys):
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
    import bench_trpes_end_to_end as bench

    assert bench.main(["--quick"]) == 0
    out = capsys.readouterr().out
    for text in ("end to end:", "in-kernel:", "cached redraw", "peak memory"):
        assert text in out
    # the peer and compute_trpes make the same physics: delay-averaged spectra agree
    # (binning vs point sampling; tolerance common practice for such a sanity check)
    ens = bench.make_ensemble(30, 400, seed=5)
    a, b = bench.ours(ens).mean(axis=0), bench.peer_map(ens).mean(axis=0)
    assert np.abs(a - b).max() < 0.05 * np.abs(b).max()


def test_fused_equals_numpy_on_the_demo_ensemble(monkeypatch):
    # an ensemble from the package's own (invented) demo, with its faults and metadata
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "demo_data" / "ensemble"
    if not demo.exists():
        pytest.skip("demo data not present")
    ens = load(demo, nonfinite="keep", progress=False)
    ens = ens.without([int(k) for k in ens.metadata.get("injected_faults", [])])
    if ens.cation_energies is None:
        pytest.skip("demo without cation energies")
    probe = GaussianPulse(photon_energy=float(ens.cation_energies[0].max()) - 1.0, fwhm=35.0)
    kw = {"probe": probe, "pump": GaussianPulse(photon_energy=3.0, fwhm=40.0),
          "resolution": 0.05, "kinetic_energies": np.linspace(0.0, 4.0, 161),
          "delays": np.arange(-50.0, 501.0, 10.0), "progress": False}
    _same(*_pair(monkeypatch, ens, **kw))
