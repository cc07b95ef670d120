"""The fused TRPES pass's thread layouts and its compiled helper passes, against their
numpy twins.

Every reference value here is the same quantity computed independently by the numpy
code of the package (the stick path ``block_sticks`` + ``deposit``, the engine's
``time_statistics``, ``traj_index``, the numpy sparse-row product; computed
independently, not published) or by the single-threaded pass.
"""

from __future__ import annotations

import types
import warnings

import numpy as np
import pandas as pd
import pytest

from ensemblelab.compute.engine import as_source, time_statistics
from ensemblelab.compute.spectroscopy import _kernels_broadening as KB
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import _kernels_fused as KF
from ensemblelab.compute.spectroscopy import compute_trpes, maps
from ensemblelab.compute.spectroscopy.cross_sections import DysonNorm
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.ensemble import Ensemble

pytestmark = pytest.mark.skipif(not KD.numba_available(), reason="needs numba (fast extra)")

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
GRID = {"kinetic_energies": np.linspace(0.0, 3.0, 121), "delays": np.arange(-40.0, 161.0, 4.0),
        "progress": False}


def _ensemble(seed: int, *, missing: bool, dt: float = 0.7, n_traj: int = 16,
              offset: float = 0.3) -> Ensemble:
    """Invented: ragged trajectories output every `dt` fs (off the grid for some), S1 -> S0
    hops, optional NaN holes."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_traj):
        n = int(rng.integers(60, 220))
        t = np.arange(n) * dt + (offset if k % 3 == 0 else 0.0)
        hop = rng.uniform(10.0, 120.0)
        rows.append((np.full(n, k), t, np.where(t < hop, 1, 0)))
    traj, time, active = (np.concatenate([r[i] for r in rows]) for i in range(3))
    n = time.size
    en = np.c_[0.2 * rng.standard_normal(n), 3.6 + 0.3 * rng.standard_normal(n)]
    cat = 5.8 + np.linspace(0.0, 1.0, 3) + 0.2 * rng.standard_normal((n, 3))
    dy = rng.uniform(0.1, 1.0, (n, 3))
    if missing:
        cat[rng.random((n, 3)) < 0.05] = np.nan
        cat[::7] = np.nan
    w = pd.DataFrame({"traj": np.arange(n_traj), "weight": rng.uniform(0.2, 2.0, n_traj)})
    return Ensemble.from_arrays(traj=traj, time=time, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, trajectories=w,
                                metadata={"sampling": "weighted"})


def _pass(block, n_threads, **kw):
    grid = {"start": 0.0, "dt": 0.5, "n_time": 700, "e_lo": -0.5, "h": 0.015, "n_fine": 420,
            "order": 8}
    return KF.fused_pass(block, w_traj=np.asarray(block.trajectories["weight"], float),
                         cross_section=DysonNorm(), total_energy=5.0, tail=0.08, shifts=None,
                         n_threads=n_threads, **grid, **kw)


@pytest.mark.parametrize("missing", [False, True])
def test_threads_give_the_single_thread_result(missing):
    ens = _ensemble(1, missing=missing)
    ref = _pass(ens, 1)
    for n_threads in (2, 3, 5):
        got = _pass(ens, n_threads)
        # reference: the single-threaded pass (computed independently)
        scale = np.abs(ref["hist"]).max()
        np.testing.assert_allclose(got["hist"], ref["hist"], rtol=0, atol=1e-12 * scale)
        for key in ("alive", "alive_count", "alive_channel"):
            np.testing.assert_allclose(got[key], ref[key], rtol=1e-12, atol=1e-12)
        assert (got["n_sticks"], got["n_missing"]) == (ref["n_sticks"], ref["n_missing"])


def test_time_split_shares_one_accumulator(monkeypatch):
    # sorted snapshots without missing data: the threads fill rows of one accumulator
    # instead of one each (which the earlier pass took, then zeroed and added)
    ens = _ensemble(2, missing=False)
    taken = []
    real = KD.pooled_accumulators
    monkeypatch.setattr(KD, "pooled_accumulators",
                        lambda size, count: taken.append(count) or real(size, count))
    _pass(ens, 2)
    assert taken == [1]


@pytest.mark.parametrize("missing", [False, True])
def test_compute_trpes_on_several_threads_equals_numpy_path(monkeypatch, missing):
    ens = _ensemble(3, missing=missing, dt=0.6)
    monkeypatch.setattr(KF, "MIN_SNAPSHOTS_PER_THREAD", 1)
    monkeypatch.setattr(KD, "usable_cores", lambda: 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = compute_trpes(ens, probe=PROBE, **GRID)
        monkeypatch.setattr(maps, "use_fused", lambda **kw: False)
        b = compute_trpes(ens, probe=PROBE, **GRID)
    # reference: the numpy stick path (computed independently)
    scale = np.abs(b.intensity).max()
    np.testing.assert_allclose(a.intensity, b.intensity, rtol=1e-10, atol=1e-10 * scale)
    np.testing.assert_allclose(a.alive, b.alive, rtol=1e-12, atol=1e-12 * b.alive.max())
    assert a.params["n_sticks"] == b.params["n_sticks"]


def _block(ens: Ensemble, rows: np.ndarray) -> types.SimpleNamespace:
    """The ensemble's arrays with the snapshot rows in another order (a block)."""
    snap = ens.snapshots.iloc[rows].reset_index(drop=True)
    ids = ens.trajectories["traj"].to_numpy()
    return types.SimpleNamespace(
        snapshots=snap, trajectories=ens.trajectories, n_snapshots=ens.n_snapshots,
        n_trajectories=ens.n_trajectories, energies=ens.energies[rows],
        cation_energies=ens.cation_energies[rows], dyson=ens.dyson[rows],
        traj_index=np.searchsorted(ids, snap["traj"].to_numpy()))


