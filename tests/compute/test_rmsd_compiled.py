"""The compiled batch RMSD (numba, one pass per frame) against its twins and scipy.

Twins: the batched numpy kernels (``backend="numpy"``) and the naive per-frame SVD loop
of ``_reference_geometry``; reference library: ``scipy.spatial.transform.Rotation.
align_vectors``. Data are shaped like real ensembles: a protein-sized globule that
random-walks, rotates and translates (invented), small molecules with mass weights, atom
subsets, per-frame references, float32 storage.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from ensemblelab.compute.structures import _kernels_superpose as S
from ensemblelab.compute.structures import _reference_geometry as REF
from ensemblelab.compute.structures.geometry import rmsd
from ensemblelab.data.elements import masses_for
from ensemblelab.errors import MissingDependencyError

pytest.importorskip("numba")


def walk(n_frames: int, n_atoms: int, seed: int, *, radius: float = 12.0,
         step: float = 0.2) -> tuple[np.ndarray, np.ndarray]:
    """Frames (n, a, 3) random-walking around a globule, each rotated and moved; reference."""
    rng = np.random.default_rng(seed)
    v = rng.normal(size=(n_atoms, 3))
    ref = radius * rng.uniform(size=n_atoms)[:, None] ** (1 / 3) * v / np.linalg.norm(
        v, axis=1, keepdims=True) + rng.uniform(-50, 50, 3)
    disp = np.cumsum(step * rng.normal(size=(n_frames, n_atoms, 3)), axis=0)
    rots = Rotation.random(n_frames, random_state=seed).as_matrix()
    X = np.einsum("nij,naj->nai", rots, ref + disp) + rng.normal(scale=8, size=(n_frames, 1, 3))
    return X, ref


@pytest.mark.parametrize("method", ["qcp", "kabsch"])
@pytest.mark.parametrize("seed,n_frames,n_atoms", [(0, 40, 300), (1, 7, 5), (2, 200, 23)])
def test_compiled_equals_numpy_twin(method, seed, n_frames, n_atoms):
    # computed independently (not published): the numpy batched kernels; QCP agrees with
    # Kabsch to 1e-10 A above ~1e-3 A (Acta Cryst. A61, 478 (2005), "Rapid calculation
    # of RMSDs using a quaternion-based characteristic polynomial")
    X, ref = walk(n_frames, n_atoms, seed)
    rng = np.random.default_rng(seed + 10)
    w = rng.uniform(0.5, 16.0, n_atoms)
    sub = np.sort(rng.choice(n_atoms, max(3, n_atoms // 2), replace=False))
    per_frame = np.roll(X, 1, axis=0)  # never the frame itself (QCP precision near 0)
    for kw in ({}, {"weights": w}, {"atoms": sub}, {"weights": w, "atoms": sub},
               {"allow_reflection": True}):
        for Q in (ref, per_frame):
            fast = rmsd(X, Q, method=method, backend="numba", **kw)
            slow = rmsd(X, Q, method=method, backend="numpy", **kw)
            np.testing.assert_allclose(fast, slow, atol=1e-10, rtol=0)


def test_compiled_equals_per_frame_svd_loop_weighted():
    # computed independently (not published): the naive per-frame np.linalg.svd loop,
    # mass weights of an invented C/H/O molecule (standard atomic weights, from memory)
    symbols = ["C", "C", "O", "H", "H", "H", "H", "O", "H"]
    X, ref = walk(60, len(symbols), 4, radius=1.5, step=0.05)
    w = masses_for(symbols)
    loop, _ = REF.kabsch_rmsd_loop(X, ref, w)
    for method in ("qcp", "kabsch"):
        got = rmsd(X, ref, weights="mass", symbols=symbols, method=method, backend="numba")
        np.testing.assert_allclose(got, loop, atol=1e-10, rtol=0)


def test_compiled_matches_scipy_align_vectors():
    # reference library: scipy.spatial.transform.Rotation.align_vectors on centred sets
    X, ref = walk(12, 50, 6)
    w = np.random.default_rng(6).uniform(1.0, 4.0, 50)
    cQ = (w[:, None] * ref).sum(0) / w.sum()
    expect = []
    for f in range(len(X)):
        cP = (w[:, None] * X[f]).sum(0) / w.sum()
        rot, _ = Rotation.align_vectors(ref - cQ, X[f] - cP, weights=w)
        d = rot.apply(X[f] - cP) - (ref - cQ)
        expect.append(np.sqrt(np.sum(w * np.sum(d * d, 1)) / w.sum()))
    for method in ("qcp", "kabsch"):
        np.testing.assert_allclose(rmsd(X, ref, weights=w, method=method, backend="numba"),
                                   expect, atol=1e-10, rtol=0)


def test_near_identical_frames_kabsch_exact():
    # analytic: a rigid motion of the reference has RMSD 0; Kabsch (residual from rotated
    # coordinates) stays exact, QCP within sqrt(eps * G) (Acta Cryst. A61, 478 (2005))
    _, ref = walk(1, 400, 7)
    rots = Rotation.random(5, random_state=7).as_matrix()
    X = np.einsum("nij,aj->nai", rots, ref) + np.array([3.0, -2.0, 1.0])
    assert rmsd(X, ref, method="kabsch", backend="numba").max() < 1e-12
    assert rmsd(X, ref, method="qcp", backend="numba").max() < 1e-5


def test_float32_read_as_stored():
    # computed independently (not published): float32 rounding of ~60 A coordinates moves
    # the RMSD by < 1e-5 A; the float32 array is not copied to float64 (memory)
    X, ref = walk(150, 1000, 8)
    X32 = X.astype(np.float32)
    exact = rmsd(X32.astype(np.float64), ref, backend="numpy")
    rmsd(X32[:2], ref)  # compile or load the float32 kernel outside the measurement
    tracemalloc.start()
    got = rmsd(X32, ref)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    np.testing.assert_allclose(got, exact, atol=1e-9, rtol=0)
    # analytic (triangle inequality; rotations keep norms, centring does not expand): the
    # RMSD moves by at most the RMS displacement that float32 storage gives each frame
    # (<= sqrt(3) * 2^-24 * 64 ~ 6.6e-6 A for coordinates below 128 A: half a float32 ulp,
    # common practice)
    moved = np.sqrt(np.mean(np.sum((X32.astype(np.float64) - X) ** 2, axis=2), axis=1))
    assert np.all(np.abs(got - rmsd(X, ref)) <= moved + 1e-9)
    assert moved.max() < 6.6e-6
    # common practice: no step allocates more than a small fraction of the input here
    assert peak < 0.1 * X32.nbytes, peak


def test_float64_no_full_size_temporaries():
    # common practice (issue: no step may allocate more than a small multiple of the input)
    X, ref = walk(200, 1000, 9)
    for method in ("qcp", "kabsch"):
        rmsd(X[:2], ref, method=method)
        tracemalloc.start()
        rmsd(X, ref, method=method)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        assert peak < 0.1 * X.nbytes, (method, peak)


@pytest.mark.parametrize("method", ["qcp", "kabsch"])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_chunks_and_threads_do_not_change_results(monkeypatch, method, dtype):
    # computed independently (not published): the numpy batched twins; every split of the
    # frames into chunks shared by 1-3 threads, odd frame counts (the last frame of a QCP
    # chunk paired with itself), atom subsets, weights, reflections, per-frame references
    monkeypatch.setattr(S, "SERIAL_ATOMS", 0)  # thread even these small inputs
    X, ref = walk(37, 64, 11)
    X = X.astype(dtype)
    rng = np.random.default_rng(11)
    w = rng.uniform(1.0, 16.0, 64)
    sub = np.sort(rng.choice(64, 40, replace=False))
    for Q in (ref, np.roll(X, 1, axis=0).astype(np.float64)):
        for kw in ({}, {"weights": w, "atoms": sub}, {"allow_reflection": True}):
            slow = rmsd(X, Q, method=method, backend="numpy", **kw)
            ws = w[sub] if "atoms" in kw else np.ones(64)
            sel = sub if "atoms" in kw else np.arange(64)
            for n_threads in (1, 2, 3):
                for chunk in (1, 2, 3, 7, None):
                    got = S.compiled_rmsd(X, Q, ws, sel, method=method, n_threads=n_threads,
                                          chunk_frames=chunk,
                                          allow_reflection=kw.get("allow_reflection", False))
                    np.testing.assert_allclose(got, slow, atol=1e-10, rtol=0,
                                               err_msg=f"{list(kw)} {n_threads} {chunk}")


def test_caller_does_not_wait_for_a_worker_that_has_not_started(monkeypatch):
    # on a busy machine a pool thread may wake only after the caller has done every chunk;
    # the call must return (with every frame computed) without waiting for it
    import threading

    gate = threading.Event()
    started: list[threading.Thread] = []

    class LatePool:
        def submit(self, fn):
            def late():
                gate.wait()
                fn()
            t = threading.Thread(target=late, daemon=True)
            t.start()
            started.append(t)

    monkeypatch.setattr(S, "SERIAL_ATOMS", 0)
    monkeypatch.setattr(S, "_pool", lambda workers: LatePool())
    X, ref = walk(40, 50, 13)
    expect = rmsd(X, ref, backend="numpy")
    box: list[np.ndarray] = []
    caller = threading.Thread(target=lambda: box.append(
        S.compiled_rmsd(X, ref, np.ones(50), np.arange(50), n_threads=2, chunk_frames=4)))
    caller.start()
    caller.join(timeout=60)
    finished = not caller.is_alive()
    gate.set()  # let the late worker run: it must find no chunk left
    for t in started:
        t.join(timeout=60)
    assert finished and started
    np.testing.assert_allclose(box[0], expect, atol=1e-10, rtol=0)


def test_equal_weights_take_the_unweighted_pass():
    # analytic: equal weights of any size give the unweighted RMSD; the compiled pass for
    # equal weights (no weight row) against the numpy twin with the same weights
    X, ref = walk(25, 80, 14)
    plain = rmsd(X, ref, backend="numpy")
    for value in (1.0, 2.5, 1e-3):
        w = np.full(80, value)
        np.testing.assert_allclose(rmsd(X, ref, weights=w), plain, atol=1e-10, rtol=0)
        np.testing.assert_allclose(rmsd(X.astype(np.float32), ref, weights=w),
                                   rmsd(X.astype(np.float32), ref, backend="numpy"),
                                   atol=1e-10, rtol=0)


@pytest.mark.parametrize("offset", [0.0, 1e3, 3e4])
def test_qcp_far_from_origin(offset):
    # computed independently (not published): the Kabsch path (rotated residual) on the
    # same coordinates; the one-pass QCP shifts each frame by its first atom, so a box
    # coordinate of 3e4 Angstrom loses no more than float64 rounding of the input
    X, ref = walk(30, 500, 12)
    X = X + offset
    ref = ref - offset
    kabsch = rmsd(X, ref, method="kabsch", backend="numba")
    np.testing.assert_allclose(rmsd(X, ref), kabsch, atol=1e-9, rtol=0)


def test_fallback_without_numba(monkeypatch):
    # the numpy fallback gives the same numbers; asking for numba without it is an error
    X, ref = walk(20, 30, 10)
    fast = rmsd(X, ref)
    monkeypatch.setattr(S, "_kernels", lambda: None)
    assert not S.compiled_available()
    np.testing.assert_allclose(rmsd(X, ref), fast, atol=1e-10, rtol=0)
    np.testing.assert_allclose(rmsd(X.astype(np.float32), ref), fast, atol=1e-5, rtol=0)
    with pytest.raises(MissingDependencyError, match="fast"):
        rmsd(X, ref, backend="numba")


def test_bench_rmsd_smoke():
    # the benchmark's data builder and peers' shapes stay alive (tiny size, no peers)
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_rmsd.py"
    spec = importlib.util.spec_from_file_location("bench_rmsd", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    X, ref = mod.synthetic_trajectory(60, 30)
    r = rmsd(X, ref)
    assert X.shape == (30, 60, 3) and np.all((r > 0.1) & (r < 10))
