"""Benchmark: map-view redraws on a probe width, resolution or photon-energy change.

Data (invented, seeded; the shape of ``bench_trpes_end_to_end.py``): 1000 trajectories x
2000 steps (0.5 fs) x 5 cation states, two neutral states: 10^7 (snapshot, channel)
contributions; probe 5 eV / 30 fs, pump 30 fs (doorway-selected sampling: uniform
weights), map of 601 delays x 500 kinetic energies, convolved (the view's default).

Printed, measured in the same run, best of ``--rounds`` alternating changes, end to end
through the widget: set the control's value, flush the debounce, until ``trpes_map`` is
replaced (headless: no browser round trip, no drawing in a page):

* **redraw** after a width change (goal <= 150 ms), a resolution change (<= 150 ms) and a
  photon-energy change (<= 300 ms), from the view's stick cache;
* the same change by the **old full recompute** (``compute_trpes(..., return_model=True)``,
  the numpy stick path with sticks kept, as the view did before), and the ratio;
* for reference: the first cache (one pass), and the first brush after a width change
  (it builds the sticks the band analysis needs).

With a **band selected** (a box on the map, the selection table attached: band table
and grouped shares with bootstrap intervals), the same changes redraw the map *and*
the band analysis: timed end to end the same way (goals: 150 / 150 / 300 ms), against
the full recompute in the same run (``compute_trpes(..., return_model=True)`` and the
band analysis from that model's sticks, as the view did before the band reused the
cached sticks), and against the same changes without a band in the same rounds (the
map alone: what the band adds), with the number of times the band's sticks were made
(1: the first brush; a redraw must not make new ones).

Usage: python benchmarks/bench_explorer_redraw.py [--quick] [--rounds 3]
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_trpes_end_to_end import DELAYS, ENERGIES, make_ensemble  # noqa: E402


def build_view(n_traj: int, n_steps: int) -> Any:
    """The map view of an invented ensemble (metadata: probe, pump, sampling)."""
    from ensemblelab.widgets import MapView, SelectionModel

    ens = make_ensemble(n_traj, n_steps)
    ens = ens.replace(metadata={**ens.metadata, "sampling": "doorway-selected",
                                "suggested_probe": {"photon_energy": 5.0, "fwhm": 30.0},
                                "suggested_pump": {"photon_energy": 4.0, "fwhm": 30.0}})
    model = SelectionModel(ens)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        view = MapView(model, kinetic_energies=ENERGIES, delays=DELAYS, debounce=0.3)
        first = time.perf_counter() - t0
    view.first_ms = 1e3 * first
    return view


def timed_change(view: Any, control: Any, value: float) -> float:
    """Seconds from setting `control` to a new ``trpes_map`` (debounce flushed)."""
    before = view.model.trpes_map
    t0 = time.perf_counter()
    control.value = value
    view.flush()
    elapsed = time.perf_counter() - t0
    if view.model.trpes_map is before:
        raise RuntimeError("the map was not replaced")
    return elapsed


def old_recompute(view: Any) -> float:
    """Seconds of the view's former recompute for the current controls (full pass)."""
    from ensemblelab.compute.spectroscopy import compute_trpes

    probe, pump = view.pulses()
    energies, delays = view.grids()
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        trpes, sticks = compute_trpes(
            view.model.ens, probe=probe, pump=pump, kinetic_energies=energies, delays=delays,
            resolution=float(view.resolution.value), convolve=bool(view.convolve.value),
            progress=False, exclude=list(view.model.excluded), return_model=True)
    view.model.remember_stick_model(trpes, sticks)
    view.model.trpes_map = trpes
    return time.perf_counter() - t0


CHANGES = (("width", "probe_fwhm", (35.0, 30.0), 150.0),
           ("resolution", "resolution", (0.03, 0.0), 150.0),
           ("photon energy", "photon_energy", (5.1, 5.0), 300.0))


