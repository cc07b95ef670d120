"""The fast TRPES kernels agree with their naive reference twins."""

from __future__ import annotations

import numpy as np
import pytest
from test_trpes_fixtures import random_ensemble

from ensemblelab.compute.spectroscopy import _kernels_broadening as KB
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import _reference_trpes as R
from ensemblelab.compute.spectroscopy import prepare_sticks
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse, cross_correlation_sigma

PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)
PUMP = GaussianPulse(photon_energy=4.0, fwhm=30.0)


@pytest.fixture(params=["auto", "numpy-fallback"])
def deposit_backend(request, monkeypatch):
    """Run once with the default backend and once as if numba were not installed."""
    if request.param == "numpy-fallback":
        monkeypatch.setattr(KD, "_NUMBA", {"dep": None})
    return request.param


@pytest.mark.parametrize("convolve", [True, False])
@pytest.mark.parametrize("offset", [0.0, 0.7])  # 0.7 fs: snapshots off the grid (split)
def test_kernel_map_equals_naive(convolve, offset, deposit_backend):
    ens = random_ensemble(5, seed=9, offset=offset)
    model = prepare_sticks(ens, probe=PROBE, pump=PUMP, progress=False, time_step=2.0)
    assert (model.tfrac is not None) == (offset != 0.0)
    energies = np.linspace(-0.2, 4.0, 85)
    delays = np.arange(-50.0, 95.0, 3.5)
    fast = model.broaden(kinetic_energies=energies, delays=delays, pump=PUMP, convolve=convolve)
    sigma = cross_correlation_sigma(PUMP, PROBE) if convolve else None
    naive = R.trpes_naive(model, energies=energies, delays=delays,
                          fwhm=model.fwhm(), sigma=sigma)
    scale = naive.max()
    assert scale > 0
    # moment expansion at the default 8 moments, 4 bins per FWHM: truncation bound 2.8e-7 of
    # the peak (module docstring; computed independently, not published)
    np.testing.assert_allclose(fast.intensity, naive, rtol=0, atol=3e-7 * scale)


@pytest.mark.parametrize(("order", "tol"), [(2, 1e-2), (4, 5e-5), (8, 3e-10)])
def test_kernel_moment_order_accuracy(order, tol):
    rng = np.random.default_rng(1)
    n = 500
    x = rng.uniform(0.3, 2.7, n)
    w = rng.uniform(0, 1, n)
    tb = rng.integers(0, 4, n)
    g = 0.06
    e = np.linspace(0, 3, 301)
    h = g / 8
    hist = KD.deposit_moments(tb, x, w, n_time=4, e_lo=0.0, h=h, n_fine=int(3 / h) + 2,
                             order=order, chunk=128)
    b = KB.energy_matrices(e, e_lo=0.0, h=h, n_fine=int(3 / h) + 2, fwhm=g, order=order)
    fast = KB.assemble(hist, b, np.eye(4))[0]
    naive = R.pure_map_naive(tb, None, x, w, n_time=4, energies=e, fwhm=g)
    assert np.abs(fast - naive).max() <= tol * naive.max()


def test_kernel_chunking_does_not_change_result():
    rng = np.random.default_rng(2)
    n = 1000
    args = (rng.integers(0, 5, n), rng.uniform(0, 2, n), rng.uniform(0, 1, n))
    kw = dict(n_time=5, e_lo=0.0, h=0.01, n_fine=202, order=4)
    a = KD.deposit_moments(*args, chunk=1 << 20, **kw)
    b = KD.deposit_moments(*args, chunk=37, **kw)
    np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-15)


def test_kernel_time_matrix_unit_step_is_half_at_zero():
    # Gaussian convolution algebra, derived and computed independently (not published): unit step
    # convolved at
    # tau = 0 gives 0.5 (1e-12), any sigma
    for sigma in (5.0, 18.0, 40.0):
        times = np.arange(-400.0, 600.0, 1.0)
        c = KB.time_matrix(np.array([0.0]), times, sigma=sigma, t_known=590.0, t_launch=0.0)
        assert c[0, times >= 0].sum() == pytest.approx(0.5, abs=1e-12)


