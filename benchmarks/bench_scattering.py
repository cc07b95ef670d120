"""Benchmark: the Debye scattering kernel against a straightforward numpy pair loop.

Workload: 10^5 snapshots x 12 atoms (C6H6-like, 66 pairs) x 500 q points. Timed in the
same run:

* kernel: :func:`molecular_intensity` (numba backend when installed) on all snapshots,
  in blocks of 4096 (as :func:`compute_scattering` calls it);
* peer: a straightforward numpy loop over the 66 atom pairs, vectorised over snapshots
  and q (``np.sinc``), on a subset of the snapshots and scaled per snapshot;
* end to end: :func:`ensemblelab.compute_scattering` on an ensemble of 1000 trajectories
  x 100 snapshots (same geometries), pump-probe convolution and state decomposition on.

Absolute timings are noisy on shared machines; the ratio is measured in the same run.

Usage::

    python benchmarks/bench_scattering.py            # 10^5 snapshots
    python benchmarks/bench_scattering.py --quick    # smoke run (10^4)
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from ensemblelab import Ensemble, GaussianPulse, compute_scattering
from ensemblelab.compute.observables._kernels_scattering import (
    molecular_intensity,
    numba_available,
)
from ensemblelab.compute.observables.form_factors import form_factor_table


def geometries(n: int, seed: int = 0) -> np.ndarray:
    """A benzene-like ring (C 1.40 A, H 2.48 A from the centre) with thermal noise."""
    ang = np.arange(6) * math.pi / 3
    ring = np.c_[np.cos(ang), np.sin(ang), np.zeros(6)]
    base = np.vstack([1.40 * ring, 2.48 * ring])
    rng = np.random.default_rng(seed)
    return base[None] + rng.normal(scale=0.06, size=(n, 12, 3))


def numpy_pair_loop(g: np.ndarray, fa: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Peer: loop over atom pairs, vectorised over snapshots and q."""
    out = np.zeros((g.shape[0], q.size))
    for a in range(g.shape[1]):
        for b in range(a + 1, g.shape[1]):
            r = np.linalg.norm(g[:, a] - g[:, b], axis=1)
            out += 2.0 * (fa[a] * fa[b])[None, :] * np.sinc(r[:, None] * q[None, :] / math.pi)
    return out


def run_benchmark(n: int = 100_000, n_q: int = 500, n_peer: int = 5_000) -> dict[str, float]:
    """Time kernel, peer and end-to-end; returns the figures."""
    symbols = ["C"] * 6 + ["H"] * 6
    q = np.linspace(0.1, 12.0, n_q)
    _, index, table = form_factor_table(symbols, q)
    g = geometries(n)
    molecular_intensity(g[:8], index, table, q)  # compile outside the timing
    t0 = time.perf_counter()
    for s0 in range(0, n, 4096):
        last = molecular_intensity(g[s0:s0 + 4096], index, table, q)
    t_kernel = time.perf_counter() - t0
    sub = g[:n_peer]
    t0 = time.perf_counter()
    peer = numpy_pair_loop(sub, table[index], q)
    t_peer_sub = time.perf_counter() - t0
    t_peer = t_peer_sub / n_peer * n
    check = molecular_intensity(sub, index, table, q)
    err = float(np.max(np.abs(check - peer)) / np.max(np.abs(peer)))
    del last
    n_traj, n_steps = max(1, n // 100), 100
    ens = Ensemble.from_arrays(
        traj=np.repeat(np.arange(n_traj), n_steps), time=np.tile(np.arange(n_steps) * 1.0,
                                                                  n_traj),
        active=np.ones(n_traj * n_steps, dtype=int), geometries=g[:n_traj * n_steps],
        symbols=symbols, energies=np.zeros((n_traj * n_steps, 2)))
    t0 = time.perf_counter()
    compute_scattering(ens, q=q, delays=np.arange(-50.0, 100.0, 5.0),
                       pump=GaussianPulse(photon_energy=5.0, fwhm=30.0),
                       probe=GaussianPulse(photon_energy=9000.0, fwhm=30.0))
    t_e2e = time.perf_counter() - t0
    return {"snapshots": n, "atoms": 12, "n_q": n_q, "numba": numba_available(),
            "kernel_s": t_kernel, "peer_subset_s": t_peer_sub, "peer_subset_n": n_peer,
            "peer_scaled_s": t_peer, "speedup": t_peer / t_kernel,
            "max_rel_difference": err, "end_to_end_s": t_e2e}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10^4 snapshots")
    args = parser.parse_args()
    res = run_benchmark(10_000, n_peer=1_000) if args.quick else run_benchmark()
    print(f"Debye scattering: {res['snapshots']} snapshots x {res['atoms']} atoms x "
          f"{res['n_q']} q (numba: {res['numba']})")
    print(f"  kernel                 {res['kernel_s']:8.2f} s")
    print(f"  numpy pair loop        {res['peer_scaled_s']:8.2f} s (scaled from "
          f"{res['peer_subset_n']} snapshots: {res['peer_subset_s']:.2f} s)")
    print(f"  ratio (loop / kernel)  {res['speedup']:8.1f} x   (max rel. difference "
          f"{res['max_rel_difference']:.1e})")
    print(f"  end to end compute_scattering on the same snapshots: {res['end_to_end_s']:.2f} s")


if __name__ == "__main__":
    main()
