"""Band-share intervals on the demo: do they fit the 150 ms brush budget?

Usage::

    python benchmarks/bench_uncertainty.py            # demo ensemble
    python benchmarks/bench_uncertainty.py --quick    # small invented ensemble

Figures printed (medians over the boxes of ``bench_explorer``), all measured in this run:

* ``band_share_table`` (grouped shares with 1000-resample trajectory-bootstrap intervals,
  by state and by trajectory), end to end from the public function, in ms;
* the same as a ratio to two peers: the band's plain ``group_table`` (no interval) and the
  brush's compute floor ``analyse_band`` (per-snapshot band intensities);
* the kernel alone (per-trajectory partial sums times the resampling matrix) against its
  naive twin, a Python loop over the resamples (``_reference_resample``), as a ratio.
"""

from __future__ import annotations

import argparse
import statistics
import time
from typing import Any

import numpy as np

BOXES = [((0.10, 0.45), (0.10, 0.50)), ((0.30, 0.70), (0.30, 0.80)),
         ((0.05, 0.95), (0.05, 0.95)), ((0.50, 0.60), (0.60, 0.90)),
         ((0.20, 0.40), (0.40, 0.60))]


def _ms(fn: Any, repeats: int = 3) -> float:
    best = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best.append(1e3 * (time.perf_counter() - t0))
    return min(best)


def run(*, quick: bool) -> dict[str, float]:
    from ensemblelab.compute.bands import analyse_band
    from ensemblelab.compute.spectroscopy import GaussianPulse, compute_trpes
    from ensemblelab.compute.uncertainty import band_share_table
    from ensemblelab.compute.uncertainty._kernels_resample import ratio_replicates
    from ensemblelab.compute.uncertainty._reference_resample import ratio_replicates_loop
    from ensemblelab.compute.uncertainty.shares import bootstrap_counts_for

    if quick:
        from ensemblelab.testing import make_toy_ensemble

        ens = make_toy_ensemble(30, t_max=150.0, dt=2.0)
        probe, pump = GaussianPulse(photon_energy=5.0, fwhm=30.0), None
    else:
        from ensemblelab.cli._explore import default_data_path
        from ensemblelab.io import load

        ens = load(default_data_path(), nonfinite="keep", progress=False)
        meta = ens.metadata
        probe = GaussianPulse(**meta["suggested_probe"])
        pump = GaussianPulse(**meta["suggested_pump"])
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m, model = compute_trpes(ens, probe=probe, pump=pump,
                                 kinetic_energies=np.linspace(0, probe.photon_energy, 241),
                                 delays=np.linspace(-60.0, float(ens.times.max()), 161),
                                 progress=False, return_model=True)
    e, d = m.kinetic_energies, m.delays
    shares, plain, floor = [], [], []
    for (fe0, fe1), (fd0, fd1) in BOXES:
        e_rng = (e[0] + fe0 * (e[-1] - e[0]), e[0] + fe1 * (e[-1] - e[0]))
        d_rng = (d[0] + fd0 * (d[-1] - d[0]), d[0] + fd1 * (d[-1] - d[0]))
        t0 = time.perf_counter()
        band = analyse_band(ens, m, energy_range=e_rng, delay_range=d_rng, model=model)
        floor.append(1e3 * (time.perf_counter() - t0))
        if band.total <= 0:
            continue
        plain.append(_ms(lambda b=band: (b.group_table("state"), b.group_table("traj"))))
        shares.append(_ms(lambda b=band: (band_share_table(b, "state"),
                                          band_share_table(b, "traj"))))
    n_traj = ens.n_trajectories
    rng = np.random.default_rng(0)
    numer = rng.uniform(size=(n_traj, 4))
    denom = numer.sum(axis=1)
    counts = np.asarray(bootstrap_counts_for(n_traj, 1000, 0))
    kernel = _ms(lambda: ratio_replicates(numer, denom, counts))
    naive = _ms(lambda: ratio_replicates_loop(numer, denom, counts), repeats=1)
    return {"n_trajectories": n_traj, "n_snapshots": ens.n_snapshots,
            "shares_ms": statistics.median(shares), "group_table_ms": statistics.median(plain),
            "analyse_band_ms": statistics.median(floor), "kernel_ms": kernel,
            "naive_ms": naive}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small smoke run")
    args = parser.parse_args(argv)
    r = run(quick=args.quick)
    print(f"{'toy' if args.quick else 'demo'} ({r['n_trajectories']} trajectories, "
          f"{r['n_snapshots']} snapshots), 1000 resamples, by state + by trajectory:")
    print(f"  band_share_table {r['shares_ms']:.1f} ms (budget 150 ms per brush); "
          f"ratio to plain group_table {r['shares_ms'] / r['group_table_ms']:.1f}, "
          f"to analyse_band (brush floor, {r['analyse_band_ms']:.1f} ms) "
          f"{r['shares_ms'] / r['analyse_band_ms']:.2f}")
    print(f"  kernel (counts @ partial sums) {r['kernel_ms']:.2f} ms vs naive loop over "
          f"resamples {r['naive_ms']:.1f} ms: {r['naive_ms'] / r['kernel_ms']:.0f}x faster")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
