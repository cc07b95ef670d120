"""Explorer kernel memory at scale: resident and traced memory over the ensemble's size.

Usage::

    python benchmarks/bench_explorer_memory.py                  # 1000 trajectories x 251 steps
    python benchmarks/bench_explorer_memory.py --quick          # small smoke run
    python benchmarks/bench_explorer_memory.py --compare OTHER  # also an older source tree

An invented ensemble (``make_toy_ensemble`` with 11 atoms, plus invented velocities,
overlaps and cation ADT matrices, as in ``bench_exclusion.py``) is saved as a native
store and, in a fresh Python process, loaded with ``ensemblelab.io.load`` as a user
would and opened in an :class:`~ensemblelab.widgets.Explorer` inside a running event
loop: the map is shown at once, clustering and trajectory flags run in the background
and are waited for. Before the clock starts, the same process builds an explorer on a
6-trajectory ensemble, so that imports and compiled kernels are not counted.

Figures printed (memory above the process's state before the load, in MB, and as a
ratio to the peer: the loaded ensemble's array size, ``nbytes`` of its arrays and
tables):

* resident memory (RSS, psutil) after the load, after the map is shown and after the
  background jobs finished;
* in a second fresh process with ``tracemalloc`` on: memory traced (held by Python
  and numpy) after the background jobs, and the traced peak over load and build.

The goal is a kernel holding a small multiple (<= 2x) of the ensemble's arrays.
``--compare PATH`` measures a second source tree (for example an older checkout
exported with ``git archive``) in the same run, printed beside the current one.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def synthetic_ensemble(n_trajectories: int, *, t_max: float = 250.0, seed: int = 0) -> Any:
    """An invented ensemble with every optional per-snapshot array filled."""
    from ensemblelab.testing import make_toy_ensemble

    ens = make_toy_ensemble(n_trajectories, seed=seed, t_max=t_max, n_atoms=11)
    rng = np.random.default_rng(seed)
    n, k = ens.n_snapshots, ens.n_states
    overlaps = np.broadcast_to(np.eye(k), (n, k, k)).copy()
    adt_cation = np.broadcast_to(np.eye(ens.n_cation), (n, ens.n_cation, ens.n_cation)).copy()
    return dataclasses.replace(ens, velocities=rng.normal(0, 1e-3, ens.geometries.shape),
                               overlaps=overlaps, adt_cation=adt_cation)


def ensemble_nbytes(ens: Any) -> int:
    """Bytes of the ensemble's arrays plus its snapshot and trajectory tables."""
    total = 0
    for value in vars(ens).values():
        if isinstance(value, np.ndarray):
            total += value.nbytes
        elif hasattr(value, "memory_usage"):
            total += int(value.memory_usage(deep=True).sum())
    return total


def _child(store: str, traced: bool) -> dict[str, float]:
    """In a fresh process: load the store, build the explorer, wait for its jobs."""
    import asyncio
    import gc
    import tracemalloc

    import psutil

    from ensemblelab.io import load
    from ensemblelab.widgets import Explorer

    proc = psutil.Process()

    async def build(ens: Any) -> tuple[Any, float]:
        app = Explorer(ens, restore=False, debounce=0.0, background=True)
        shown = proc.memory_info().rss
        while not app.jobs.done.is_set():
            await asyncio.sleep(0.05)
        return app, shown

    asyncio.run(build(synthetic_ensemble(6, t_max=40.0)))  # imports, compiled kernels
    gc.collect()
    if traced:
        tracemalloc.start(1)
    base = proc.memory_info().rss
    base_traced = tracemalloc.get_traced_memory()[0] if traced else 0
    ens = load(store)
    gc.collect()
    loaded = proc.memory_info().rss
    app, shown = asyncio.run(build(ens))
    gc.collect()
    done = proc.memory_info().rss
    out = {"nbytes": float(ensemble_nbytes(ens)), "n_snapshots": float(ens.n_snapshots),
           "rss_loaded": float(loaded - base), "rss_shown": float(shown - base),
           "rss_done": float(done - base), "errors": float(len(app.messages.errors))}
    if traced:
        current, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        out.update(traced_done=float(current - base_traced), traced_peak=float(peak - base_traced))
    return out


def measure(store: Path, source_root: Path) -> dict[str, float]:
    """RSS figures from one fresh process and tracemalloc figures from another."""
    env = {**os.environ, "PYTHONPATH": str(source_root)}
    result: dict[str, float] = {}
    for traced in (False, True):
        run = subprocess.run(
            [sys.executable, __file__, "--child", str(store)] + (["--traced"] if traced else []),
            env=env, capture_output=True, text=True, check=False)
        if run.returncode != 0:
            raise RuntimeError(f"the measuring process failed:\n{run.stderr[-3000:]}")
        result.update(json.loads(run.stdout.strip().splitlines()[-1]))
    return result


def _print(label: str, r: dict[str, float]) -> None:
    mb, nb = 2.0**20, r["nbytes"]
    print(f"[{label}] ensemble arrays and tables: {nb / mb:.0f} MB ({r['n_snapshots']:.0f} "
          "snapshots)")
    for key, what in (("rss_loaded", "RSS after the load"),
                      ("rss_shown", "RSS with the map shown"),
                      ("rss_done", "RSS after clustering and flags"),
                      ("traced_done", "traced after clustering and flags"),
                      ("traced_peak", "traced peak over load and build")):
        print(f"[{label}]   {what}: {r[key] / mb:.0f} MB, ratio to the ensemble "
              f"{r[key] / nb:.2f}")
    if r["errors"]:
        print(f"[{label}]   the explorer reported {r['errors']:.0f} error(s)")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small smoke run")
    parser.add_argument("--n-trajectories", type=int, default=None)
    parser.add_argument("--compare", type=Path, default=None,
                        help="another source tree measured in the same run")
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--traced", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        print(json.dumps(_child(args.child, args.traced)))
        return 0
    from ensemblelab.io.store import save_store

    n_traj = args.n_trajectories or (30 if args.quick else 1000)
    with tempfile.TemporaryDirectory() as tmp:
        store = save_store(synthetic_ensemble(n_traj, t_max=60.0 if args.quick else 250.0),
                           Path(tmp) / "ensemble")
        size = sum(f.stat().st_size for f in Path(store).rglob("*") if f.is_file())
        print(f"invented ensemble: {n_traj} trajectories; store on disk {size / 2**20:.0f} MB")
        _print("current", measure(store, ROOT))
        if args.compare is not None:
            _print(str(args.compare), measure(store, args.compare.resolve()))
    print("goal: kernel memory <= 2x the ensemble's arrays")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