def test_kernel_time_matrix_exponential_closed_form():
    # Gaussian convolution algebra, computed independently (not published): e^{-u/100 fs} with
    # T_cc = 50
    # fs at -50, 0, 50, 200 fs
    # -> 0.008646, 0.425407, 0.610385, 0.138421; discrete grid, tolerance 5e-4 (dt <= 0.1 fs)
    sigma = 50.0 / 2.354820045
    dt = 0.1
    times = np.arange(-400.0, 1200.0 + dt / 2, dt)
    delays = np.array([-50.0, 0.0, 50.0, 200.0])
    c = KB.time_matrix(delays, times, sigma=sigma, t_known=1200.0, t_launch=0.0)
    f = np.where(times >= 0, np.exp(-np.clip(times, 0, None) / 100.0), 0.0)
    out = c @ f
    np.testing.assert_allclose(out, [0.008646, 0.425407, 0.610385, 0.138421], atol=5e-4)
    # the trapezoid start makes the discrete value close to the closed form (7.2): 1e-5
    np.testing.assert_allclose(out, [0.008646, 0.425407, 0.610385, 0.138421], atol=1e-5)


def test_kernel_time_matrix_matches_naive_loop():
    rng = np.random.default_rng(3)
    times = np.arange(-300.0, 150.0, 2.0)
    pure = np.zeros((times.size, 3))
    pure[times >= 0] = rng.uniform(size=(int((times >= 0).sum()), 3))
    delays = np.array([-30.0, 0.0, 33.3, 120.0, 145.0])
    c = KB.time_matrix(delays, times, sigma=12.0, t_known=148.0, t_launch=0.0)
    ref = R.convolve_naive(pure, times, delays, sigma=12.0, t_known=148.0)
    np.testing.assert_allclose(c @ pure, ref, rtol=1e-12, atol=1e-14)


# --- compiled (numba) deposit backend against the numpy one and the naive twin ---------

def _sticks(n, seed, *, n_time=7, split=False, n_comp=1):
    rng = np.random.default_rng(seed)
    tb = rng.integers(0, n_time - 1 if split else n_time, n)
    x = rng.uniform(0.2, 2.8, n)
    w = rng.uniform(0.0, 1.0, n)
    tf = np.where(rng.uniform(size=n) < 0.5, rng.uniform(size=n), 0.0) if split else None
    comp = rng.integers(0, n_comp, n) if n_comp > 1 else None
    return tb, x, w, tf, comp


@pytest.mark.parametrize("split", [False, True])
@pytest.mark.parametrize("n_comp", [1, 3])
@pytest.mark.parametrize("n_threads", [1, 3])
@pytest.mark.parametrize("order", [8, 6, 5])  # the vector, unrolled and generic paths
def test_kernel_numba_deposit_equals_numpy(split, n_comp, n_threads, order):
    pytest.importorskip("numba")
    tb, x, w, tf, comp = _sticks(5000, 4, split=split, n_comp=n_comp)
    kw = dict(n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=order, n_comp=n_comp, comp=comp,
              tfrac=tf)
    a = KD.deposit_moments(tb, x, w, backend="numba", n_threads=n_threads, **kw)
    b = KD.deposit_moments(tb, x, w, backend="numpy", chunk=777, **kw)
    assert a.shape == b.shape == (order, n_comp, 7, 302)
    # same sums, other summation order: rounding only (computed independently, 1e-12)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12 * np.abs(b).max())


def test_kernel_numba_map_equals_naive_with_split_and_components():
    pytest.importorskip("numba")
    tb, x, w, tf, comp = _sticks(400, 5, n_time=6, split=True, n_comp=2)
    g = 0.06
    h = g / 8
    e = np.linspace(0.0, 3.0, 241)
    nf = int(3 / h) + 2
    hist = KD.deposit_moments(tb, x, w, n_time=6, e_lo=0.0, h=h, n_fine=nf, order=6,
                             comp=comp, n_comp=2, tfrac=tf, backend="numba", n_threads=2)
    b = KB.energy_matrices(e, e_lo=0.0, h=h, n_fine=nf, fwhm=g, order=6)
    maps = KB.assemble(hist, b, None)
    for c in range(2):
        sel = comp == c
        naive = R.pure_map_naive(tb[sel], tf[sel], x[sel], w[sel], n_time=6, energies=e,
                                 fwhm=g)
        # order 6, 8 bins per FWHM: <= ~2e-7 of the peak (module docstring; computed
        # independently, not published)
        assert np.abs(maps[c] - naive).max() <= 3e-7 * naive.max()
    # components add up to the total (1e-12, diabatic decomposition by the squared ADT)
    total = KB.assemble(KD.deposit_moments(tb, x, w, n_time=6, e_lo=0.0, h=h, n_fine=nf,
                                         order=6, tfrac=tf, backend="numba"), b, None)[0]
    np.testing.assert_allclose(maps.sum(axis=0), total, rtol=0, atol=1e-12 * total.max())


