"""Out-of-core scale benchmark: a large invented ensemble streamed into the chunked store.

Generates ``n_trajectories x n_steps`` snapshots (12 atoms, float32 geometries,
3 neutral states, 1 cation state; an invented two-state decay) chunk by chunk into
a chunked native store (never the whole ensemble in memory), then computes a TRPES
map and active-state populations on the lazy ensemble with Dask. It prints wall
times, the peak resident memory of the process, and the throughput of the lazy
TRPES path (sticks per second) as a ratio to the in-memory path measured in the
same run on a subset of the trajectories.

Usage::

    python benchmarks/bench_scale.py                        # 10^5 x 1000 = 10^8 snapshots
    python benchmarks/bench_scale.py --n-trajectories 10000 # 10^7 snapshots
    python benchmarks/bench_scale.py --quick                # smoke run (seconds)

The full size needs about 16 GB of free disk (14 GB of geometries) in --dir.
"""

from __future__ import annotations

import argparse
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from ensemblelab.compute.populations import populations
from ensemblelab.compute.pulses import GaussianPulse
from ensemblelab.compute.spectra import compute_trpes
from ensemblelab.data.ensemble import Ensemble
from ensemblelab.io import load
from ensemblelab.io.chunked import ChunkedStoreWriter

N_ATOMS = 12
DT = 0.5  # fs
TAU = 100.0  # fs, invented S2 lifetime
PROBE = GaussianPulse(photon_energy=5.0, fwhm=40.0)
ENERGIES = np.linspace(0.0, 2.5, 251)


def peak_rss_gb() -> float:
    """Peak resident memory of this process so far (GB; Linux reports KiB)."""
    kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return kib * (1.0 if sys.platform != "darwin" else 1.0 / 1024) / 1024**2


def make_chunk(first_id: int, n_traj: int, n_steps: int, rng: np.random.Generator
               ) -> tuple[Ensemble, np.ndarray]:
    """One chunk of the invented ensemble and its float32 geometries."""
    n = n_traj * n_steps
    ids = np.arange(first_id, first_id + n_traj, dtype=np.int64)
    step = np.tile(np.arange(n_steps, dtype=np.int64), n_traj)
    t = step * DT
    hop = np.repeat(rng.exponential(TAU, n_traj), n_steps)
    active = np.where(t < hop, 2, 1).astype(np.int64)
    energies = np.array([0.0, 3.0, 4.0]) + 0.05 * rng.standard_normal((n, 3))
    cation = 7.5 + 0.05 * rng.standard_normal((n, 1))
    dyson = np.where(active == 2, 0.9, 0.8)[:, None]
    frame = pd.DataFrame({"snapshot": np.zeros(n, np.int64), "traj": np.repeat(ids, n_steps),
                          "step": step, "time": t, "active": active})
    geoms = rng.standard_normal((n, N_ATOMS, 3), dtype=np.float32)
    ens = Ensemble(snapshots=frame,
                   geometries=np.broadcast_to(np.zeros((1, 1, 3)), (n, N_ATOMS, 3)),
                   energies=energies, symbols=("C",) * 4 + ("H",) * 8,
                   masses=np.array([12.011] * 4 + [1.008] * 8),
                   trajectories=pd.DataFrame({"traj": ids}), cation_energies=cation,
                   dyson=dyson, metadata={"invented": "bench_scale decay scenario"})
    return ens, geoms


def generate(path: Path, *, n_trajectories: int, n_steps: int, chunk_size: int,
             seed: int = 0, progress: bool = True) -> float:
    """Stream the invented ensemble into a chunked store; returns the wall time (s)."""
    from tqdm.auto import tqdm

    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    with ChunkedStoreWriter(path, chunk_size=chunk_size, overwrite=True) as w:
        for first in tqdm(range(0, n_trajectories, chunk_size), desc="generating",
                          unit="chunk", disable=not progress):
            ens, geoms = make_chunk(first, min(chunk_size, n_trajectories - first), n_steps,
                                    rng)
            w.write_chunk(ens, arrays={"geometries": geoms})
            del ens, geoms
    return time.perf_counter() - t0


def lazy_run(path: Path, *, progress: bool = True) -> dict[str, float]:
    """TRPES map and populations on the lazy ensemble; wall times and stick count."""
    lz = load(path, lazy=True)
    delays = np.arange(-50.0, lz.trajectories["t_end"].max() + 1e-9, 10.0)
    t0 = time.perf_counter()
    m = compute_trpes(lz, probe=PROBE, energies=ENERGIES, delays=delays, progress=progress)
    t_map = time.perf_counter() - t0
    t0 = time.perf_counter()
    pop = populations(lz)
    t_pop = time.perf_counter() - t0
    assert np.all(np.isfinite(m.intensity)) and len(pop) > 0
    return {"t_map": t_map, "t_pop": t_pop, "n_sticks": float(m.params["n_sticks"]),
            "n_snapshots": float(lz.n_snapshots)}


