"""Benchmark: fitting the simulated map to a measured one (fit_measured_map).

Prints ratios against a peer measured in the same run (absolute timings are noisy):

* the whole fit (per-channel ionisation shifts, time zero, cross-correlation, background,
  scale, covariance intervals), end to end from the public function, in units of one
  ``compute_trpes`` of the same ensemble on the same measured grid (the peer: what one
  trial of a fit that recomputed the map for every parameter change would cost);
* the number of simulations the fit ran, and the cost of one of them against the peer;
* with ``--bootstrap N``: N bootstrap refits over trajectories, per refit, in peer units.

The ensemble is invented (the demo engine, seed 7, faults off); the "measurement" is its
own map with planted shifts (+0.2, -0.1, 0 eV), time zero 12 fs and 2 % noise.

Usage: python benchmarks/bench_fit_measured.py [--quick] [--n-traj N] [--bootstrap N]
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np

from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes, fit_measured_map
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.demo import make_ensemble
from ensemblelab.demo.scenario import DEFAULT_SCENARIO as SC


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small ensemble, smoke run")
    ap.add_argument("--n-traj", type=int, default=72)
    ap.add_argument("--bootstrap", type=int, default=0)
    args = ap.parse_args()
    n_traj = 12 if args.quick else args.n_traj
    ens = make_ensemble(n_traj, seed=7, faults=False, t_max=300.0 if args.quick else 500.0,
                        velocities=False)
    probe = GaussianPulse(photon_energy=SC.probe_energy, fwhm=SC.probe_fwhm)
    pump = GaussianPulse(photon_energy=SC.pump_energy, fwhm=SC.pump_fwhm)
    e = np.linspace(0.0, 3.0, 61)
    d = np.arange(-100.0, 301.0, 8.0)
    warnings.simplefilter("ignore")
    planted = ens.replace(cation_energies=ens.cation_energies + np.array([0.2, -0.1, 0.0]))
    m = compute_trpes(planted, probe=probe, pump=pump, kinetic_energies=e, delays=d - 12.0,
                      resolution=0.08, progress=False)
    sigma = 0.02 * float(m.intensity.max())
    noisy = m.intensity + sigma * np.random.default_rng(3).standard_normal(m.shape)
    meas = TRPESMap(kinetic_energies=e, delays=d, intensity=noisy,
                    uncertainty=np.full(m.shape, sigma))

    def peer() -> None:
        compute_trpes(ens, probe=probe, pump=pump, kinetic_energies=e, delays=d,
                      resolution=0.08, progress=False)

    peer()  # warm-up (numba compilation when installed)
    t_peer = min(_timed(peer) for _ in range(3))
    t0 = time.perf_counter()
    res = fit_measured_map(ens, meas, probe=probe, pump=pump, resolution=0.08, progress=False)
    t_fit = time.perf_counter() - t0
    print(f"ensemble: {ens.n_trajectories} trajectories, {ens.n_snapshots} snapshots, "
          f"{ens.n_cation} cation channels; map {m.shape[0]} x {m.shape[1]}")
    print(f"peer compute_trpes: {t_peer * 1e3:.1f} ms")
    print(f"fit_measured_map: {t_fit / t_peer:.1f} x peer ({res.n_simulations} simulations, "
          f"{t_fit / max(res.n_simulations, 1) / t_peer:.2f} x peer per simulation)")
    print(f"recovered shifts {np.round(res.ionisation_shifts, 4).tolist()} eV (planted "
          f"[0.2, -0.1, 0.0]), t0 {res.time_zero:.2f} fs (planted 12)")
    if args.bootstrap:
        t0 = time.perf_counter()
        fit_measured_map(ens, meas, probe=probe, pump=pump, resolution=0.08, progress=False,
                         interval="bootstrap", n_boot=args.bootstrap)
        t_boot = time.perf_counter() - t0 - t_fit
        print(f"bootstrap: {t_boot / args.bootstrap / t_peer:.1f} x peer per refit")


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


if __name__ == "__main__":
    main()