def test_kernel_numba_rejects_sticks_outside_grid():
    pytest.importorskip("numba")
    tb, x, w, _, _ = _sticks(100, 6)
    kw = dict(n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=4, backend="numba")
    with pytest.raises(ValueError, match="outside the grid"):
        KD.deposit_moments(tb, x + 5.0, w, **kw)
    with pytest.raises(ValueError, match="outside the grid"):
        KD.deposit_moments(tb + 7, x, w, **kw)
    x_nan = x.copy()
    x_nan[3] = np.nan
    with pytest.raises(ValueError, match="1 stick"):
        KD.deposit_moments(tb, x_nan, w, **kw)


def test_kernel_banded_assemble_equals_dense_product():
    # the banded energy broadening leaves out entries < BAND_CUTOFF (1e-13) of the
    # largest: it equals the dense product H @ B to ~1e-12 of the peak (computed
    # independently, not published)
    tb, x, w, _, _ = _sticks(3000, 7)
    h = 0.06 / 8
    nf = int(3 / h) + 2
    e = np.linspace(-0.1, 3.0, 157)
    hist = KD.deposit_moments(tb, x, w, n_time=7, e_lo=0.0, h=h, n_fine=nf, order=6,
                             backend="numpy")
    b = KB.energy_matrices(e, e_lo=0.0, h=h, n_fine=nf, fwhm=0.06, order=6)
    dense = np.einsum("ktf,kfe->te", hist[:, 0], b)
    banded = KB.assemble(hist, b, None)[0]
    np.testing.assert_allclose(banded, dense, rtol=0, atol=1e-12 * dense.max())
    cmat = np.random.default_rng(8).uniform(size=(5, 7))
    np.testing.assert_allclose(KB.assemble(hist, b, cmat)[0], cmat @ dense, rtol=0,
                               atol=1e-12 * (cmat @ dense).max())


def test_kernel_numpy_backend_without_numba_and_lazy_import():
    # numba is imported on the first compiled-kernel use only, never by the package import
    import subprocess
    import sys

    code = ("import sys, ensemblelab, ensemblelab.compute.spectroscopy.maps; "
            "assert 'numba' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True)
    tb, x, w, _, _ = _sticks(200, 9)
    with pytest.raises(ValueError, match="backend"):
        KD.deposit_moments(tb, x, w, n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=2,
                          backend="fortran")


def test_kernel_numba_backend_missing_raises(monkeypatch):
    from ensemblelab.errors import MissingDependencyError

    monkeypatch.setattr(KD, "_NUMBA", {"dep": None})  # as if numba were not installed
    assert not KD.numba_available()
    tb, x, w, _, _ = _sticks(50, 10)
    kw = dict(n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=2)
    with pytest.raises(MissingDependencyError, match=r"ensemblelab\[fast\]"):
        KD.deposit_moments(tb, x, w, backend="numba", **kw)
    # "auto" falls back to numpy
    assert KD.deposit_moments(tb, x, w, **kw).shape == (2, 1, 7, 302)


@pytest.mark.parametrize(("order", "bins"), [(6, 8.0), (8, 4.0), (3, 16.0)])
def test_kernel_broadening_blocks_equal_dense_matrices(order, bins):
    # the analytic band of each block holds every dense entry above BAND_CUTOFF, and its
    # values are the dense matrix's (the same formula evaluated on the band only:
    # rounding, 1e-15 of the largest; computed independently, not published)
    g = 0.05
    h = g / bins
    nf = int(3.2 / h) + 2
    e = np.concatenate([np.linspace(-0.2, 3.0, 150), [1.234, 0.5]])  # last block unsorted
    dense = KB.energy_matrices(e, e_lo=0.1, h=h, n_fine=nf, fwhm=g, order=order)
    blocks = KB.broadening_blocks(e, e_lo=0.1, h=h, n_fine=nf, fwhm=g, order=order, block=16)
    assert (blocks.order, blocks.n_fine, blocks.n_energies) == (order, nf, e.size)
    rebuilt = np.zeros_like(dense)
    for j0, j1, lo, hi, mat in blocks:
        rebuilt[:, lo:hi, j0:j1] = mat.reshape(hi - lo, order, j1 - j0).transpose(1, 0, 2)
    # inside the bands the same numbers (1e-15); outside, only entries below the cutoff
    big = np.abs(dense) > KB.BAND_CUTOFF * np.abs(dense).max()
    assert np.all(rebuilt[big] != 0)
    np.testing.assert_allclose(rebuilt[big], dense[big], rtol=0,
                               atol=1e-15 * np.abs(dense).max())
    np.testing.assert_allclose(rebuilt, dense, rtol=0,
                               atol=KB.BAND_CUTOFF * np.abs(dense).max())
    tb, x, w, _, _ = _sticks(2000, 11)
    hist = KD.deposit_moments(tb, x, w, n_time=7, e_lo=0.1, h=h, n_fine=nf, order=order)
    a = KB.assemble(hist, blocks, None)
    b = KB.assemble(hist, dense, None)
    c = KB.assemble(hist, blocks, None, n_threads=3)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-13 * np.abs(b).max())
    np.testing.assert_array_equal(a, c)  # threads split blocks, not sums
    with pytest.raises(ValueError, match="do not match"):
        KB.assemble(hist[:2], blocks, None)


