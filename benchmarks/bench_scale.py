"""Out-of-core scale benchmark: a large invented ensemble streamed into the chunked store.

Generates ``n_trajectories x n_steps`` snapshots (12 atoms, float32 geometries,
3 neutral states, 1 cation state; an invented two-state decay) chunk by chunk into
a chunked native store (never the whole ensemble in memory), then computes a TRPES
map and active-state populations on the lazy ensemble with Dask (local threaded
scheduler). Each phase runs in its own process, so each peak resident memory
figure is that phase's alone.

What the throughput ratio compares (sticks deposited per second of wall time):

* lazy: ``compute_trpes(load(store, lazy=True), ...)`` on the whole store. The
  time includes reading every chunk's snapshot columns and arrays from the store
  on disk (whatever of it the OS page cache still holds after the generation;
  the cache is not dropped), the stick kernel, the per-chunk sums and the final
  broadening.
* in memory: ``compute_trpes(ens, ...)`` on the first ~10^7 snapshots (whole
  chunks), already loaded into an in-memory Ensemble before the clock starts
  (the load is timed and printed separately). Its geometries are zero
  placeholders (the map does not use them), so that the subset fits in memory.

Both processes first compute one tiny map, so that imports and the compiled
kernel's loading are not timed in either.

Usage::

    python benchmarks/bench_scale.py                        # 10^5 x 1000 = 10^8 snapshots
    python benchmarks/bench_scale.py --n-trajectories 10000 # 10^7 snapshots
    python benchmarks/bench_scale.py --quick                # smoke run (seconds)

The full size needs about 23 GB of free disk (14 GB of geometries) in --dir.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from ensemblelab.compute.kinetics.populations import populations
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
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


def _delays(t_end: float) -> np.ndarray:
    return np.arange(-50.0, t_end + 1e-9, 10.0)


def _warm_up(path: Path) -> None:
    """One tiny in-memory map (imports, compiled kernel) before anything is timed."""
    from ensemblelab.io.chunked import load_chunk

    ens = load_chunk(path, 0, fields=["cation_energies", "dyson"])
    ens = ens.select(ens.trajectories["traj"].to_numpy()[:2])
    compute_trpes(ens, probe=PROBE, kinetic_energies=ENERGIES, delays=_delays(50.0), progress=False)


def lazy_run(path: Path, *, progress: bool = True, serial: bool = False) -> dict[str, float]:
    """TRPES map and populations on the lazy ensemble (reads the store); wall times, sticks.

    With the default local threaded scheduler (one thread per core). ``serial``
    also times the map again with Dask's synchronous scheduler (one thread; the
    compiled deposit kernel may still use its own threads, as in memory).
    """
    import dask

    lz = load(path, lazy=True)
    delays = _delays(float(lz.trajectories["t_end"].max()))
    t0 = time.perf_counter()
    m = compute_trpes(lz, probe=PROBE, kinetic_energies=ENERGIES, delays=delays, progress=progress)
    t_map = time.perf_counter() - t0
    t0 = time.perf_counter()
    pop = populations(lz)
    t_pop = time.perf_counter() - t0
    assert np.all(np.isfinite(m.intensity)) and len(pop) > 0
    out = {"t_map": t_map, "t_pop": t_pop, "n_sticks": float(m.params["n_sticks"]),
           "n_snapshots": float(lz.n_snapshots), "n_chunks": float(lz.n_chunks)}
    if serial:
        with dask.config.set(scheduler="synchronous"):
            t0 = time.perf_counter()
            m1 = compute_trpes(load(path, lazy=True), probe=PROBE, kinetic_energies=ENERGIES,
                               delays=delays, progress=False)
            out["t_map_serial"] = time.perf_counter() - t0
        scale = float(np.abs(m.intensity).max())
        out["serial_max_rel_diff"] = float(np.abs(m1.intensity - m.intensity).max() / scale)
    return out


def load_subset(path: Path, *, n_subset: int) -> Ensemble:
    """The first chunks holding `n_subset` trajectories as one in-memory Ensemble.

    Every array the map and the populations use is read; the geometries are
    zero placeholders that take no memory.
    """
    from ensemblelab.io.chunked import fake_geometries, load_chunk

    lz = load(path, lazy=True)
    parts, count = [], 0
    for i in range(lz.n_chunks):
        if count >= n_subset:
            break
        part = load_chunk(path, i, fields=["cation_energies", "dyson"])
        if count + part.n_trajectories > n_subset:
            part = part.select(part.trajectories["traj"].to_numpy()[:n_subset - count])
        parts.append(part)
        count += part.n_trajectories
    frame = pd.concat([p.snapshots for p in parts], ignore_index=True)
    first = parts[0]
    return Ensemble(
        snapshots=frame, geometries=fake_geometries(len(frame), first.n_atoms),
        energies=np.concatenate([p.energies for p in parts]),
        cation_energies=np.concatenate([p.cation_energies for p in parts]),
        dyson=np.concatenate([p.dyson for p in parts]), symbols=first.symbols,
        masses=first.masses, trajectories=pd.concat(
            [p.trajectories.drop(columns=["n_steps", "t_end"]) for p in parts],
            ignore_index=True), metadata=first.metadata)


def memory_run(path: Path, *, n_subset: int) -> dict[str, float]:
    """The same map (and populations) in memory on the first `n_subset` trajectories."""
    t0 = time.perf_counter()
    ens = load_subset(path, n_subset=n_subset)
    t_load = time.perf_counter() - t0
    delays = _delays(float(ens.trajectories["t_end"].max()))
    t0 = time.perf_counter()
    m = compute_trpes(ens, probe=PROBE, kinetic_energies=ENERGIES, delays=delays, progress=False)
    t_map = time.perf_counter() - t0
    t0 = time.perf_counter()
    populations(ens)
    t_pop = time.perf_counter() - t0
    return {"t_load": t_load, "t_map": t_map, "t_pop": t_pop,
            "n_sticks": float(m.params["n_sticks"]), "n_snapshots": float(ens.n_snapshots)}


def _phase(args: argparse.Namespace) -> int:
    """Run one phase in this process and print its figures as one JSON line."""
    path = Path(args.store)
    if args.phase == "generate":
        out = {"t_gen": generate(path, n_trajectories=args.n_trajectories,
                                 n_steps=args.n_steps, chunk_size=args.chunk_size,
                                 progress=not args.quick)}
    else:
        _warm_up(path)
        if args.phase == "lazy":
            out = lazy_run(path, progress=not args.quick, serial=True)
        else:
            out = memory_run(path, n_subset=args.subset)
    out["peak_rss_gb"] = peak_rss_gb()
    print("RESULT " + json.dumps(out), flush=True)
    return 0


def _run_phase(phase: str, path: Path, args: argparse.Namespace) -> dict[str, float]:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--phase", phase, "--store",
           str(path), "--n-trajectories", str(args.n_trajectories), "--n-steps",
           str(args.n_steps), "--chunk-size", str(args.chunk_size), "--subset",
           str(args.subset)]
    if args.quick:
        cmd.append("--quick")
    proc = subprocess.run(cmd, stdout=subprocess.PIPE, text=True, check=True)
    line = [x for x in proc.stdout.splitlines() if x.startswith("RESULT ")][-1]
    return json.loads(line[len("RESULT "):])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n-trajectories", type=int, default=100_000)
    ap.add_argument("--n-steps", type=int, default=1000)
    ap.add_argument("--chunk-size", type=int, default=1000, help="trajectories per chunk")
    ap.add_argument("--subset", type=int, default=None,
                    help="trajectories of the in-memory comparison (default: 10^7 snapshots "
                         "or the whole ensemble, whichever is smaller)")
    ap.add_argument("--dir", default=None, help="where to write the store (default: a temp dir)")
    ap.add_argument("--keep", action="store_true", help="keep the store afterwards")
    ap.add_argument("--quick", action="store_true", help="smoke run at a tiny size")
    ap.add_argument("--phase", choices=["generate", "lazy", "memory"], help=argparse.SUPPRESS)
    ap.add_argument("--store", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.quick:
        args.n_trajectories, args.n_steps, args.chunk_size = 60, 200, 16
    if args.subset is None:
        args.subset = max(1, min(10_000_000 // args.n_steps, args.n_trajectories))
    if args.phase:
        return _phase(args)
    base = Path(args.dir or tempfile.mkdtemp(prefix="bench_scale_"))
    path = base / "scale.ens"
    n_snap = args.n_trajectories * args.n_steps
    need = n_snap * (N_ATOMS * 3 * 4 + 5 * 8 + 8 * 6 + 10)
    free = shutil.disk_usage(base).free
    print(f"bench_scale: {args.n_trajectories} trajectories x {args.n_steps} steps = "
          f"{n_snap:.3g} snapshots, {N_ATOMS} atoms, float32 geometries, chunks of "
          f"{args.chunk_size} trajectories; ~{need / 1e9:.1f} GB on disk ({free / 1e9:.0f} GB "
          f"free); {os.cpu_count()} CPU(s)", flush=True)
    if need > 0.9 * free:
        print("bench_scale: not enough free disk; pass a smaller --n-trajectories")
        return 2
    try:
        gen = _run_phase("generate", path, args)
        size = sum(f.stat().st_size for f in path.rglob("*") if f.is_file())
        print(f"generate+write: {gen['t_gen']:.1f} s, {size / 1e9:.2f} GB, "
              f"{n_snap / gen['t_gen']:.3g} snapshots/s, peak RSS {gen['peak_rss_gb']:.2f} GB",
              flush=True)
        lazy = _run_phase("lazy", path, args)
        print(f"lazy TRPES map (whole store, read from disk): {lazy['t_map']:.1f} s "
              f"({lazy['n_sticks']:.3g} sticks, {lazy['n_sticks'] / lazy['t_map']:.3g} "
              f"sticks/s, {int(lazy['n_chunks'])} chunks); lazy populations: "
              f"{lazy['t_pop']:.1f} s; peak RSS {lazy['peak_rss_gb']:.2f} GB (goal <= 4 GB)",
              flush=True)
        print(f"lazy TRPES map again, Dask synchronous scheduler (one thread): "
              f"{lazy['t_map_serial']:.1f} s ({lazy['n_sticks'] / lazy['t_map_serial']:.3g} "
              f"sticks/s; max relative difference to the threaded map "
              f"{lazy['serial_max_rel_diff']:.1e})", flush=True)
        mem = _run_phase("memory", path, args)
        print(f"in-memory TRPES map on the first {args.subset} trajectories "
              f"({mem['n_snapshots']:.3g} snapshots, already in memory; loading them took "
              f"{mem['t_load']:.1f} s, not counted): {mem['t_map']:.1f} s "
              f"({mem['n_sticks'] / mem['t_map']:.3g} sticks/s); in-memory populations "
              f"{mem['t_pop']:.1f} s; peak RSS {mem['peak_rss_gb']:.2f} GB", flush=True)
        ratio = (lazy["n_sticks"] / lazy["t_map"]) / (mem["n_sticks"] / mem["t_map"])
        pop_ratio = (lazy["n_snapshots"] / lazy["t_pop"]) / (mem["n_snapshots"] / mem["t_pop"])
        serial = (lazy["n_sticks"] / lazy["t_map_serial"]) / (mem["n_sticks"] / mem["t_map"])
        print(f"ratio lazy / in-memory TRPES throughput per contribution (stick): {ratio:.2f} "
              f"(goal >= 0.5; lazy on the threaded scheduler with {os.cpu_count()} thread(s), "
              f"the in-memory path single-threaded except the compiled deposit kernel); "
              f"with the synchronous scheduler: {serial:.2f}")
        print(f"ratio lazy / in-memory populations throughput per snapshot: {pop_ratio:.2f}")
    finally:
        if not args.keep:
            shutil.rmtree(path, ignore_errors=True)
            if args.dir is None:
                shutil.rmtree(base, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
