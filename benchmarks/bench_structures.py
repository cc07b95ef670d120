"""Benchmarks for structures: batch RMSD throughput and clustering 10^6 snapshots.

Run from the repository root:

    python benchmarks/bench_structures.py           # full: 10^6 frames, 10^6 snapshots
    python benchmarks/bench_structures.py --quick   # smoke run at small sizes

Figures are printed as ratios against a peer measured in the same run (absolute
timings are noisy on shared machines). The straightforward per-frame SVD loop is
timed on a subset of the frames and scaled linearly to the full count (it is
per-frame work, so scaling is linear; the printout says so).
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np
import pandas as pd

from ensemblelab.compute.structures._reference_geometry import kabsch_rmsd_loop
from ensemblelab.compute.structures.clustering import cluster_snapshots
from ensemblelab.compute.structures.geometry import rmsd
from ensemblelab.data.ensemble import Ensemble


def bench_rmsd(n_frames: int = 1_000_000, n_atoms: int = 12, loop_frames: int = 5000,
               seed: int = 0) -> dict[str, float]:
    """Time QCP and batched Kabsch on `n_frames` frames vs the per-frame SVD loop."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_frames, n_atoms, 3))
    ref = rng.normal(size=(n_atoms, 3))
    t0 = time.perf_counter()
    r_qcp = rmsd(X, ref, method="qcp")
    t_qcp = time.perf_counter() - t0
    t0 = time.perf_counter()
    r_kab = rmsd(X, ref, method="kabsch")
    t_kab = time.perf_counter() - t0
    m = min(loop_frames, n_frames)
    t0 = time.perf_counter()
    r_loop, _ = kabsch_rmsd_loop(X[:m], ref)
    t_loop = (time.perf_counter() - t0) * n_frames / m
    err = float(max(np.abs(r_qcp[:m] - r_loop).max(), np.abs(r_kab[:m] - r_loop).max()))
    return {"n_frames": n_frames, "t_qcp": t_qcp, "t_kabsch": t_kab, "t_loop_scaled": t_loop,
            "loop_frames_timed": m, "speedup_qcp": t_loop / t_qcp,
            "speedup_kabsch": t_loop / t_kab, "fps_qcp": n_frames / t_qcp,
            "fps_kabsch": n_frames / t_kab, "max_abs_diff": err}


def synthetic_ensemble(n_snapshots: int, *, n_atoms: int = 12, n_groups: int = 4,
                       steps: int = 1000, seed: int = 0) -> Ensemble:
    """An invented ensemble of `n_snapshots` snapshots in planted structural groups."""
    rng = np.random.default_rng(seed)
    n_traj = max(1, n_snapshots // steps)
    steps = n_snapshots // n_traj
    n = n_traj * steps
    base = rng.normal(scale=1.5, size=(n_groups, n_atoms, 3))
    group = rng.integers(0, n_groups, n_traj)
    traj = np.repeat(np.arange(n_traj), steps)
    X = base[group[traj]] + 0.05 * rng.standard_normal((n, n_atoms, 3))
    time_ = np.tile(np.arange(steps) * 0.5, n_traj)
    active = np.where(time_ < 100.0, 2, 1)
    return Ensemble.from_arrays(traj=traj, time=time_, active=active, geometries=X,
                                symbols=["C"] * n_atoms, energies=np.zeros((n, 3)),
                                trajectories=pd.DataFrame({"traj": np.arange(n_traj)}),
                                copy=False)


def bench_clustering(n_snapshots: int = 1_000_000, seed: int = 0) -> dict[str, float]:
    """End-to-end cluster_snapshots (default mini-batch k-means, by state) with peak memory."""
    ens = synthetic_ensemble(n_snapshots, seed=seed)
    geom_mb = ens.geometries.nbytes / 2**20
    tracemalloc.start()
    t0 = time.perf_counter()
    res = cluster_snapshots(ens, n_clusters=4, random_state=seed)
    t = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return {"n_snapshots": ens.n_snapshots, "t_cluster": t, "peak_mb": peak / 2**20,
            "geometries_mb": geom_mb, "peak_over_geometries": peak / 2**20 / geom_mb,
            "n_clusters": len(res.summary)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smoke run at small sizes")
    args = parser.parse_args()
    n_rmsd, n_loop, n_clu = (20_000, 1000, 20_000) if args.quick else (1_000_000, 5000,
                                                                       1_000_000)
    r = bench_rmsd(n_rmsd, loop_frames=n_loop)
    print(f"batch RMSD, {r['n_frames']} frames x 12 atoms "
          f"(per-frame SVD loop timed on {r['loop_frames_timed']} frames, scaled linearly):")
    print(f"  QCP    {r['t_qcp']:.3f} s  {r['fps_qcp']:.3g} frames/s  "
          f"speed-up vs loop {r['speedup_qcp']:.0f}x (goal >= 50x)")
    print(f"  Kabsch {r['t_kabsch']:.3f} s  {r['fps_kabsch']:.3g} frames/s  "
          f"speed-up vs loop {r['speedup_kabsch']:.0f}x")
    print(f"  loop   {r['t_loop_scaled']:.1f} s (scaled); "
          f"max |difference| {r['max_abs_diff']:.1e} A")
    c = bench_clustering(n_clu)
    print(f"cluster_snapshots, {c['n_snapshots']} snapshots x 12 atoms, by state, mini-batch "
          f"k-means: {c['t_cluster']:.1f} s (goal < 60 s for 10^6 on 2 cores); "
          f"{c['n_clusters']} clusters")
    print(f"  peak traced memory during clustering {c['peak_mb']:.0f} MiB = "
          f"{c['peak_over_geometries']:.2f} x the geometry array ({c['geometries_mb']:.0f} MiB)")


if __name__ == "__main__":
    main()