def test_kernel_numba_reuses_freed_accumulators_only():
    # the compiled backend takes its accumulators from a pool; a histogram still held by
    # its caller is never handed out again, and one let go returns to the pool
    pytest.importorskip("numba")
    import gc

    tb, x, w, _, _ = _sticks(20000, 12)
    kw = dict(n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=8, backend="numba", n_threads=2)
    a = KD.deposit_moments(tb, x, w, **kw)
    a_copy = a.copy()
    b = KD.deposit_moments(tb[::-1], x, w, **kw)  # other sticks, while `a` is alive
    c = KD.deposit_moments(tb, x[::-1], w, **kw)
    assert not np.shares_memory(a, b) and not np.shares_memory(a, c)
    assert not np.shares_memory(b, c)
    np.testing.assert_array_equal(a, a_copy)
    size = a.size
    part = a[3, 0, 2:5]  # a view of a view: still holds the buffer
    free_before = sum(s.size == size for s in KD._SCRATCH)
    del a
    gc.collect()
    assert sum(s.size == size for s in KD._SCRATCH) == free_before
    e = KD.deposit_moments(tb, x, w[::-1], **kw)
    assert not np.shares_memory(e, part)
    np.testing.assert_array_equal(part, a_copy[3, 0, 2:5])
    del part, e
    gc.collect()
    assert sum(s.size == size for s in KD._SCRATCH) == free_before + 2
    d = KD.deposit_moments(tb, x, w, **kw)
    np.testing.assert_array_equal(d, a_copy)  # same sticks, same threads: same sums
    assert not np.shares_memory(d, b) and not np.shares_memory(d, c)


def test_kernel_numba_concurrent_calls_share_the_pool_safely():
    # several callers at once (as Dask worker threads do) each get their own accumulators:
    # every result equals the same call made alone (computed independently, exact)
    pytest.importorskip("numba")
    from concurrent.futures import ThreadPoolExecutor

    inputs = [_sticks(30000, 20 + i) for i in range(6)]
    kw = dict(n_time=7, e_lo=0.0, h=0.01, n_fine=302, order=8, backend="numba", n_threads=2)
    alone = [KD.deposit_moments(tb, x, w, **kw).copy() for tb, x, w, _, _ in inputs]
    with ThreadPoolExecutor(4) as pool:
        for _ in range(3):
            together = list(pool.map(lambda s: KD.deposit_moments(s[0], s[1], s[2], **kw),
                                     inputs))
            for a, b in zip(alone, together, strict=True):
                np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("backend", ["numpy", "numba"])
def test_deposit_memory_does_not_grow_with_the_number_of_sticks(backend):
    # bounded (chunked) memory: the extra peak allocation of a deposit is the accumulator
    # plus chunk buffers, the same for 4x more sticks (common practice: a streaming
    # reduction holds O(chunk), not O(n))
    import tracemalloc

    if backend == "numba" and not KD.numba_available():
        pytest.skip("numba not installed")
    n_time, n_fine, order = 200, 150, 8
    peaks = []
    for n in (500_000, 2_000_000):
        rng = np.random.default_rng(0)
        tb = rng.integers(0, n_time, n)
        e = rng.uniform(0.1, 0.9 * n_fine * 0.01, n)
        w = rng.uniform(0.0, 1.0, n)
        KD.deposit_moments(tb[:1000], e[:1000], w[:1000], n_time=n_time, e_lo=0.0, h=0.01,
                          n_fine=n_fine, order=order, backend=backend)  # compile, fill pool
        tracemalloc.start()
        hist = KD.deposit_moments(tb, e, w, n_time=n_time, e_lo=0.0, h=0.01, n_fine=n_fine,
                                 order=order, backend=backend)
        peaks.append(tracemalloc.get_traced_memory()[1])
        tracemalloc.stop()
        del hist
    acc = n_time * n_fine * order * 8
    input_bytes = 2_000_000 * 24
    per_thread = KD.usable_cores() * acc  # more sticks may start more threads
    assert peaks[1] - peaks[0] < 0.05 * input_bytes + per_thread, (peaks, acc)
    assert peaks[1] < 2 * acc + per_thread + 0.25 * input_bytes, (peaks, acc)
