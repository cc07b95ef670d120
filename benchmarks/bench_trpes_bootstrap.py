"""Benchmark: bootstrap intervals of a TRPES map against the map itself.

Prints, from one run on an invented ensemble with ~N (snapshot, channel) sticks (3
cation channels):

* one map, end to end (``compute_trpes``, the compiled fused path): the peer (best of
  the interleaved rounds, ``--rounds``: each round times one map, then the bootstrap);
* the same call with ``interval="bootstrap", n_boot=200`` (the map and its 200
  replicates, default precision: the fused replicate pass, 3 moments in float32,
  recentred on the map), as a ratio to the peer (goal <= 3x), best of the rounds; the fused
  replicate pass's own time in ns per (stick, resample) (the kernel figure);
* the same with exact replicates (the map's 8 moments, float64) and by the stick route
  (the sorted-stick replicate deposit), and how far the default's interval endpoints
  are from the exact ones (fraction of the widest half-width);
* the growth of the peak resident memory during the default call.

Usage: python benchmarks/bench_trpes_bootstrap.py [--quick] [--sticks 1e7] [--n-boot 200]
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import warnings

import numpy as np

from ensemblelab.compute.spectroscopy import _kernels_boot_fused as KBF
from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import bootstrap_fused as BF
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
    ap.add_argument("--rounds", type=int, default=4, help="interleaved timing rounds")
    args = ap.parse_args(argv)
    n_sticks = int(args.sticks or (3e4 if args.quick else 1e7))
    ens = make_ensemble(n_sticks)
    kw = dict(probe=GaussianPulse(photon_energy=7.0, fwhm=30.0),
              pump=GaussianPulse(photon_energy=4.0, fwhm=30.0),
              kinetic_energies=np.linspace(0.0, 4.0, N_ENERGIES),
              delays=np.linspace(-100.0, 500.0, N_DELAYS), progress=False)
    boot = dict(interval="bootstrap", n_boot=args.n_boot, random_state=0, **kw)
    warnings.simplefilter("ignore")
    small = make_ensemble(3000)
    compute_trpes(small, **kw)  # compile / cache load: the fused map ...
    for grid in (BF.FAST, BF.EXACT):  # ... and both precisions of the fused bootstrap
        BF.DEFAULT_GRID = grid
        compute_trpes(small, interval="bootstrap", n_boot=4, **kw)
    BF.DEFAULT_GRID = BF.FAST
    # the kernel's share of the default call: the fused replicate pass, timed inside
    kernel_t: list[float] = []
    inner = KBF.fused_replicates

    def timed(*a, **k):
        t0 = time.perf_counter()
        out = inner(*a, **k)
        kernel_t.append(time.perf_counter() - t0)
        return out

    BF.KBF.fused_replicates = timed  # type: ignore[assignment]
    rss0 = _rss_mb()
    t_ones: list[float] = []
    t_boots: list[float] = []
    t_kernels: list[float] = []
    for _ in range(args.rounds):  # interleaved rounds (this machine's speed drifts)
        t0 = time.perf_counter()
        compute_trpes(ens, **kw)
        t_ones.append(time.perf_counter() - t0)
        kernel_t.clear()
        t0 = time.perf_counter()
        mb = compute_trpes(ens, **boot)
        t_boots.append(time.perf_counter() - t0)
        t_kernels.append(sum(kernel_t))
    rss1 = _rss_mb()
    BF.KBF.fused_replicates = inner  # type: ignore[assignment]
    BF.DEFAULT_GRID = BF.EXACT
    t0 = time.perf_counter()
    me = compute_trpes(ens, **boot)
    t_exact = time.perf_counter() - t0
    BF.DEFAULT_GRID = None  # the stick route (sorted sticks, replicate deposit)
    t0 = time.perf_counter()
    compute_trpes(ens, **boot)
    t_stick = time.perf_counter() - t0
    BF.DEFAULT_GRID = BF.FAST
    t_one, t_boot = min(t_ones), min(t_boots)
    half = 0.5 * float(np.max(me.upper - me.lower))
    d_lo = float(np.max(np.abs(mb.lower - me.lower))) / half
    d_hi = float(np.max(np.abs(mb.upper - me.upper))) / half
    pairs = n_sticks * (args.n_boot + 1)
    t_k = t_kernels[int(np.argmin(t_boots))]  # the kernel of the best default run
    print(f"TRPES map bootstrap benchmark: ~{n_sticks:.2e} sticks, "
          f"{ens.n_trajectories} trajectories, map {N_DELAYS} x {N_ENERGIES}, "
          f"{args.n_boot} resamples (numba {'yes' if KD.numba_available() else 'no'}, "
          f"{KD.usable_cores()} cores)")
    print(f"  one map (peer, fused path, best of {args.rounds})     : {t_one:.3f} s "
          f"(runs {', '.join(f'{t:.3f}' for t in t_ones)} s)")
    print(f"  map + {args.n_boot} replicates, default (best of {args.rounds}): {t_boot:.3f} s = "
          f"{t_boot / t_one:.1f}x one map (goal <= 3x) "
          f"(runs {', '.join(f'{t:.3f}' for t in t_boots)} s)")
    print(f"  of which the fused replicate pass (that run): {t_k:.3f} s = "
          f"{t_k / pairs * 1e9:.3f} ns per (stick, resample) (wall, "
          f"{KD.usable_cores()} threads; {BF.FAST.order} moments, {BF.FAST.dtype})")
    print(f"  same, exact replicates (8 moments, f64)   : {t_exact:.3f} s = "
          f"{t_exact / t_one:.1f}x one map; default vs exact endpoints: "
          f"{100 * d_lo:.2f} % / {100 * d_hi:.2f} % of the widest half-width")
    print(f"  same, stick route (sorted sticks)         : {t_stick:.3f} s = "
          f"{t_stick / t_one:.1f}x one map; the default is {t_stick / t_boot:.1f}x faster")
    print(f"  peak resident memory growth (default)     : {rss1 - rss0:.0f} MB (replicate "
          f"maps {args.n_boot * N_DELAYS * N_ENERGIES * 4 / 2**20:.0f} MB in float32)")
    print(f"  median relative standard error (pixels > 5% of peak): "
          f"{mb.median_rel_se():.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
