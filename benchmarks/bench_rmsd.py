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

Every ensemblelab time is end to end from the public call ``rmsd(...)`` (validation,
reference preparation, threads), with the kernel-only figure (the compiled pass with the
reference already prepared) beside it. mdtraj is timed twice: as a user calls it
(``md.rmsd(traj, ref, 0)``, which centres the frames in place and computes the traces on
every call) and in its fastest form (``precentered=True`` after ``center_coordinates()``,
done outside the timing). MDAnalysis is called per frame (its functions take one frame).

The run has `--rounds` rounds (3 by default). In a round every contender is called
3 x `--repeat` times (the slow MDAnalysis loops `--repeat` times), the contenders
interleaved in a new random order each time (so every
one sees the same machine load and follows every other, including the OpenMP pools of
mdtraj and numba that spin for a while after a call); a round reports each contender's
best time and the ratios, and the run ends with the best and worst ratio over the rounds.
Ratios are peer time / ensemblelab time, so > 1 means ensemblelab is faster. Absolute
times are noisy on a shared machine; the ratios are measured in the same run. numba
compiles on the first call (or loads its cache); that time is printed separately.
"""

from __future__ import annotations

import argparse
import os
import random
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy.spatial.transform import Rotation

from ensemblelab.compute.structures import _kernels_superpose as kernels
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


def interleaved_round(calls: dict[str, Callable[[], Any]], repeat: int,
                      rng: random.Random, slow: set[str], fast_factor: int = 3
                      ) -> dict[str, float]:
    """Best wall time (s) of each call over `repeat * fast_factor` passes; each pass calls
    the contenders in a fresh random order, the `slow` ones (per-frame Python loops, 100x
    the others) only in every `fast_factor`-th pass (`repeat` calls)."""
    times = dict.fromkeys(calls, np.inf)
    for i in range(repeat * fast_factor):
        keys = [k for k in calls if k not in slow or i % fast_factor == 0]
        rng.shuffle(keys)
        for k in keys:
            t0 = time.perf_counter()
            calls[k]()
            times[k] = min(times[k], time.perf_counter() - t0)
    return times


#: (label, ensemblelab contender, peer) for every ratio printed
RATIOS = [
    ("QCP float64 vs mdtraj (as called)", "qcp64", "mdtraj"),
    ("QCP float64 vs mdtraj (fastest form)", "qcp64", "mdtraj_fast"),
    ("QCP float32 vs mdtraj (as called)", "qcp32", "mdtraj"),
    ("QCP float32 vs mdtraj (fastest form)", "qcp32", "mdtraj_fast"),
    ("QCP float64 vs MDAnalysis rms.rmsd", "qcp64", "mda_rmsd"),
    ("Kabsch float64 vs MDAnalysis rotation_matrix", "kabsch", "mda_rot"),
    ("Kabsch float64 vs mdtraj (as called)", "kabsch", "mdtraj"),
]

LABELS = {
    "qcp64": "ensemblelab rmsd(X float64) QCP",
    "qcp32": "ensemblelab rmsd(X float32) QCP",
    "kabsch": "ensemblelab rmsd(X, method='kabsch')",
    "qcp64_kernel": "  kernel only (QCP float64)",
    "qcp32_kernel": "  kernel only (QCP float32)",
    "mdtraj": "mdtraj.rmsd(traj, ref, 0) as called",
    "mdtraj_fast": "mdtraj.rmsd(precentered=True)",
    "mda_rmsd": "MDAnalysis rms.rmsd per frame",
    "mda_rot": "MDAnalysis align.rotation_matrix/fr.",
}


def run(n_atoms: int, n_frames: int, repeat: int, rounds: int) -> None:
    X, ref = synthetic_trajectory(n_atoms, n_frames)
    X32 = X.astype(np.float32)
    print(f"batch RMSD: {n_frames} frames x {n_atoms} atoms x 3 (synthetic, invented); "
          f"float64 {X.nbytes / 1e6:.0f} MB, float32 {X32.nbytes / 1e6:.0f} MB; "
          f"{rounds} rounds, best of {3 * repeat} interleaved calls each "
          f"({repeat} for the MDAnalysis per-frame loops)")
    t0 = time.perf_counter()
    rmsd(X[:2], ref)
    rmsd(X32[:2], ref)
    rmsd(X[:2], ref, method="kabsch")
    print(f"  first call (compile or load kernels): {time.perf_counter() - t0:.2f} s")
    import numba

    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"  threads: ensemblelab {numba.get_num_threads()} (numba.get_num_threads), "
          f"{os.cpu_count()} CPUs, 1-min load average {load:.1f} at the start")

    import mdtraj as md
    from MDAnalysis.analysis import align, rms

    top = md.Topology()
    residue = top.add_residue("UNK", top.add_chain())
    for _ in range(n_atoms):
        top.add_atom("C", md.element.carbon, residue)
    traj = md.Trajectory(X32 / 10.0, top)  # nm; md.rmsd centres it in place on each call
    reft = md.Trajectory((ref / 10.0).astype(np.float32)[None], top)
    trajc = md.Trajectory(X32 / 10.0, top)
    refc_md = md.Trajectory((ref / 10.0).astype(np.float32)[None], top)
    trajc.center_coordinates()  # the fastest form: centred, traces stored (not timed)
    refc_md.center_coordinates()
    refc = ref - ref.mean(0)
    w = np.ones(n_atoms)
    sel = np.arange(n_atoms)

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
        "qcp64_kernel": lambda: kernels.compiled_rmsd(X, ref, w, sel),
        "qcp32_kernel": lambda: kernels.compiled_rmsd(X32, ref, w, sel),
        "mdtraj": lambda: 10.0 * np.asarray(md.rmsd(traj, reft, 0), float),
        "mdtraj_fast": lambda: 10.0 * np.asarray(
            md.rmsd(trajc, refc_md, 0, precentered=True), float),
        "mda_rmsd": mda_qcp,
        "mda_rot": mda_rotation,
    }
    res = {k: fn() for k, fn in calls.items()}  # warm-up, and the accuracy check
    base = res["kabsch"]
    print("  max |RMSD - ensemblelab Kabsch float64| (Angstrom):  " + "  ".join(
        f"{k} {np.abs(np.asarray(v) - base).max():.1e}" for k, v in res.items()
        if k != "kabsch"))
    rng = random.Random(0)
    ratios: dict[str, list[float]] = {label: [] for label, _, _ in RATIOS}
    for r in range(rounds):
        times = interleaved_round(calls, repeat, rng, {"mda_rmsd", "mda_rot"})
        print(f"round {r + 1}: best times (ms)")
        for k, label in LABELS.items():
            print(f"  {label:<40s} {1e3 * times[k]:8.2f}")
        print(f"round {r + 1}: ratios (peer time / ensemblelab time; > 1: ensemblelab faster)")
        for label, ours, peer in RATIOS:
            ratio = times[peer] / times[ours]
            ratios[label].append(ratio)
            print(f"  {label:<46s} {ratio:7.2f}x")
    print(f"over {rounds} rounds: worst .. best ratio (goal: >= 1 for every line)")
    for label, values in ratios.items():
        print(f"  {label:<46s} {min(values):7.2f}x .. {max(values):7.2f}x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smoke run at a small size")
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    if args.quick:
        run(300, 100, 2, 2)
    else:
        run(3341, 980, args.repeat, args.rounds)


if __name__ == "__main__":
    main()
