"""Explorer latency: in-kernel time from a brush event to every view updated.

Usage::

    python benchmarks/bench_explorer.py            # demo ensemble + 10^7 contributions
    python benchmarks/bench_explorer.py --quick    # small smoke run

Figures printed (medians over several brushes at different boxes):

* brush -> all views updated, in ms, on the demo ensemble (goal <= 150 ms) and on a
  synthetic ensemble with 10^7 (snapshot, cation channel) contributions (goal <= 300 ms);
* the same as a ratio to a peer measured in the same run: one bare
  ``region_intensity()`` call for the same box (the per-snapshot band intensities,
  the compute floor of a band selection), so the ratio says what the views add on top;
* for reference, one full ``contributions(group_by="snapshot")`` call (sorted table of every
  contributing snapshot), which the brush no longer builds.

The browser round trip (brush -> table updated in the page) is measured and printed by
``tests/e2e/test_explorer_browser.py``.
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


def synthetic_ensemble(n_contributions: int, *, n_cation: int = 4, steps: int = 500,
                       seed: int = 0) -> Any:
    """An invented ensemble with `n_contributions` (snapshot, cation) sticks, one atom each."""
    from ensemblelab.data.ensemble import Ensemble

    rng = np.random.default_rng(seed)
    n = n_contributions // n_cation
    n_traj = max(1, n // steps)
    n = n_traj * steps
    traj = np.repeat(np.arange(n_traj), steps)
    time_ = np.tile(np.arange(steps, dtype=float), n_traj)
    hop = rng.exponential(100.0, size=n_traj)
    active = np.where(time_ < hop[traj], 2, 1)
    energies = np.empty((n, 3))
    energies[:, 0] = 0.0
    energies[:, 1] = 3.0 + 0.1 * rng.standard_normal(n)
    energies[:, 2] = 4.0 + 0.1 * rng.standard_normal(n)
    cation = 7.5 + np.arange(n_cation) * 0.4 + 0.05 * rng.standard_normal((n, n_cation))
    dyson = rng.uniform(0.2, 1.0, size=(n, n_cation))
    geoms = rng.standard_normal((n, 2, 3)).astype(np.float64)
    return Ensemble.from_arrays(traj=traj, time=time_, active=active, geometries=geoms,
                                symbols=["C", "O"], energies=energies, cation_energies=cation,
                                dyson=dyson, copy=False,
                                metadata={"producer": "bench_explorer (invented)"})


def _scaled(box: tuple, trpes: Any) -> tuple[tuple[float, float], tuple[float, float]]:
    (fe0, fe1), (fd0, fd1) = box
    e, d = np.asarray(trpes.kinetic_energies), np.asarray(trpes.delays)
    return ((e[0] + fe0 * (e[-1] - e[0]), e[0] + fe1 * (e[-1] - e[0])),
            (d[0] + fd0 * (d[-1] - d[0]), d[0] + fd1 * (d[-1] - d[0])))


def measure(app: Any, *, repeats: int = 1) -> dict[str, float]:
    """Median brush latency (ms) of an Explorer, of bare region_intensity() and of the
    full contributions() table (ms)."""
    from ensemblelab.compute.spectroscopy import contributions, region_intensity

    model = app.model
    trpes = model.trpes_map
    brush, bare, table = [], [], []
    app.brush(*_scaled(BOXES[0], trpes))  # warm caches (sorted sticks)
    for _ in range(repeats):
        for box in BOXES:
            e_rng, d_rng = _scaled(box, trpes)
            t0 = time.perf_counter()
            region_intensity(model.current, trpes, energy_range=e_rng, delay_range=d_rng)
            bare.append(1e3 * (time.perf_counter() - t0))
            t0 = time.perf_counter()
            contributions(model.current, trpes, energy_range=e_rng, delay_range=d_rng,
                          group_by="snapshot")
            table.append(1e3 * (time.perf_counter() - t0))
            brush.append(app.brush(e_rng, d_rng))
    assert app.messages.errors == [], app.messages.errors
    b, c = statistics.median(brush), statistics.median(bare)
    return {"brush_ms": b, "region_intensity_ms": c, "ratio": b / c,
            "contributions_ms": statistics.median(table)}


def explorer_for(ens: Any, *, clusters: Any = "auto", flags: Any = None,
                 kinetic_energies: Any = None, delays: Any = None, **map_kwargs: Any) -> Any:
    from ensemblelab.widgets import Explorer

    mk = dict(map_kwargs)
    if kinetic_energies is not None:
        mk["kinetic_energies"] = kinetic_energies
    if delays is not None:
        mk["delays"] = delays
    return Explorer(ens, clusters=clusters, flags=flags, debounce=0, restore=False,
                    map_kwargs=mk, population_kwargs={"fit": "none"})


def run(*, quick: bool) -> dict[str, dict[str, float]]:
    import pandas as pd

    results = {}
    if quick:
        from ensemblelab.testing import make_toy_ensemble

        ens = make_toy_ensemble(20, t_max=100.0)
        name = "toy (quick)"
        app = explorer_for(ens, clusters=False, kinetic_energies=np.linspace(0, 2.5, 60),
                           delays=np.arange(-50.0, 101.0, 10.0))
    else:
        from ensemblelab.cli._explore import default_data_path
        from ensemblelab.io import load

        path = default_data_path()
        ens = load(path, nonfinite="keep", progress=False)
        name = f"demo ({ens.n_trajectories} trajectories, {ens.n_snapshots} snapshots)"
        app = explorer_for(ens)
    results[name] = measure(app, repeats=1 if quick else 3)

    n_big = 40_000 if quick else 10_000_000
    big = synthetic_ensemble(n_big)
    flags = pd.DataFrame({"traj": big.trajectories["traj"], "flagged": False, "reason": ""})
    t0 = time.perf_counter()
    app = explorer_for(big, clusters=False, flags=flags, photon_energy=5.0,
                       kinetic_energies=np.linspace(0.0, 2.5, 300),
                       delays=np.linspace(-60, 500, 200))
    build = time.perf_counter() - t0
    key = f"synthetic, {n_big:.0e} contributions"
    results[key] = measure(app, repeats=1)
    results[key]["explorer_build_s"] = build
    return results


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small smoke run")
    args = parser.parse_args(argv)
    results = run(quick=args.quick)
    goals = {"demo": 150.0, "synthetic": 300.0}
    for name, r in results.items():
        goal = next((g for k, g in goals.items() if name.startswith(k)), None)
        extra = f", explorer built in {r['explorer_build_s']:.1f} s" if "explorer_build_s" in r \
            else ""
        print(f"{name}: brush -> all views {r['brush_ms']:.1f} ms"
              + (f" (goal <= {goal:.0f} ms)" if goal and not args.quick else "")
              + f"; bare region_intensity() {r['region_intensity_ms']:.1f} ms; "
              f"ratio {r['ratio']:.2f}; full contributions() table "
              f"{r['contributions_ms']:.1f} ms{extra}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
