"""Benchmark: bootstrap intervals of a TRPES map against the map itself.

Prints, from one run on an invented ensemble with ~N (snapshot, channel) sticks (3
cation channels):

* one map, end to end (``compute_trpes``, the compiled fused path), the peer (best of
  two runs before and one after the bootstrap), and the same map keeping its sticks
  (``return_model=True``: the stick path the bootstrap needs, best of two);
* the same call with ``interval="bootstrap", n_boot=200`` (the map and its 200
  replicates), as a ratio to both (goal <= 3x one map), and the replicate work alone
  (beyond the map keeping its sticks);
* the kernel figure: the replicate deposit of all sticks for all resamples (in the
  bootstrap's time windows), in ns per stick and resample, and per resample against
  one ordinary deposit of the same sticks;
* the growth of the peak resident memory during the bootstrap call (the replicate
  histograms are chunked to :data:`._kernels_bootstrap.MEMORY_BUDGET`; the replicate
  maps, n_boot x n_delays x n_energies, are kept for the percentiles).

Usage: python benchmarks/bench_trpes_bootstrap.py [--quick] [--sticks 1e7] [--n-boot 200]
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import warnings

import numpy as np

from ensemblelab.compute.spectroscopy import _kernels_bootstrap as KBS
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.ensemble import Ensemble

N_DELAYS, N_ENERGIES = 151, 201


def make_ensemble(n_sticks: int, n_steps: int = 600, seed: int = 1) -> Ensemble:
    """Invented ensemble: 3 neutral states, 3 cation channels, one hop S2 -> S1."""
    n_channels = 3
    n_traj = max(2, n_sticks // (n_steps * n_channels))
    rng = np.random.default_rng(seed)
    n = n_traj * n_steps
    t = np.tile(np.arange(n_steps, dtype=float), n_traj)
    traj = np.repeat(np.arange(n_traj), n_steps)
    hop = rng.exponential(150.0, n_traj)
    active = np.where(t < hop[traj], 2, 1)
    en = np.zeros((n, 3))
    en[:, 1] = 3.0 + 0.2 * rng.standard_normal(n)
    en[:, 2] = 4.0 + 0.2 * rng.standard_normal(n)
    cat = 7.0 + np.array([0.0, 0.5, 1.0]) + 0.1 * rng.standard_normal((n, 3))
    dy = rng.uniform(0.2, 1.0, (n, n_channels))
    return Ensemble.from_arrays(traj=traj, time=t, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, copy=False,
                                metadata={"sampling": "doorway-selected"})


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="tiny sizes (smoke run)")
    ap.add_argument("--sticks", type=float, default=None)
    ap.add_argument("--n-boot", type=int, default=200)
    args = ap.parse_args(argv)
    n_sticks = int(args.sticks or (3e4 if args.quick else 1e7))
    ens = make_ensemble(n_sticks)
    kw = dict(probe=GaussianPulse(photon_energy=7.0, fwhm=30.0),
              pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
              kinetic_energies=np.linspace(0.0, 4.0, N_ENERGIES),
              delays=np.linspace(-100.0, 500.0, N_DELAYS), progress=False)
    warnings.simplefilter("ignore")
    small = make_ensemble(3000)
    compute_trpes(small, **kw)  # compile / cache load: the fused map ...
    compute_trpes(small, interval="bootstrap", n_boot=4, **kw)  # ... and the bootstrap
    t_ones, t_sticks = [], []
    for _ in range(2):  # the peers: best of the runs before and after (machines drift)
        t0 = time.perf_counter()
        compute_trpes(ens, **kw)
        t_ones.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        m, model = compute_trpes(ens, return_model=True, **kw)
        t_sticks.append(time.perf_counter() - t0)
    rss0 = _rss_mb()
    t0 = time.perf_counter()
    mb = compute_trpes(ens, interval="bootstrap", n_boot=args.n_boot, random_state=0, **kw)
    t_boot = time.perf_counter() - t0
    rss1 = _rss_mb()
    t0 = time.perf_counter()
    compute_trpes(ens, **kw)
    t_ones.append(time.perf_counter() - t0)
    t_one, t_stick = min(t_ones), min(t_sticks)
    # kernel figure: the replicate deposit of all sticks for all resamples, in the time
    # windows of the bootstrap, per stick and resample
    s = model.sticks
    assert s is not None and model.tbin is not None
    e_lo, h, n_fine = model.moment_grid(model.fwhm())
    src = np.searchsorted(ens.trajectories["traj"].to_numpy(), s.traj).astype(np.int32)
    n_rep, n_sub, _ = KBS.stream_plan(args.n_boot, model.n_time,
                                      8 * model.order * n_fine, 8 * N_ENERGIES)
    rw = KBS.bootstrap_counts(ens.n_trajectories, n_rep, np.random.default_rng(0)).T.copy()
    grid = {"e_lo": e_lo, "h": h, "n_time": model.n_time, "tfrac": model.tfrac}
    t0 = time.perf_counter()
    cells = KBS.sort_cells(model.tbin, s.energy, s.weight, src, n_fine=n_fine, **grid)
    t_sort = time.perf_counter() - t0
    acc = np.zeros((1, n_sub, n_fine, model.order, n_rep))
    t_dep = 0.0
    for w0 in range(0, model.n_time, n_sub):
        part = acc[:, :min(n_sub, model.n_time - w0)]
        part[...] = 0.0
        t0 = time.perf_counter()
        KBS.deposit_replicates(part, model.tbin, s.energy, s.weight, src, rw, t0=w0,
                               cells=cells, **grid)
        t_dep += time.perf_counter() - t0
    t0 = time.perf_counter()
    KD.deposit_moments(model.tbin, s.energy, s.weight, n_time=model.n_time, e_lo=e_lo, h=h,
                       n_fine=n_fine, order=model.order, tfrac=model.tfrac)
    t_one_dep = time.perf_counter() - t0
    pairs = s.n_sticks * n_rep
    print(f"TRPES map bootstrap benchmark: {s.n_sticks:.2e} sticks, "
          f"{ens.n_trajectories} trajectories, map {N_DELAYS} x {N_ENERGIES}, "
          f"{args.n_boot} resamples (deposit backend "
          f"{'numba' if KD.numba_available() else 'numpy'}, {KD.usable_cores()} cores)")
    print(f"  one map (peer, fused path, best of 3)     : {t_one:.2f} s "
          f"(runs {', '.join(f'{t:.2f}' for t in t_ones)} s)")
    print(f"  one map keeping its sticks (best of 2)    : {t_stick:.2f} s "
          f"(runs {', '.join(f'{t:.2f}' for t in t_sticks)} s)")
    print(f"  map + {args.n_boot} bootstrap replicates          : {t_boot:.2f} s = "
          f"{t_boot / t_one:.1f}x one map (goal <= 3x); "
          f"{t_boot / t_stick:.2f}x the map keeping its sticks")
    print(f"  replicate work alone                      : {t_boot - t_stick:.2f} s = "
          f"{(t_boot - t_stick) / t_one:.1f}x one map")
    print(f"  kernel: replicate deposit {t_dep:.2f} s for {pairs:.2e} (stick, resample) "
          f"pairs = {t_dep / pairs * 1e9:.3f} ns per stick and resample (wall, "
          f"{KD.usable_cores()} threads) "
          f"({t_dep / n_rep * 1e3:.1f} ms per resample vs one deposit "
          f"{t_one_dep * 1e3:.1f} ms: {t_dep / n_rep / t_one_dep:.2f}x; "
          f"cell sort {t_sort:.2f} s once)")
    print(f"  peak resident memory growth               : {rss1 - rss0:.0f} MB (budget for "
          f"the replicate histograms {KBS.MEMORY_BUDGET / 2**20:.0f} MB; replicate maps "
          f"{args.n_boot * N_DELAYS * N_ENERGIES * 8 / 2**20:.0f} MB)")
    print(f"  median relative standard error (pixels > 5% of peak): "
          f"{mb.median_rel_se():.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