def memory_run(path: Path, *, n_subset: int) -> dict[str, float]:
    """The same map in memory on the first `n_subset` trajectories (and lazily on them)."""
    lz = load(path, lazy=True)
    ids = lz.trajectories["traj"].to_numpy()[:n_subset]
    ens = lz.select(ids)
    delays = np.arange(-50.0, ens.trajectories["t_end"].max() + 1e-9, 10.0)
    t0 = time.perf_counter()
    m = compute_trpes(ens, probe=PROBE, energies=ENERGIES, delays=delays, progress=False)
    t_map = time.perf_counter() - t0
    return {"t_map": t_map, "n_sticks": float(m.params["n_sticks"]),
            "n_snapshots": float(ens.n_snapshots)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n-trajectories", type=int, default=100_000)
    ap.add_argument("--n-steps", type=int, default=1000)
    ap.add_argument("--chunk-size", type=int, default=1000, help="trajectories per chunk")
    ap.add_argument("--subset", type=int, default=None,
                    help="trajectories of the in-memory comparison (default: 10^7 snapshots "
                         "or a tenth of the ensemble, whichever is smaller)")
    ap.add_argument("--dir", default=None, help="where to write the store (default: a temp dir)")
    ap.add_argument("--keep", action="store_true", help="keep the store afterwards")
    ap.add_argument("--quick", action="store_true", help="smoke run at a tiny size")
    args = ap.parse_args(argv)
    if args.quick:
        args.n_trajectories, args.n_steps, args.chunk_size = 60, 200, 16
    subset = args.subset or max(1, min(10_000_000 // args.n_steps, args.n_trajectories // 10))
    base = Path(args.dir or tempfile.mkdtemp(prefix="bench_scale_"))
    path = base / "scale.ens"
    n_snap = args.n_trajectories * args.n_steps
    need = n_snap * (N_ATOMS * 3 * 4 + 5 * 8 + 8 * 6)
    free = shutil.disk_usage(base).free
    print(f"bench_scale: {args.n_trajectories} trajectories x {args.n_steps} steps = "
          f"{n_snap:.3g} snapshots, {N_ATOMS} atoms, float32 geometries; ~{need / 1e9:.1f} GB "
          f"on disk ({free / 1e9:.0f} GB free)")
    if need > 0.9 * free:
        print("bench_scale: not enough free disk; pass a smaller --n-trajectories")
        return 2
    try:
        t_gen = generate(path, n_trajectories=args.n_trajectories, n_steps=args.n_steps,
                         chunk_size=args.chunk_size, progress=not args.quick)
        size = sum(f.stat().st_size for f in path.rglob("*") if f.is_file())
        print(f"generate+write: {t_gen:.1f} s, {size / 1e9:.2f} GB, {n_snap / t_gen:.3g} "
              f"snapshots/s, peak RSS so far {peak_rss_gb():.2f} GB")
        lazy = lazy_run(path, progress=not args.quick)
        rss_lazy = peak_rss_gb()
        print(f"lazy TRPES map: {lazy['t_map']:.1f} s ({lazy['n_sticks']:.3g} sticks, "
              f"{lazy['n_sticks'] / lazy['t_map']:.3g} sticks/s); populations: "
              f"{lazy['t_pop']:.1f} s; peak RSS {rss_lazy:.2f} GB (goal <= 4 GB)")
        mem = memory_run(path, n_subset=subset)
        print(f"in-memory TRPES map on {subset} trajectories ({mem['n_snapshots']:.3g} "
              f"snapshots): {mem['t_map']:.1f} s ({mem['n_sticks'] / mem['t_map']:.3g} "
              "sticks/s)")
        ratio = (lazy["n_sticks"] / lazy["t_map"]) / (mem["n_sticks"] / mem["t_map"])
        print(f"ratio lazy / in-memory throughput per contribution: {ratio:.2f} (goal >= 0.5)")
        print(f"peak RSS of the whole run (incl. the in-memory subset): {peak_rss_gb():.2f} GB")
    finally:
        if not args.keep:
            shutil.rmtree(path, ignore_errors=True)
            if args.dir is None:
                shutil.rmtree(base, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
