"""Load benchmark: our extended-XYZ folder reader against ase.io.read on the same files.

Generates an invented ensemble (default 200 trajectories x 1000 frames x 12
atoms, three states, one cation state) in a temporary folder, then prints

* speed: time of ``ase.io.read(f, index=":")`` over all files divided by the
  time of ``ensemblelab.io.load(folder)`` (goal >= 10);
* memory: peak and retained heap bytes of ``load`` (tracemalloc, in a fresh
  subprocess) divided by the bytes of the arrays and tables it returns (goal
  peak <= 1.5); and, as a cross-check, the rise of the peak resident set size
  (Linux /proc VmHWM after a reset), which also sees C buffers and allocator slack.

Absolute timings are noisy on shared machines; the ratios are what counts.
Usage: ``python benchmarks/bench_load.py [--quick] [--n-traj N] [--n-frames N]
[--n-atoms N] [--gzip] [--repeat N]``. Best of `--repeat` runs; the CPU-time
ratio is less sensitive to other jobs on a shared machine than the wall-time one.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from ensemblelab import Ensemble
from ensemblelab.io import load, write_extxyz


def make_folder(folder: Path, *, n_traj: int, n_frames: int, n_atoms: int,
                compress: bool = False, seed: int = 0) -> Path:
    """Write an invented ensemble in the extended-XYZ layout; return the folder."""
    rng = np.random.default_rng(seed)
    n = n_traj * n_frames
    traj = np.repeat(np.arange(n_traj), n_frames)
    time_fs = np.tile(np.arange(n_frames) * 0.5, n_traj)
    energies = np.array([0.0, 3.2, 4.1]) + 0.05 * rng.standard_normal((n, 3))
    active = np.where(rng.uniform(size=n) < 0.5, 1, 2)
    geoms = np.linspace(0, 6, n_atoms)[:, None] * np.array([1.0, 0.3, 0.1]) \
        + 0.05 * rng.standard_normal((n, n_atoms, 3))
    symbols = (["C", "H", "O", "N"] * n_atoms)[:n_atoms]
    ens = Ensemble.from_arrays(
        traj=traj, time=time_fs, active=active, geometries=geoms, symbols=symbols,
        energies=energies, cation_energies=energies[:, [2]] + 3.5,
        dyson=np.full((n, 1), 0.9), columns={"e_kin": rng.uniform(0.1, 0.3, size=n)},
        trajectories=pd.DataFrame({"traj": np.arange(n_traj)}),
        metadata={"producer": "benchmarks/bench_load.py (invented)"}, copy=False,
    )
    return write_extxyz(ens, folder, compress=compress, precision=10)


def _best(func, repeat: int) -> tuple[float, float, object]:
    """Best wall and best CPU (process) time of `repeat` calls, and the last result."""
    wall = cpu = np.inf
    out = None
    for _ in range(repeat):
        w0, c0 = time.perf_counter(), time.process_time()
        out = func()
        wall = min(wall, time.perf_counter() - w0)
        cpu = min(cpu, time.process_time() - c0)
    return float(wall), float(cpu), out


def time_ours(folder: Path, repeat: int = 1) -> tuple[float, float]:
    """Best wall and CPU time of ``load(folder)`` in seconds."""
    wall, cpu, _ = _best(lambda: load(folder, progress=False), repeat)
    return wall, cpu


def time_ase(folder: Path, repeat: int = 1) -> tuple[float, float, int]:
    """Best wall and CPU time of ``ase.io.read(f, index=":")`` over every file; frame count."""
    import ase.io

    files = sorted(folder.glob("*.xyz*"))
    wall, cpu, frames = _best(
        lambda: sum(len(ase.io.read(f, index=":", format="extxyz")) for f in files), repeat)
    return wall, cpu, int(frames)  # type: ignore[arg-type]


_MEMORY_SCRIPT = """
import json, sys, tracemalloc
import numpy as np
import pandas, pyarrow, tqdm.auto  # noqa: F401  (imported before the baseline)
from ensemblelab.io import load
from ensemblelab.io import xyz  # noqa: F401
from ensemblelab.data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS

def status_kib(key):
    with open("/proc/self/status") as fh:
        return next(int(line.split()[1]) for line in fh if line.startswith(key))

mode = sys.argv[2]
if mode == "rss":  # peak resident set size (includes C allocations tracemalloc cannot see)
    from pathlib import Path
    load(sorted(Path(sys.argv[1]).glob("traj_*"))[0], progress=False)  # warm up on one file
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")  # reset the high-water mark VmHWM (Linux >= 4.0)
    before = status_kib("VmRSS")
    ens = load(sys.argv[1], progress=False)
    peak = status_kib("VmHWM")
    after = status_kib("VmRSS")
    print(json.dumps({"rss_peak": (peak - before) * 1024, "rss_after": (after - before) * 1024}))
    sys.exit(0)
