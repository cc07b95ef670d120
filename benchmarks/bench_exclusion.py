"""Explorer exclusions at scale: time and memory per excluded trajectory.

Usage::

    python benchmarks/bench_exclusion.py            # 1000 trajectories x 251 steps
    python benchmarks/bench_exclusion.py --quick    # small smoke run

An invented ensemble (``make_toy_ensemble`` with 11 atoms, plus invented velocities,
overlaps and cation ADT matrices so that every optional array a real ensemble carries
is there) is opened in an :class:`~ensemblelab.widgets.Explorer` (no clustering, no
flags) with a band selected. Then trajectories are excluded one at a time, as the
quality view's "exclude" button does.

Figures printed:

* exclusion -> map, band and populations recomputed, in ms (median over the
  exclusions; goal <= 500 ms at 1000 trajectories), end to end from the public
  ``SelectionModel.exclude`` with the debounced recomputations flushed;
* the same as a ratio to a peer measured in the same run: ``Ensemble.without`` of the
  same trajectories, the copy of every array the explorer made per exclusion before
  exclusions became a mask (the views now pass ``exclude=`` to the computations);
* resident memory (RSS) growth from the first exclusion to the last (goal: no growth
  beyond noise; the first exclusion allocates its working arrays once);
* time until the explorer is built with the map usable, clustering and trajectory flags
  running in the background as in a kernel (goal <= 5 s at 1000 trajectories), beside
  the peer: the same explorer built with them computed first (``background=False``),
  and how long the background jobs then took.
"""

from __future__ import annotations

import argparse
import dataclasses
import gc
import os
import statistics
import time
from typing import Any

import numpy as np


def _rss_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


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


def run(*, quick: bool = False, n_trajectories: int | None = None,
        n_exclusions: int | None = None) -> dict[str, float]:
    """Measure exclusions; returns the figures (see the module docstring)."""
    from ensemblelab.widgets import Explorer

    n_traj = n_trajectories or (40 if quick else 1000)
    n_ex = n_exclusions or (3 if quick else 8)
    ens = synthetic_ensemble(n_traj, t_max=60.0 if quick else 250.0)
    import pandas as pd

    no_flags = pd.DataFrame({"traj": [], "flagged": [], "reason": []})
    app = Explorer(ens, clusters=False, flags=no_flags, restore=False, debounce=0.0)
    app.brush((0.5, 1.5), (10.0, 50.0))
    ids = ens.trajectories["traj"].to_numpy()[:: max(1, n_traj // n_ex)][:n_ex]
    rss0 = 0.0
    times, peers = [], []
    for i, traj in enumerate(ids):
        start = time.perf_counter()
        app.model.exclude([int(traj)])
        app.map_view.flush()
        app.population_view._recompute_later.flush()
        times.append(time.perf_counter() - start)
        if i == 0:  # the first exclusion allocates its working arrays once
            gc.collect()
            rss0 = _rss_mb()
    gc.collect()
    growth = _rss_mb() - rss0
    for i in range(len(ids)):  # the peer, after the memory figure
        start = time.perf_counter()
        copy = ens.without(ids[: i + 1])
        peers.append(time.perf_counter() - start)
        del copy
    assert app.model.n_trajectories == n_traj - len(ids)
    exclusion_ms = 1e3 * statistics.median(times)
    peer_ms = 1e3 * statistics.median(peers)
    return {"n_trajectories": float(n_traj), "n_snapshots": float(ens.n_snapshots),
            "exclusion_ms": exclusion_ms, "without_ms": peer_ms,
            "ratio": exclusion_ms / peer_ms, "rss_growth_mb": growth,
            "n_exclusions": float(len(ids))}


def run_build(*, quick: bool = False, n_trajectories: int | None = None) -> dict[str, float]:
    """Time to a usable map with background jobs, and the synchronous build as the peer."""
    import asyncio

    from ensemblelab.widgets import Explorer

    n_traj = n_trajectories or (40 if quick else 1000)
    ens = synthetic_ensemble(n_traj, t_max=60.0 if quick else 250.0)

    async def build() -> Any:
        start = time.perf_counter()
        app = Explorer(ens, restore=False, debounce=0.0, background=True)
        usable = time.perf_counter() - start
        while not app.jobs.done.is_set():
            await asyncio.sleep(0.05)
        return app, usable, time.perf_counter() - start

    app, usable, total = asyncio.run(build())
    assert app.messages.errors == [], app.messages.errors
    start = time.perf_counter()
    Explorer(ens, restore=False, debounce=0.0, background=False)
    peer = time.perf_counter() - start
    return {"usable_s": usable, "all_done_s": total, "synchronous_s": peer,
            "ratio": usable / peer, **{f"job {k}": v for k, v in app.jobs.seconds.items()}}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small smoke run")
    parser.add_argument("--n-trajectories", type=int, default=None)
    args = parser.parse_args(argv)
    r = run(quick=args.quick, n_trajectories=args.n_trajectories)
    print(f"ensemble: {r['n_trajectories']:.0f} trajectories, {r['n_snapshots']:.0f} snapshots "
          "(invented)")
    print(f"exclusion -> map, band and populations updated: {r['exclusion_ms']:.0f} ms "
          f"(median of {r['n_exclusions']:.0f}; goal <= 500 ms at 1000 trajectories)")
    print(f"peer Ensemble.without (the old per-exclusion copy): {r['without_ms']:.0f} ms; "
          f"ratio exclusion / copy = {r['ratio']:.2f}")
    print(f"resident memory growth over exclusions 2-{r['n_exclusions']:.0f}: "
          f"{r['rss_growth_mb']:+.1f} MB")
    b = run_build(quick=args.quick, n_trajectories=args.n_trajectories)
    print(f"explorer built, map usable: {b['usable_s']:.1f} s (goal <= 5 s at 1000 "
          f"trajectories); clustering and flags done in the background at "
          f"{b['all_done_s']:.1f} s")
    print(f"peer: the same explorer with clustering and flags first: {b['synchronous_s']:.1f} s;"
          f" ratio usable / peer = {b['ratio']:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
