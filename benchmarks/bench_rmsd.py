"""Batch RMSD of a protein-sized trajectory against the MD libraries, in one run.

Run from the repository root (the peers come with ``pip install -e '.[bench]'``):

    python benchmarks/bench_rmsd.py            # 3341 atoms x 980 frames
    python benchmarks/bench_rmsd.py --quick    # smoke run (300 atoms x 100 frames)

Data (invented, synthetic): a compact globule of `n_atoms` atoms (uniform in a sphere of
radius 22 Angstrom, away from the origin) whose atoms random-walk around their places
(an Ornstein-Uhlenbeck walk, RMSD to the start of order 1-2 Angstrom), and every frame is
also rotated and translated at random. Each library gets the same coordinates in its own
natural container: ensemblelab a float64 array in Angstrom (and, for its float32 option, a
float32 array), mdtraj a ``Trajectory`` (float32, nm), MDAnalysis per-frame float64 arrays.

Every time is end to end from the public call (centring, copies and dtype conversion
included), the best of `--repeat` rounds after one warm-up round, the contenders
alternating within each round (numba compiles on the first
call; the compile time is printed separately). Ratios are peer time / ensemblelab time, so
> 1 means ensemblelab is faster. Absolute times are noisy on a shared machine; the ratios
are measured in the same run.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy.spatial.transform import Rotation

from ensemblelab.compute.structures.geometry import rmsd


def synthetic_trajectory(n_atoms: int = 3341, n_frames: int = 980, *,
                         seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(frames (n_frames, n_atoms, 3), reference (n_atoms, 3)) in Angstrom, invented."""
    rng = np.random.default_rng(seed)
    u = rng.uniform(size=n_atoms) ** (1.0 / 3.0)
    v = rng.normal(size=(n_atoms, 3))
    ref = 22.0 * u[:, None] * v / np.linalg.norm(v, axis=1, keepdims=True)
    ref += np.array([31.0, 44.0, 57.0])
    disp = np.zeros((n_atoms, 3))
    frames = np.empty((n_frames, n_atoms, 3))
    rots = Rotation.random(n_frames, random_state=seed).as_matrix()
    centre = ref.mean(0)
    for f in range(n_frames):
        disp = 0.98 * disp + 0.25 * rng.normal(size=(n_atoms, 3))
        shift = rng.normal(scale=5.0, size=3)
        frames[f] = (ref + disp - centre) @ rots[f].T + centre + shift
    return frames, ref


def best_time(fn: Callable[[], Any], repeat: int) -> tuple[float, Any]:
    """Best wall time of `repeat` calls (after the caller's warm-up) and the last result."""
    best, out = np.inf, None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def best_interleaved(calls: dict[str, Callable[[], Any]], repeat: int
                     ) -> tuple[dict[str, float], dict[str, Any]]:
    """Best time of each call over `repeat` rounds, the calls alternating within a round
    (so every contender sees the same machine load); one warm-up round first."""
    res = {k: fn() for k, fn in calls.items()}
    times = dict.fromkeys(calls, np.inf)
    for _ in range(repeat):
        for k, fn in calls.items():
            t0 = time.perf_counter()
            fn()
            times[k] = min(times[k], time.perf_counter() - t0)
    return times, res


def run(n_atoms: int, n_frames: int, repeat: int) -> None:
    X, ref = synthetic_trajectory(n_atoms, n_frames)
    X32 = X.astype(np.float32)
    print(f"batch RMSD, {n_frames} frames x {n_atoms} atoms (synthetic, invented), "
          f"best of {repeat}")
    t0 = time.perf_counter()
    rmsd(X[:2], ref)
    rmsd(X32[:2], ref)
    rmsd(X[:2], ref, method="kabsch")
    print(f"  first call (compile or load kernels): {time.perf_counter() - t0:.2f} s")

    import mdtraj as md
    from MDAnalysis.analysis import align, rms

    top = md.Topology()
    residue = top.add_residue("UNK", top.add_chain())
    for _ in range(n_atoms):
        top.add_atom("C", md.element.carbon, residue)
    traj = md.Trajectory(X32 / 10.0, top)  # nm
    reft = md.Trajectory((ref / 10.0).astype(np.float32)[None], top)
    refc = ref - ref.mean(0)

    def mda_qcp() -> np.ndarray:
        return np.array([rms.rmsd(X[f], ref, center=True, superposition=True)
                         for f in range(n_frames)])

    def mda_rotation() -> np.ndarray:
        out = np.empty(n_frames)
        for f in range(n_frames):
            mob = X[f] - X[f].mean(0)
            _, out[f] = align.rotation_matrix(mob, refc)
        return out

    calls: dict[str, Callable[[], Any]] = {
        "qcp64": lambda: rmsd(X, ref),
        "qcp32": lambda: rmsd(X32, ref),
        "kabsch": lambda: rmsd(X, ref, method="kabsch"),
        "mdtraj": lambda: 10.0 * np.asarray(md.rmsd(traj, reft, 0), float),
        "mda_rmsd": mda_qcp,
        "mda_rot": mda_rotation,
    }
    times, res = best_interleaved(calls, repeat)
    base = res["kabsch"]
    for key in res:
        res[key] = np.abs(res[key] - base).max()
    ms = {k: 1e3 * v for k, v in times.items()}
    print(f"  ensemblelab rmsd(method='qcp') float64          {ms['qcp64']:8.1f} ms  "
          f"max|d| vs kabsch {res['qcp64']:.1e} A")
    print(f"  ensemblelab rmsd(float32 array)              {ms['qcp32']:8.1f} ms  "
          f"max|d| {res['qcp32']:.1e} A")
    print(f"  ensemblelab rmsd(method='kabsch') float64       {ms['kabsch']:8.1f} ms")
    print(f"  mdtraj.rmsd (float32 SIMD, Trajectory in nm)    {ms['mdtraj']:8.1f} ms  "
          f"max|d| {res['mdtraj']:.1e} A")
    print(f"  MDAnalysis rms.rmsd per frame (superposition)   {ms['mda_rmsd']:8.1f} ms  "
          f"max|d| {res['mda_rmsd']:.1e} A")
    print(f"  MDAnalysis align.rotation_matrix per frame      {ms['mda_rot']:8.1f} ms  "
          f"max|d| {res['mda_rot']:.1e} A")
    print("ratios (peer time / ensemblelab time; > 1: ensemblelab faster):")
    print(f"  QCP float64  vs mdtraj: {times['mdtraj'] / times['qcp64']:.2f}x   "
          f"QCP float32 vs mdtraj: {times['mdtraj'] / times['qcp32']:.2f}x  (goal >= 1)")
    print(f"  QCP float64  vs MDAnalysis rms.rmsd: {times['mda_rmsd'] / times['qcp64']:.1f}x")
    print(f"  Kabsch       vs MDAnalysis rotation_matrix: "
          f"{times['mda_rot'] / times['kabsch']:.1f}x  (goal >= 1)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smoke run at a small size")
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    if args.quick:
        run(300, 100, 2)
    else:
        run(3341, 980, args.repeat)


if __name__ == "__main__":
    main()
