"""The fused bootstrap route (``bootstrap_fused``, ``_kernels_boot_fused``).

Checked against the naive twin (a loop over resampled ensembles, each through
``compute_trpes``) and against the stick route, on ensembles shaped like real ones:
several seeds, ragged trajectories, trajectories stopped in an absorbing ground state,
unequal weights, snapshots between grid points (linear time split), shifts and other
built-in cross sections. The percentile bootstrap: Stat. Sci. 1986, "Bootstrap methods
for standard errors, confidence intervals, and other measures of statistical accuracy".
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from ensemblelab.compute.spectroscopy import _kernels_boot_fused as KBF
from ensemblelab.compute.spectroscopy import _kernels_bootstrap as KBS
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import bootstrap_fused as BF
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy._reference_bootstrap import naive_bootstrap_maps
from ensemblelab.compute.spectroscopy.cross_sections import HydrogenicCoulomb
from ensemblelab.testing import make_toy_ensemble

pytestmark = pytest.mark.skipif(not KD.numba_available(), reason="numba not installed")

sys.path.insert(0, str(Path(__file__).parent))
from test_trpes_bootstrap import PROBE, SMALL, _absorbing_weighted, _quiet  # noqa: E402


def _boot(ens, grid, monkeypatch, **kw):
    monkeypatch.setattr(BF, "DEFAULT_GRID", grid)
    return _quiet(compute_trpes, ens, interval="bootstrap", progress=False, **kw)


@pytest.mark.parametrize("seed,normalise,time_step", [(5, "alive", None), (6, "initial", 2.0),
                                                      (7, "alive", 0.7)])
def test_exact_fused_route_equals_the_naive_twin(seed, normalise, time_step, monkeypatch):
    ens = _absorbing_weighted(seed=seed)
    kw = dict(SMALL, weights="ensemble", normalise=normalise, time_step=time_step)
    m = _boot(ens, BF.EXACT, monkeypatch, n_boot=12, random_state=seed, **kw)
    assert "fused pass" in m.params["interval_method"]  # the route under test was taken
    counts = KBS.bootstrap_counts(ens.n_trajectories, 12, np.random.default_rng(seed))
    tot, _ = _quiet(naive_bootstrap_maps, ens, counts, **kw)
    lo, hi = np.quantile(tot, [0.025, 0.975], axis=0)
    peak = np.abs(m.intensity).max()
    # same numbers up to summation order (computed independently (not published))
    np.testing.assert_allclose(m.lower, lo, rtol=0, atol=1e-10 * peak)
    np.testing.assert_allclose(m.upper, hi, rtol=0, atol=1e-10 * peak)
    ok = m.intensity != 0
    np.testing.assert_allclose(m.rel_se[ok], (tot.std(axis=0, ddof=1) / np.abs(m.intensity))[ok],
                               rtol=1e-7)


@pytest.mark.parametrize("extra", [{"ionisation_shifts": [0.3]},
                                   {"cross_section": HydrogenicCoulomb()},
                                   {"convolve": False}, {"weights": "doorway"}])
def test_exact_fused_route_equals_the_stick_route(extra, monkeypatch):
    ens = make_toy_ensemble(20, seed=11, t_max=140.0, ragged=True)
    kw = dict(SMALL, n_boot=10, random_state=2, **extra)
    fused = _boot(ens, BF.EXACT, monkeypatch, **kw)
    sticks = _boot(ens, None, monkeypatch, **kw)
    assert "fused pass" in fused.params["interval_method"]
    assert "fused pass" not in sticks.params["interval_method"]
    peak = np.abs(fused.intensity).max()
    for a, b in ((fused.lower, sticks.lower), (fused.upper, sticks.upper)):
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-10 * peak)


@pytest.mark.parametrize("seed", [3, 8])
def test_fast_replicates_move_the_interval_by_a_small_fraction(seed, monkeypatch):
    ens = _absorbing_weighted(n=30, seed=seed)
    kw = dict(SMALL, weights="ensemble", n_boot=40, random_state=seed, time_step=0.7)
    exact = _boot(ens, BF.EXACT, monkeypatch, **kw)
    fast = _boot(ens, BF.FAST, monkeypatch, **kw)
    half = 0.5 * np.max(exact.upper - exact.lower)
    # 3 moments, 4 bins per FWHM, recentred: measured 0.2-0.3 % of the widest
    # half-width; bound about 1 % (truncation_bound; computed independently (not
    # published)); 2 % allowed
    assert np.max(np.abs(fast.lower - exact.lower)) < 0.02 * half
    assert np.max(np.abs(fast.upper - exact.upper)) < 0.02 * half
    np.testing.assert_array_equal(fast.intensity, exact.intensity)  # the map itself
    sig = exact.intensity > 0.05 * np.abs(exact.intensity).max()
    np.testing.assert_allclose(fast.rel_se[sig], exact.rel_se[sig], rtol=0.05)
    # without the recentring the float32 3-moment replicates would be off by more
    wrong = BF.ReplicateGrid(order=2, bins_per_fwhm=1.0, dtype="float32")
    bad = _boot(ens, wrong, monkeypatch, **kw)
    assert np.max(np.abs(bad.lower - exact.lower)) > np.max(np.abs(fast.lower - exact.lower))


def _rows(ens, rw, **over):
    """Replicate rows of ``fused_replicates`` for the toy grid (direct call)."""
    m, model = _quiet(compute_trpes, ens, return_model=True, **SMALL)
    fwhm = model.fwhm(PROBE, 0.0)
    e_lo, h, n_fine = model.moment_grid(fwhm)
    from ensemblelab.compute.spectroscopy import _kernels_broadening as KB
    from ensemblelab.compute.spectroscopy import _kernels_replicate_maps as KRM
    from ensemblelab.compute.spectroscopy._kernels_layout import block_layout
    from ensemblelab.compute.spectroscopy.cross_sections import DysonNorm
    from ensemblelab.compute.spectroscopy.pulses import FWHM_TO_SIGMA
    from ensemblelab.compute.spectroscopy.sticks import THRESHOLD_TAIL

    blocks = KRM.replicate_blocks(KB.broadening_blocks(SMALL["kinetic_energies"], e_lo=e_lo,
                                                       h=h, n_fine=n_fine, fwhm=fwhm, order=3))
    kw = dict(layout=block_layout(ens), w_traj=np.ones(ens.n_trajectories), rw=rw,
              cross_section=DysonNorm(), total_energy=PROBE.total_energy,
              tail=THRESHOLD_TAIL * PROBE.effective_spectral_fwhm * FWHM_TO_SIGMA,
              start=model.grid_start, dt=model.time_step, n_time=model.n_time, e_lo=e_lo,
              h=h, n_fine=n_fine, order=3, shifts=None, blocks=blocks,
              n_energies=len(SMALL["kinetic_energies"]))
    kw.update(over)
    return KBF.fused_replicates(ens, **kw)


def test_threads_tiles_and_unit_profiles_do_not_change_the_rows(monkeypatch):
    ens = make_toy_ensemble(15, seed=2, t_max=100.0, ragged=True)
    rw = KBS.bootstrap_counts(ens.n_trajectories, 6, np.random.default_rng(1)).T.copy()
    ref = _rows(ens, rw, n_threads=1, jobs_per_thread=1)
    assert np.abs(ref).max() > 0
    monkeypatch.setattr(KBF, "TILE_BYTES", 1)  # tiles of one grid time
    for nt, jobs in ((2, 1), (2, 5), (1, 7)):
        got = _rows(ens, rw, n_threads=nt, jobs_per_thread=jobs)
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())
    # a wrong multiplicity gives other rows (the check can fail)
    rw2 = rw.copy()
    rw2[0, 0] += 1.0
    assert np.abs(_rows(ens, rw2, n_threads=1) - ref).max() > 1e-6 * np.abs(ref).max()


def test_small_accumulator_budget_chunks_the_resamples(monkeypatch):
    ens = make_toy_ensemble(12, seed=9, t_max=90.0)
    kw = dict(SMALL, n_boot=20, random_state=4)
    one = _boot(ens, BF.EXACT, monkeypatch, **kw)
    monkeypatch.setattr(KBF, "L2_BYTES", 1)  # 16 resamples (LANES) per chunk
    many = _boot(ens, BF.EXACT, monkeypatch, **kw)
    np.testing.assert_allclose(many.lower, one.lower, rtol=1e-12, atol=0)
    np.testing.assert_allclose(many.upper, one.upper, rtol=1e-12, atol=0)


def test_decomposition_takes_the_stick_route(monkeypatch):
    ens = make_toy_ensemble(12, seed=6, t_max=90.0)
    m = _boot(ens, BF.FAST, monkeypatch, n_boot=6, random_state=1, decompose="neutral",
              **SMALL)
    assert "fused pass" not in m.params["interval_method"]
    assert set(m.component_lower) == set(m.components)


def test_a_stick_outside_the_fine_grid_is_an_error():
    ens = make_toy_ensemble(6, seed=1, t_max=40.0)
    rw = np.ones((ens.n_trajectories, 2))
    with pytest.raises(ValueError, match="outside the time or fine energy grid"):
        _rows(ens, rw, e_lo=100.0)  # every stick below the fine grid


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_byte_multiplicities_give_the_rows_of_float_ones(dtype):
    # The caller passes whole multiplicities below 256 as uint8 (a quarter of the memory
    # traffic); the kernel must widen them exactly. Reference: the same multiplicities as
    # floats of the accumulator's precision (computed independently, not published).
    ens = make_toy_ensemble(14, seed=4, t_max=100.0, ragged=True)
    counts = KBS.bootstrap_counts(ens.n_trajectories, 16, np.random.default_rng(3)).T
    counts[0, :] = 255  # the largest byte value
    ref = _rows(ens, np.ascontiguousarray(counts, dtype=dtype), n_threads=1)
    got = _rows(ens, np.ascontiguousarray(counts, dtype=np.uint8), dtype=dtype, n_threads=1)
    assert got.dtype == dtype and np.abs(ref).max() > 0
    tol = 1e-12 if dtype == np.float64 else 1e-5
    np.testing.assert_allclose(got, ref, rtol=tol, atol=tol * np.abs(ref).max())
    # float multiplicities of another width than the accumulator are refused
    with pytest.raises(TypeError, match="multiplicities of dtype float32"):
        _rows(ens, np.ascontiguousarray(counts, dtype=np.float32), dtype=np.float64)


def test_padding_copies_do_not_change_the_resamples(monkeypatch):
    # Resamples are padded with copies of the unresampled ensemble up to a multiple of
    # LANES; with LANES = 1 there is no padding, and every interval must be the same.
    ens = make_toy_ensemble(12, seed=8, t_max=90.0)
    kw = dict(SMALL, n_boot=13, random_state=2)  # 14 replicates: 2 padding copies
    padded = _boot(ens, BF.EXACT, monkeypatch, **kw)
    monkeypatch.setattr(KBF, "LANES", 1)
    plain = _boot(ens, BF.EXACT, monkeypatch, **kw)
    assert np.max(padded.upper - padded.lower) > 0
    np.testing.assert_allclose(padded.lower, plain.lower, rtol=1e-12, atol=0)
    np.testing.assert_allclose(padded.upper, plain.upper, rtol=1e-12, atol=0)