def run(quick: bool = False, rounds: int = 3) -> dict[str, dict[str, float]]:
    """Best redraw and old-recompute times (ms) per change, with the ratio."""
    n_traj, n_steps = (40, 200) if quick else (1000, 2000)
    view = build_view(n_traj, n_steps)
    out: dict[str, dict[str, float]] = {}
    for name, attr, values, goal in CHANGES:
        control = getattr(view, attr)
        new, old = [], []
        for _ in range(rounds):
            for v in values:
                new.append(timed_change(view, control, v))
                old.append(old_recompute(view))
        rebuilds = view.live.cache.rebuilds
        out[name] = {"redraw_ms": 1e3 * min(new), "old_ms": 1e3 * min(old),
                     "goal_ms": goal, "rebuilds": float(rebuilds)}
        out[name]["ratio"] = out[name]["old_ms"] / out[name]["redraw_ms"]
    view.probe_fwhm.value = 33.0  # a cached map (flushed): the brush makes the band's sticks
    view.flush()
    t0 = time.perf_counter()
    e, d = ENERGIES, DELAYS
    view.model.select_band(energy_range=(float(e[100]), float(e[200])),
                           delay_range=(float(d[10]), float(d[100])))
    out["first brush after a width change"] = {"ms": 1e3 * (time.perf_counter() - t0)}
    out["first cache"] = {"ms": view.first_ms,
                          "contributions": float(view.model.ens.n_snapshots * 5)}
    return out


#: the band of the band-selected redraws: kinetic-energy and delay indices of the grids
BAND = ((100, 200), (10, 100))


def run_band(view: Any, rounds: int = 3) -> dict[str, dict[str, float]]:
    """Best redraw and full-recompute times (ms) per change with a band selected."""
    from ensemblelab.widgets import SelectionTable

    table = SelectionTable(view.model)  # the band table with bootstrap intervals
    (i0, i1), (j0, j1) = BAND
    t0 = time.perf_counter()
    view.model.select_band(energy_range=(float(ENERGIES[i0]), float(ENERGIES[i1])),
                           delay_range=(float(DELAYS[j0]), float(DELAYS[j1])))
    out: dict[str, dict[str, float]] = {"first brush": {
        "ms": 1e3 * (time.perf_counter() - t0), "builds": float(view.live.n_band_builds)}}
    for name, attr, values, goal in CHANGES:
        control = getattr(view, attr)
        new, old, alone = [], [], []
        for _ in range(rounds):
            for v in values:
                new.append(timed_change(view, control, v))
                old.append(old_recompute(view))
            if table.table is None or view.model.band is None:
                raise RuntimeError("the band table was not drawn")
            # the same changes without a band (the map alone), in the same rounds
            ranges = {"energy_range": view.model.energy_range,
                      "delay_range": view.model.delay_range}
            view.model.clear_band()
            for v in values:
                alone.append(timed_change(view, control, v))
            view.model.select_band(**ranges)
        out[name] = {"redraw_ms": 1e3 * min(new), "old_ms": 1e3 * min(old), "goal_ms": goal,
                     "alone_ms": 1e3 * min(alone), "builds": float(view.live.n_band_builds)}
        out[name]["ratio"] = out[name]["old_ms"] / out[name]["redraw_ms"]
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small smoke run")
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args(argv)
    res = run(quick=args.quick, rounds=max(1, args.rounds))
    first = res.pop("first cache")
    brush = res.pop("first brush after a width change")
    print(f"map-view redraws, {first['contributions']:.3g} (snapshot, channel) contributions, "
          f"{DELAYS.size} x {ENERGIES.size} map, convolved; best of {args.rounds} rounds")
    print(f"  first map (cache, one pass): {first['ms']:.0f} ms")
    for name, r in res.items():
        print(f"  {name} change: redraw {r['redraw_ms']:.0f} ms (goal <= {r['goal_ms']:.0f} ms)"
              f" vs old full recompute {r['old_ms']:.0f} ms: {r['ratio']:.1f}x faster "
              f"(cache passes so far: {r['rebuilds']:.0f})")
    print(f"  first brush after a width change (makes the band's sticks): {brush['ms']:.0f} ms")
    n_traj, n_steps = (40, 200) if args.quick else (1000, 2000)
    band = run_band(build_view(n_traj, n_steps), rounds=max(1, args.rounds))
    first_brush = band.pop("first brush")
    (i0, i1), (j0, j1) = BAND
    print(f"with a band selected ({ENERGIES[i0]:.2f}-{ENERGIES[i1]:.2f} eV, {DELAYS[j0]:.0f}-"
          f"{DELAYS[j1]:.0f} fs; map + band table + shares with bootstrap intervals)")
    print(f"  first brush (makes the band's sticks): {first_brush['ms']:.0f} ms")
    for name, r in band.items():
        print(f"  {name} change: redraw {r['redraw_ms']:.0f} ms (goal <= {r['goal_ms']:.0f} ms)"
              f" vs full recompute {r['old_ms']:.0f} ms: {r['ratio']:.1f}x faster; the map "
              f"alone {r['alone_ms']:.0f} ms in the same rounds (band sticks made so far: "
              f"{r['builds']:.0f})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
