"""The replicate deposit (resamples innermost, sticks sorted by cell, time windows) and
the streamed replicate maps against the numpy path and the naive loop.

Check values: the moment histograms of each resample computed one resample at a time
by the numpy deposit with the resample's weights (the reference path; computed
independently (not published)); maps of explicitly resampled ensembles run through
compute_trpes (the naive reference twin; computed independently (not published));
quantiles from ``np.quantile`` (reference library).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import _kernels_bootstrap as KBS
from ensemblelab.compute.spectroscopy import _kernels_broadening as KB
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import _kernels_quantiles as KQ
from ensemblelab.compute.spectroscopy import _kernels_replicate_maps as KRM
from ensemblelab.compute.spectroscopy._reference_bootstrap import naive_bootstrap_maps
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.spectroscopy.replicates import trpes_with_replicates
from ensemblelab.testing import make_toy_ensemble

needs_numba = pytest.mark.skipif(not KD.numba_available(), reason="numba not installed")


def _ragged_sticks(seed=3, n_traj=11, n_time=14, n_fine=30, h=0.05):
    """Sticks of trajectories of uneven lengths (1 to 40 sticks each), some on the
    last time bin, split between time bins, in three components."""
    rng = np.random.default_rng(seed)
    per = rng.integers(1, 41, n_traj)
    src = np.repeat(np.arange(n_traj), per)
    n = src.size
    tbin = rng.integers(0, n_time, n)
    tfrac = np.where(rng.random(n) < 0.6, rng.uniform(0, 1, n), 0.0)
    tfrac[tbin == n_time - 1] = 0.0  # no split past the grid
    energy = rng.uniform(0.0, (n_fine - 1) * h, n)
    weight = rng.uniform(0.1, 2.0, n)
    comp = rng.integers(0, 3, n)
    return tbin, energy, weight, src, comp, tfrac, n_traj, n_time, n_fine, h


@needs_numba
@pytest.mark.parametrize("threads", [False, True])
def test_windowed_replicate_deposit_equals_the_numpy_path(threads, monkeypatch):
    if threads:  # time ranges split over two threads even for few sticks
        monkeypatch.setattr(KD, "MIN_STICKS_PER_THREAD", 1)
        monkeypatch.setattr(KD, "usable_cores", lambda: 2)
    tbin, energy, weight, src, comp, tfrac, n_traj, n_time, n_fine, h = _ragged_sticks()
    order, n_rep = 8, 7
    rw = KBS.bootstrap_counts(n_traj, n_rep, np.random.default_rng(1)).T.copy()
    rw[0, 0] = 0.5  # not a small integer: the float64 multiplicity path too
    grid = {"e_lo": 0.0, "h": h, "n_time": n_time}
    ref = np.zeros((4, n_time, n_fine, order, n_rep))
    for r in range(n_rep):  # one resample at a time, numpy deposit (the old path)
        part = KD.deposit_moments(tbin, energy, weight * rw[src, r], n_time=n_time, e_lo=0.0,
                                  h=h, n_fine=n_fine, order=order, tfrac=tfrac,
                                  backend="numpy")
        part_c = KD.deposit_moments(tbin, energy, weight * rw[src, r], n_time=n_time,
                                    e_lo=0.0, h=h, n_fine=n_fine, order=order, comp=comp,
                                    n_comp=3, tfrac=tfrac, backend="numpy")
        ref[:1, ..., r] = np.moveaxis(part, 0, -1)
        ref[1:, ..., r] = np.moveaxis(part_c, 0, -1)
    for rws in (rw, np.rint(rw)):  # float64 and int8 multiplicities
        cells = KBS.sort_cells(tbin, energy, weight, src, n_time=n_time, e_lo=0.0, h=h,
                               n_fine=n_fine, tfrac=tfrac)
        cells_c = KBS.sort_cells(tbin, energy, weight, src, n_time=n_time, e_lo=0.0, h=h,
                                 n_fine=n_fine, comp=comp, n_comp=3, tfrac=tfrac)
        if rws is not rw:  # the reference for the rounded multiplicities
            ref = np.zeros_like(ref)
            for r in range(n_rep):
                ref[:1, ..., r] = np.moveaxis(KD.deposit_moments(
                    tbin, energy, weight * rws[src, r], n_time=n_time, e_lo=0.0, h=h,
                    n_fine=n_fine, order=order, tfrac=tfrac, backend="numpy"), 0, -1)
                ref[1:, ..., r] = np.moveaxis(KD.deposit_moments(
                    tbin, energy, weight * rws[src, r], n_time=n_time, e_lo=0.0, h=h,
                    n_fine=n_fine, order=order, comp=comp, n_comp=3, tfrac=tfrac,
                    backend="numpy"), 0, -1)
        for t0, t1 in ((0, 5), (5, 6), (6, n_time)):  # windows cut through time splits
            acc = np.zeros((4, t1 - t0, n_fine, order, n_rep))
            KBS.deposit_replicates(acc, tbin, energy, weight, src, rws, t0=t0, cells=cells,
                                   tfrac=tfrac, **grid)
            KBS.deposit_replicates(acc, tbin, energy, weight, src, rws, comp=comp, n_comp=3,
                                   c0=1, t0=t0, cells=cells_c, tfrac=tfrac, **grid)
            peak = np.abs(ref).max()
            np.testing.assert_allclose(acc, ref[:, t0:t1], rtol=0, atol=1e-13 * peak)
            for r in (0, n_rep - 1):  # the per-resample view assemble() reads
                np.testing.assert_array_equal(KBS.per_resample(acc, r),
                                              np.moveaxis(acc[..., r], -1, 0))


@needs_numba
def test_out_of_grid_sticks_are_refused():
    tbin, energy, weight, src, *_ = _ragged_sticks()
    energy = energy.copy()
    energy[3] = 99.0
    acc = np.zeros((1, 14, 30, 8, 2))
    with pytest.raises(ValueError, match="outside the moment grid"):
        KBS.deposit_replicates(acc, tbin, energy, weight, src, np.ones((11, 2)), e_lo=0.0,
                               h=0.05)


def test_streamed_replicate_maps_equal_the_naive_loop(monkeypatch):
    """Ragged trajectories, snapshots between grid points (time splits), components,
    and budgets small enough for several chunks of resamples and time windows."""
    monkeypatch.setattr(KBS, "MEMORY_BUDGET", 8 * 8 * 3 * 4 * 60)  # a few resamples/bins
    monkeypatch.setattr(KBS, "WINDOW_BYTES", 1)
    ens = make_toy_ensemble(16, seed=8, t_max=90.0, dt=0.6, ragged=True)
    kw = {"kinetic_energies": np.linspace(0.0, 2.0, 31),
          "delays": np.arange(-30.0, 121.0, 15.0), "time_step": 1.0,
          "probe": GaussianPulse(photon_energy=5.0, fwhm=30.0),
          "pump": GaussianPulse(photon_energy=4.0, fwhm=30.0), "decompose": "neutral"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m, reps = trpes_with_replicates(ens, n_boot=9, random_state=4, progress=False, **kw)
        counts = KBS.bootstrap_counts(ens.n_trajectories, 9, np.random.default_rng(4))
        tot, comps = naive_bootstrap_maps(ens, counts, **kw)
    assert ens.trajectories["n_steps"].nunique() > 1  # ragged indeed
    peak = np.abs(tot).max()
    np.testing.assert_allclose(reps, tot, rtol=0, atol=1e-10 * peak)
    for lab in comps:
        lo, hi = np.quantile(comps[lab], [0.025, 0.975], axis=0)
        np.testing.assert_allclose(m.component_lower[lab], lo, rtol=0, atol=1e-10 * peak)
        np.testing.assert_allclose(m.component_upper[lab], hi, rtol=0, atol=1e-10 * peak)


@pytest.mark.parametrize("n,ci", [(200, 0.95), (7, 0.9), (2, 0.5), (50, 0.99)])
def test_percentiles_equal_numpy_quantile(n, ci):
    rng = np.random.default_rng(n)
    reps = rng.normal(size=(5, 6, n))
    reps[0, 0] = 1.0  # ties
    est = reps.mean(axis=-1)
    lo, hi, rel = KBS.percentile_summary(reps, est, ci, axis=-1)
    a = (1 - ci) / 2
    qlo, qhi = np.quantile(reps, [a, 1 - a], axis=-1)
    np.testing.assert_allclose(lo, qlo, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(hi, qhi, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(rel, reps.std(axis=-1, ddof=1) / np.abs(est), rtol=1e-12)
    lo0, hi0, _ = KBS.percentile_summary(np.moveaxis(reps, -1, 0), est, ci)  # axis 0
    np.testing.assert_array_equal(lo0, lo)
    np.testing.assert_array_equal(hi0, hi)


def _quantile_cases(n, seed):
    """Replicates (4, 5, n) with ties, a constant pixel, an outlier, and two NaN pixels."""
    rng = np.random.default_rng(seed)
    reps = rng.normal(size=(4, 5, n))
    reps[0, 0] = 1.0  # all tied
    reps[0, 1] = np.round(reps[0, 1])  # many ties
    reps[1, 2, 0] = 1e6  # an outlier
    reps[2, 3, n // 2] = np.nan
    reps[3, 4, -1] = np.nan
    return reps


# Check values: np.quantile (reference library; its default "linear" method is method 7
# of The American Statistician, 1996, "Sample quantiles in statistical packages";
# common practice) and ndarray.std(ddof=1) (reference library).
@needs_numba
@pytest.mark.parametrize("n", [2, 7, 50, 200, 1000])
@pytest.mark.parametrize("ci", [0.95, 0.5, 0.99, 0.8])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_compiled_percentiles_equal_numpy_quantile(n, ci, dtype):
    reps = _quantile_cases(n, seed=n).astype(dtype)
    est = np.nanmean(reps.astype(np.float64), axis=-1)
    est[1, 1] = 0.0  # rel_se NaN there
    lo, hi, rel = KBS.percentile_summary(reps, est, ci, axis=-1, backend="numba")
    a = (1 - ci) / 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qlo, qhi = np.quantile(reps.astype(np.float64), [a, 1 - a], axis=-1)
    for got, ref in ((lo, qlo), (hi, qhi)):
        assert got.dtype == np.float64
        np.testing.assert_allclose(got, ref, rtol=1e-14, atol=1e-15)  # NaN where NaN
    assert np.isnan(lo[2, 3]) and np.isnan(hi[3, 4]) and not np.isnan(lo[1, 2])
    se = reps.astype(np.float64).std(axis=-1, ddof=1)
    ref_rel = np.where(est != 0, se / np.abs(np.where(est != 0, est, 1.0)), np.nan)
    np.testing.assert_allclose(rel, ref_rel, rtol=1e-12)
    assert np.isnan(rel[1, 1])
    # the numpy fallback (naive twin) gives the same bits
    for got, ref in zip((lo, hi, rel), KBS.percentile_summary(reps, est, ci, axis=-1,
                                                              backend="numpy"), strict=True):
        np.testing.assert_array_equal(got, ref)
    # replicates on axis 0 (moved last by a copy)
    lo0, hi0, rel0 = KBS.percentile_summary(np.moveaxis(reps, -1, 0), est, ci,
                                            backend="numba")
    np.testing.assert_array_equal(lo0, lo)
    np.testing.assert_array_equal(hi0, hi)
    np.testing.assert_array_equal(rel0, rel)


@needs_numba
@pytest.mark.parametrize("sort_above", [0, 48])
def test_compiled_percentiles_sorted_pixels_and_threads(sort_above, monkeypatch):
    # a sort per pixel (long buffers) and pixels split over two threads: np.quantile
    # (reference library; common practice)
    monkeypatch.setattr(KQ, "SORT_ABOVE", sort_above)
    monkeypatch.setattr(KQ, "MIN_VALUES_PER_THREAD", 1)
    monkeypatch.setattr(KD, "usable_cores", lambda: 2)
    reps = _quantile_cases(60, seed=4)
    reps[1, 0] = np.arange(60.0)[::-1]  # descending: every value enters the buffers
    est = np.ones(reps.shape[:-1])
    lo, hi, _ = KBS.percentile_summary(reps, est, 0.9, axis=-1, backend="numba")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qlo, qhi = np.quantile(reps, [0.05, 0.95], axis=-1)
    np.testing.assert_allclose(lo, qlo, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(hi, qhi, rtol=1e-14, atol=1e-15)


def test_numpy_percentiles_nan_pixels_and_float32():
    # the numpy fallback alone: np.quantile (reference library; common practice)
    reps = _quantile_cases(30, seed=9).astype(np.float32)
    lo, hi, rel = KBS.percentile_summary(reps, np.ones(reps.shape[:-1]), 0.9, axis=-1,
                                         backend="numpy")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qlo, qhi = np.quantile(reps.astype(np.float64), [0.05, 0.95], axis=-1)
    np.testing.assert_allclose(lo, qlo, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(hi, qhi, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(rel, reps.astype(np.float64).std(axis=-1, ddof=1),
                               rtol=1e-12)


@needs_numba
def test_numpy_fallback_equals_the_compiled_path(monkeypatch):
    ens = make_toy_ensemble(12, seed=5, t_max=60.0, dt=0.6, ragged=True)
    kw = {"kinetic_energies": np.linspace(0.0, 2.0, 21), "delays": np.arange(0.0, 61.0, 10.0),
          "time_step": 1.0, "probe": GaussianPulse(photon_energy=5.0, fwhm=30.0),
          "decompose": "neutral", "n_boot": 6, "random_state": 2, "progress": False}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fast, reps_fast = trpes_with_replicates(ens, **kw)
        monkeypatch.setattr(KD, "numba_available", lambda: False)
        slow, reps_slow = trpes_with_replicates(ens, **kw)
    peak = np.abs(reps_fast).max()
    np.testing.assert_allclose(reps_slow, reps_fast, rtol=0, atol=1e-12 * peak)
    for lab in fast.component_lower:
        np.testing.assert_allclose(slow.component_upper[lab], fast.component_upper[lab],
                                   rtol=0, atol=1e-12 * peak)


@pytest.mark.parametrize("convolve,chunk", [(True, 64), (False, 64), (True, 2)])
def test_replicate_maps_equal_one_assemble_per_resample(convolve, chunk, monkeypatch):
    """All resamples at once (energy products per time bin, time products over blocks
    of delays and of energies) against _kernels_broadening.assemble called once per
    resample with its normaliser."""
    monkeypatch.setattr(KRM, "DELAY_CHUNK", chunk)
    monkeypatch.setattr(KRM, "APPLY_BYTES", 1 if chunk == 2 else KRM.APPLY_BYTES)
    rng = np.random.default_rng(7)
    n_c, n_time, n_fine, order, n_rep, h = 2, 9, 40, 8, 5, 0.05
    acc = rng.random((n_c, n_time, n_fine, order, n_rep))
    energies = np.linspace(0.1, 1.9, 23)
    blocks = KB.broadening_blocks(energies, e_lo=0.0, h=h, n_fine=n_fine, fwhm=4 * h,
                                  order=order)
    times = np.arange(n_time) * 2.0
    delays = np.linspace(0.0, 16.0, 6)
    cmat = KB.time_matrix(delays, times, sigma=3.0 if convolve else None, t_known=16.0)
    norm = rng.uniform(0.5, 2.0, (n_rep, n_time))
    norm[1, 3] = 0.0  # a time with no alive weight
    out = np.zeros((n_c, delays.size, energies.size, n_rep))
    for t0, t1 in ((0, 4), (4, n_time)):  # two time windows add up
        KRM.assemble_replicates(np.ascontiguousarray(acc[:, t0:t1]),
                                KRM.replicate_blocks(blocks), cmat[:, t0:t1],
                                norm[:, t0:t1], out)
    for r in range(n_rep):
        ref = KB.assemble(KBS.per_resample(acc, r), blocks, cmat * norm[r][None, :])
        np.testing.assert_allclose(out[..., r], ref, rtol=0, atol=1e-12 * np.abs(ref).max())


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("chunk,nbytes", [(16, 512 << 10), (4, 1)])
def test_apply_time_into_a_strided_slice_of_resamples(dtype, chunk, nbytes, monkeypatch):
    """The fused route adds a chunk of resamples into ``out[..., r0:r1]`` (not
    contiguous): the same numbers as a contiguous output, computed independently here
    as an einsum of the normalised replicates with the time matrix (not published)."""
    monkeypatch.setattr(KRM, "DELAY_CHUNK", chunk)  # 1 or 3 blocks of delays
    monkeypatch.setattr(KRM, "APPLY_BYTES", nbytes)  # all energies, or one per block
    rng = np.random.default_rng(11)
    n_win, n_e, n_rep = 30, 7, 6
    y = rng.random((1, n_win, n_e, n_rep)).astype(dtype)
    y0 = y.copy()
    times = np.arange(n_win) * 1.0
    cmat = KB.time_matrix(np.linspace(-5.0, 35.0, 9), times, sigma=2.0, t_known=29.0)
    norm = rng.uniform(0.5, 2.0, (n_rep, n_win))
    ref = np.einsum("dt,cter,rt->cder", cmat, y.astype(np.float64), norm)
    out = np.full((1, 9, n_e, n_rep + 4), 0.25)
    KRM.apply_time(y, cmat.astype(dtype), norm, out[..., 2:2 + n_rep], n_threads=2)
    tol = 1e-12 if dtype == np.float64 else 1e-5
    np.testing.assert_allclose(out[..., 2:2 + n_rep] - 0.25, ref, rtol=0,
                               atol=tol * np.abs(ref).max())
    assert np.all(out[..., :2] == 0.25) and np.all(out[..., 2 + n_rep:] == 0.25)
    np.testing.assert_array_equal(y, y0)  # the input is not modified
