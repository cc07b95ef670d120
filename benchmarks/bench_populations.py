"""Benchmark: bootstrap populations and a two-lifetime fit with bootstrap refits.

Goal (issue): 1000 trajectories x 2000 steps, 1000 resamples, under 10 s on 2 cores.

Prints absolute times (noisy: shared machine) and, as the figure to compare,
the ratio against the straightforward loop measured in the same run:

* populations: the naive twin ``bootstrap_populations_loop`` (one resample at a
  time, one trajectory at a time), timed on ``n_loop`` resamples and scaled
  linearly to ``n_boot`` (said so in the output);
* refits: one ``scipy.optimize.least_squares`` per resample, timed on ``n_loop``
  resamples and scaled the same way.

Usage: ``python benchmarks/bench_populations.py [--quick]``. The invented
ensemble (A -> B -> C with tau1 = 50 fs, tau2 = 200 fs) is built here.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from ensemblelab.compute.kinetics import _kernels_populations as K
from ensemblelab.compute.kinetics import _reference_populations as R
from ensemblelab.compute.kinetics.populations import population_arrays, populations
from ensemblelab.compute.kinetics.rates import fit_kinetics
from ensemblelab.data.ensemble import Ensemble


def make_ensemble(n_traj: int, n_steps: int, *, dt: float = 0.5, seed: int = 0) -> Ensemble:
    """Invented three-state ensemble: S2 -> S1 (tau 50 fs) -> S0 (tau 200 fs)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_steps) * dt
    hop1 = rng.exponential(50.0, n_traj)
    hop2 = hop1 + rng.exponential(200.0, n_traj)
    traj = np.repeat(np.arange(n_traj), n_steps)
    time_ = np.tile(t, n_traj)
    active = np.where(time_ < hop1[traj], 2, np.where(time_ < hop2[traj], 1, 0))
    n = traj.size
    return Ensemble.from_arrays(traj=traj, time=time_, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"],
                                energies=np.zeros((n, 3)), copy=False)


def run(n_traj: int = 1000, n_steps: int = 2000, n_boot: int = 1000, n_loop: int = 10,
        verbose: bool = False) -> dict[str, float]:
    """Run the benchmark and return its figures (seconds and ratios)."""
    ens = make_ensemble(n_traj, n_steps)
    out: dict[str, float] = {}

    t0 = time.perf_counter()
    populations(ens, interval="bootstrap", n_boot=n_boot, random_state=0)
    out["populations_bootstrap_s"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    res = fit_kinetics(ens, scheme="sequential", states=(2, 1, 0), interval="bootstrap",
                       n_boot=n_boot,
                       random_state=0)
    out["fit_with_bootstrap_s"] = time.perf_counter() - t0
    out["fit_tau1"], out["fit_tau2"] = res.params["tau1"], res.params["tau2"]
    out["n_failed"] = res.n_failed

    # same resamples: vectorised kernel vs the naive loop on a subset
    arrays = population_arrays(ens)
    rng = np.random.default_rng(1)
    idx = rng.integers(0, n_traj, size=(n_loop, n_traj))
    counts = np.stack([np.bincount(i, minlength=n_traj) for i in idx]).astype(float)
    t0 = time.perf_counter()
    fast = K.bootstrap_populations(arrays.values, arrays.alive, arrays.weights, counts)
    t_fast_sub = time.perf_counter() - t0
    t0 = time.perf_counter()
    slow = R.bootstrap_populations_loop(arrays.values, arrays.alive, arrays.weights, idx)
    t_loop_sub = time.perf_counter() - t0
    out["max_abs_diff"] = float(np.nanmax(np.abs(fast - slow)))
    out["loop_populations_scaled_s"] = t_loop_sub * n_boot / n_loop
    out["vectorised_subset_s"] = t_fast_sub

    prob = res._problem
    boot = arrays.bootstrap(counts)[:, :, [2, 1, 0]]
    y = np.transpose(boot, (0, 2, 1)).reshape(n_loop, -1)
    x0 = np.tile(prob.to_free(res.params), (n_loop, 1))
    t0 = time.perf_counter()
    R.refit_loop(prob, x0, y)
    out["loop_refits_scaled_s"] = (time.perf_counter() - t0) * n_boot / n_loop
    loop_total = out["loop_populations_scaled_s"] + out["loop_refits_scaled_s"]
    out["ratio_loop_over_vectorised"] = loop_total / out["fit_with_bootstrap_s"]
    out["ratio_populations"] = out["loop_populations_scaled_s"] / out["populations_bootstrap_s"]
    if verbose:
        print(f"ensemble: {n_traj} trajectories x {n_steps} steps, {n_boot} resamples")
        print(f"populations(interval='bootstrap')         {out['populations_bootstrap_s']:.2f} s")
        print(f"fit_kinetics(sequential, bootstrap refits) {out['fit_with_bootstrap_s']:.2f} s "
              f"(tau1 {out['fit_tau1']:.1f} fs, tau2 {out['fit_tau2']:.1f} fs, "
              f"{int(out['n_failed'])} failed refits)")
        print(f"straightforward loop, timed on {n_loop} resamples and scaled x{n_boot / n_loop:g}:"
              f" populations {out['loop_populations_scaled_s']:.2f} s + refits "
              f"{out['loop_refits_scaled_s']:.2f} s")
        print(f"ratio loop / vectorised, populations bootstrap: {out['ratio_populations']:.1f}")
        print(f"ratio loop / vectorised (bootstrap + fit): {out['ratio_loop_over_vectorised']:.1f}")
        print(f"vectorised vs loop, same resamples: max |diff| = {out['max_abs_diff']:.1e}")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="tiny smoke run")
    args = parser.parse_args()
    if args.quick:
        run(n_traj=100, n_steps=200, n_boot=100, n_loop=5, verbose=True)
    else:
        run(verbose=True)


if __name__ == "__main__":
    main()