def test_blocks_not_grouped_or_not_sorted_give_the_same_pass():
    ens = _ensemble(4, missing=False)
    ref = _pass(ens, 1)
    rng = np.random.default_rng(0)
    starts = KF.block_layout(ens).starts
    reversed_time = np.concatenate([np.arange(starts[r], starts[r + 1])[::-1]
                                    for r in range(ens.n_trajectories)])
    for rows, grouped in ((rng.permutation(ens.n_snapshots), False), (reversed_time, True)):
        block = _block(ens, rows)
        lay = KF.block_layout(block)
        assert lay is not None and not lay.sorted
        assert (lay.starts is not None) == grouped
        for n_threads in (1, 2):
            got = _pass(block, n_threads)
            # reference: the pass over the sorted ensemble (computed independently)
            np.testing.assert_allclose(got["hist"], ref["hist"], rtol=0,
                                       atol=1e-12 * np.abs(ref["hist"]).max())
            np.testing.assert_allclose(got["alive"], ref["alive"], rtol=1e-12)


@pytest.mark.parametrize("dt", [0.5, 0.25, None])
def test_layout_equals_numpy_statistics_and_rows(dt):
    if dt is None:  # unequal steps: the median needs numpy (no compiled statistics)
        ens = _ensemble(5, missing=False, dt=0.5)
        t = ens.snapshots["time"].to_numpy().copy()
        t[1::5] += 0.1
        ens = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=t,
                                   active=ens.snapshots["active"], geometries=ens.geometries,
                                   symbols=ens.symbols, energies=ens.energies)
    else:
        ens = _ensemble(5, missing=False, dt=dt, offset=2.0)  # every step exactly dt
    lay = KF.block_layout(ens)
    assert lay is not None and lay.sorted
    # reference: traj_index (numpy searchsorted) and the engine's time statistics
    tix = ens.traj_index
    rows = np.repeat(np.arange(ens.n_trajectories), np.diff(lay.starts))
    np.testing.assert_array_equal(rows, tix)
    ref = time_statistics(as_source(ens))
    if dt is None:
        assert lay.stats is None
        return
    assert lay.stats is not None
    for key in ("t_min", "t_max", "median_step"):
        assert lay.stats[key] == ref[key], key
    np.testing.assert_array_equal(lay.stats["dt"][0], ref["dt"][0])
    np.testing.assert_array_equal(lay.stats["dt"][1], ref["dt"][1])


def test_compiled_sparse_rows_equal_the_numpy_twin():
    rng = np.random.default_rng(6)
    m = rng.standard_normal((300, 64))
    cmat = np.zeros((90, 300))
    for i in range(90):
        j = int(rng.integers(0, 299))
        cmat[i, j], cmat[i, j + 1] = rng.random(), rng.random()
    cmat[10] = 0.0
    cmat[20, :7] = 0.3
    # reference: the numpy twin, same products in the same order (computed independently)
    expect = KB._sparse_rows(cmat, m)
    for n_threads in (1, 2, 3):
        np.testing.assert_array_equal(KB.sparse_rows(cmat, m, n_threads=n_threads), expect)


def test_interpolation_rows_equal_the_dense_time_matrix():
    rng = np.random.default_rng(7)
    times = np.arange(0.0, 100.0, 0.5)
    # off-grid, on-grid, before the grid, beyond t_known and at the last point
    delays = np.r_[rng.uniform(-5.0, 110.0, 60), times[::17], -1e-12, 80.0, 99.5]
    scale = rng.uniform(0.5, 2.0, times.size)
    scale[::9] = 0.0  # grid times without alive weight
    for t_known in (80.0, 99.5):
        # reference: the dense matrix of time_matrix times the scale (computed
        # independently), and its nonzeros in np.nonzero's order
        dense = KB.time_matrix(delays, times, sigma=None, t_known=t_known) * scale[None, :]
        got = KB.interpolation_rows(delays, times, t_known=t_known, col_scale=scale)
        np.testing.assert_array_equal(got.dense(), dense)
        rows, cols = np.nonzero(dense)
        np.testing.assert_array_equal(got.cols, cols)
        np.testing.assert_array_equal(got.vals, dense[rows, cols])
        m = rng.standard_normal((times.size, 40))
        np.testing.assert_array_equal(KB.sparse_rows(got, m), KB._sparse_rows(dense, m))


def test_energy_range_on_several_threads_equals_numpy(monkeypatch):
    from ensemblelab.compute.spectroscopy import _kernels_layout as KL
    from ensemblelab.compute.spectroscopy.sticks import energy_range

    ens = _ensemble(8, missing=True)
    monkeypatch.setattr(KL, "MIN_SNAPSHOTS_PER_THREAD", 1)
    monkeypatch.setattr(KD, "usable_cores", lambda: 3)
    shifts = np.array([0.1, -0.2, 0.3])
    # reference: the numpy energy_range (computed independently)
    assert KL.fused_energy_range(ens, 5.0, 0.2, shifts) == energy_range(ens, None, 5.0, 0.2,
                                                                        shifts)