load(sys.argv[1], progress=False).n_snapshots  # warm imports and caches
tracemalloc.start()
base = tracemalloc.get_traced_memory()[0]
ens = load(sys.argv[1], progress=False)
current, peak = tracemalloc.get_traced_memory()
tracemalloc.stop()
raw = sum(getattr(ens, n).nbytes for n in ("geometries", "energies", *SNAPSHOT_ARRAYS,
          *TRAJECTORY_ARRAYS) if getattr(ens, n) is not None)
raw += int(ens.snapshots.memory_usage(index=False, deep=True).sum())
print(json.dumps({"raw": raw, "peak": peak - base, "retained": current - base}))
"""


def measure_memory(folder: Path) -> dict[str, float]:
    """Peak and retained heap bytes of one load, measured in a fresh interpreter."""
    out = subprocess.run([sys.executable, "-c", _MEMORY_SCRIPT, str(folder), "heap"],
                         capture_output=True, text=True, check=True)
    res = json.loads(out.stdout.strip().splitlines()[-1])
    res["peak_ratio"] = res["peak"] / res["raw"]
    res["retained_ratio"] = res["retained"] / res["raw"]
    try:
        out = subprocess.run([sys.executable, "-c", _MEMORY_SCRIPT, str(folder), "rss"],
                             capture_output=True, text=True, check=True)
        rss = json.loads(out.stdout.strip().splitlines()[-1])
        res["rss_peak_ratio"] = rss["rss_peak"] / res["raw"]
    except (subprocess.CalledProcessError, OSError, ValueError):  # no /proc: not Linux
        res["rss_peak_ratio"] = float("nan")
    return res


def run(*, n_traj: int, n_frames: int, n_atoms: int, compress: bool = False,
        repeat: int = 1, with_memory: bool = True) -> dict[str, float]:
    """Generate, measure and return the figures (also printed by :func:`main`)."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = make_folder(Path(tmp) / "ens", n_traj=n_traj, n_frames=n_frames,
                             n_atoms=n_atoms, compress=compress)
        ours, ours_cpu = time_ours(folder, repeat)
        ase_t, ase_cpu, frames = time_ase(folder, repeat)
        res = {"n_frames_total": frames, "ours_s": ours, "ase_s": ase_t,
               "ours_cpu_s": ours_cpu, "ase_cpu_s": ase_cpu,
               "speed_ratio": ase_t / ours, "cpu_ratio": ase_cpu / ours_cpu}
        if with_memory:
            res.update(measure_memory(folder))
    return res


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="small smoke run (20 x 100 x 12)")
    p.add_argument("--n-traj", type=int, default=200)
    p.add_argument("--n-frames", type=int, default=1000)
    p.add_argument("--n-atoms", type=int, default=12)
    p.add_argument("--gzip", action="store_true", help="write and read .xyz.gz files")
    p.add_argument("--repeat", type=int, default=1)
    args = p.parse_args(argv)
    if args.quick:
        args.n_traj, args.n_frames = 20, 100
    res = run(n_traj=args.n_traj, n_frames=args.n_frames, n_atoms=args.n_atoms,
              compress=args.gzip, repeat=args.repeat)
    print(f"extended-XYZ folder: {args.n_traj} trajectories x {args.n_frames} frames x "
          f"{args.n_atoms} atoms{' (gzip)' if args.gzip else ''}; "
          f"{res['n_frames_total']} frames read by both")
    print(f"  ensemblelab.io.load : {res['ours_s']:.3f} s wall, {res['ours_cpu_s']:.3f} s CPU")
    print(f"  ase.io.read(':')    : {res['ase_s']:.3f} s wall, {res['ase_cpu_s']:.3f} s CPU")
    print(f"  speed ratio, wall (ase / ours)    : {res['speed_ratio']:.1f}x   (goal >= 10)")
    print(f"  speed ratio, CPU  (ase / ours)    : {res['cpu_ratio']:.1f}x")
    print(f"  peak heap / raw array bytes       : {res['peak_ratio']:.2f}    (goal <= 1.5)")
    print(f"  retained heap / raw array bytes   : {res['retained_ratio']:.2f}")
    print(f"  peak RSS increase / raw bytes     : {res['rss_peak_ratio']:.2f}    (includes C "
          "buffers and allocator slack)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
