"""Benchmark: compute_trpes end to end, and cached redraws, against a numpy/scipy peer.

Data (invented, seeded): N_TRAJ trajectories x N_STEPS steps (0.5 fs) x 5 cation states,
two neutral states (every trajectory starts on S1 and may hop to S0), probe 5 eV / 30 fs,
map of 601 delays x 500 kinetic energies, no temporal convolution, uniform weights:
10^7 (snapshot, channel) contributions at the default size.

Printed, all measured in the same run, best of interleaved rounds (this machine's
speed drifts by tens of percent over seconds and is shared):

* **end to end**: ``compute_trpes`` from the in-memory Ensemble to the map, against the
  peer on the same data: numpy ionisation and kinetic energies, mask, weights,
  ``numpy.histogram2d`` on the delay x energy grid and
  ``scipy.ndimage.gaussian_filter1d`` along energy, divided by the alive count
  (goal >= 20x). Also the numpy stick path of the package (the fused pass's naive twin,
  ``return_model=True`` keeps the sticks) for reference;
* **in-kernel**: the fused compiled pass alone (stick preparation + moment deposit +
  alive weights) and the deposit kernel alone on prepared sticks;
* **steps**: each other step of ``compute_trpes`` timed alone (layout pass giving the
  trajectory starts and the time grid, stick energy range, broadening, ground-state
  check) and ``compute_trpes`` with the process pinned to one core against all cores;
* **cached redraws** (:class:`~ensemblelab.compute.spectroscopy.cache.StickCache`): a
  new probe width, a new resolution (goal <= 150 ms) and a new photon energy
  (goal <= 300 ms);
* **peak memory** (tracemalloc) of one end-to-end call and of the peer, against the
  bytes of the input arrays;
* **read floor**: the time to read the input arrays once (energies, cation energies,
  Dyson norms, time, active state, trajectory id): numpy sums over each array (the
  memory-bandwidth floor) and a compiled single pass over the snapshots, in the usable
  threads, that only reads them row by row (the access pattern of the fused pass): how
  far ``compute_trpes`` is from a pass that does no work at all, against the goal's
  time budget (peer / 20).

Usage: python benchmarks/bench_trpes_end_to_end.py [--quick] [--rounds 5]
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
import tracemalloc
import warnings

import numpy as np

from ensemblelab.compute.spectroscopy import _kernels_deposit as KD
from ensemblelab.compute.spectroscopy import _kernels_fused as KF
from ensemblelab.compute.spectroscopy import compute_trpes
from ensemblelab.compute.spectroscopy.cache import prepare_map_cache
from ensemblelab.compute.spectroscopy.cross_sections import DysonNorm
from ensemblelab.compute.spectroscopy.pulses import FWHM_TO_SIGMA, GaussianPulse
from ensemblelab.compute.spectroscopy.sticks import THRESHOLD_TAIL
from ensemblelab.data.ensemble import Ensemble

N_CATION = 5
DT = 0.5  # fs
ENERGIES = np.linspace(0.0, 4.0, 500)
DELAYS = np.linspace(0.0, 999.5, 601)
PROBE = GaussianPulse(photon_energy=5.0, fwhm=30.0)


def make_ensemble(n_traj: int, n_steps: int, seed: int = 3) -> Ensemble:
    """Invented ensemble: S1 -> S0 hops (lifetime 3 ps), five cation states."""
    rng = np.random.default_rng(seed)
    n = n_traj * n_steps
    t = np.tile(np.arange(n_steps) * DT, n_traj)
    traj = np.repeat(np.arange(n_traj), n_steps)
    hop = rng.exponential(3000.0, n_traj)
    active = np.where(t < hop[traj], 1, 0)
    en = np.empty((n, 2))
    en[:, 0] = 0.3 * rng.standard_normal(n)
    en[:, 1] = 4.0 + 0.2 * rng.standard_normal(n)
    cat = 6.0 + np.linspace(0.0, 1.2, N_CATION) + 0.1 * rng.standard_normal((n, N_CATION))
    dy = rng.uniform(0.2, 1.0, (n, N_CATION))
    return Ensemble.from_arrays(traj=traj, time=t, active=active,
                                geometries=np.zeros((n, 1, 3)), symbols=["H"], energies=en,
                                cation_energies=cat, dyson=dy, copy=False)


def input_bytes(ens: Ensemble) -> int:
    """Bytes of the arrays a map reads (energies, cation energies, Dyson norms, time,
    active state, trajectory id)."""
    return int(ens.energies.nbytes + ens.cation_energies.nbytes + ens.dyson.nbytes
               + 3 * 8 * ens.n_snapshots)


def peer_map(ens: Ensemble) -> np.ndarray:
    """numpy + numpy.histogram2d + scipy.ndimage.gaussian_filter1d, same physics (window
    sticks at n h nu - IP weighted by the Dyson norm, Gaussian of the probe's spectral
    FWHM, divided by the alive count), on the same delay x energy grid."""
    from scipy.ndimage import gaussian_filter1d

    snap = ens.snapshots
    active = snap["active"].to_numpy()
    t = snap["time"].to_numpy()
    e_neutral = ens.energies[np.arange(ens.n_snapshots), active]
    ekin = PROBE.total_energy - (ens.cation_energies - e_neutral[:, None])
    tail = THRESHOLD_TAIL * PROBE.effective_spectral_fwhm * FWHM_TO_SIGMA
    ok = ekin > -tail
    tt = np.broadcast_to(t[:, None], ekin.shape)[ok]
    de = ENERGIES[1] - ENERGIES[0]
    dd = DELAYS[1] - DELAYS[0]
    e_edges = np.r_[ENERGIES - de / 2, ENERGIES[-1] + de / 2]
    t_edges = np.r_[DELAYS - dd / 2, DELAYS[-1] + dd / 2]
    hist, _, _ = np.histogram2d(tt, ekin[ok], bins=[t_edges, e_edges], weights=ens.dyson[ok])
    alive = np.histogram(t, bins=t_edges)[0].astype(float)
    sigma_bins = PROBE.effective_spectral_fwhm * FWHM_TO_SIGMA / de
    out = gaussian_filter1d(hist, sigma_bins, axis=1, mode="constant") / de
    return out / np.where(alive > 0, alive, 1.0)[:, None]


def ours(ens: Ensemble) -> np.ndarray:
    return compute_trpes(ens, probe=PROBE, kinetic_energies=ENERGIES, delays=DELAYS,
                         convolve=False, weights="uniform", progress=False).intensity


def ours_numpy_path(ens: Ensemble) -> np.ndarray:
    m, _ = compute_trpes(ens, probe=PROBE, kinetic_energies=ENERGIES, delays=DELAYS,
                         convolve=False, weights="uniform", progress=False,
                         return_model=True)
    return m.intensity


def fused_only(ens: Ensemble, model) -> None:
    c = model._cache  # the grid the map used (benchmark only)
    KF.fused_pass(ens, w_traj=np.ones(ens.n_trajectories), cross_section=DysonNorm(),
                  total_energy=PROBE.total_energy,
                  tail=THRESHOLD_TAIL * PROBE.effective_spectral_fwhm * FWHM_TO_SIGMA,
                  start=model.grid_start, dt=model.time_step, n_time=model.n_time,
                  e_lo=c["e_lo"], h=c["h"], n_fine=c["n_fine"], order=model.order,
                  shifts=None)


def floor_arrays(ens: Ensemble) -> list[np.ndarray]:
    """The arrays one map reads (as the fused pass sees them)."""
    snap = ens.snapshots
    return [ens.energies, ens.cation_energies, ens.dyson, snap["time"].to_numpy(),
            snap["active"].to_numpy(), snap["traj"].to_numpy()]


def floor_numpy(arrays: list[np.ndarray]) -> float:
    """Read every input array once (numpy sums: the memory-bandwidth floor)."""
    return float(sum(float(a.sum()) for a in arrays))


_FLOOR: dict = {}


def floor_compiled(arrays: list[np.ndarray]) -> float:
    """One compiled pass over the snapshots, split over the usable threads, that reads
    each snapshot's row of every array and does nothing else (sums, reassociated)."""
    if "pass" not in _FLOOR:
        import numba

        @numba.njit(nogil=True, fastmath=True, cache=True)
        def read_rows(en, cat, dy, t, act, tr, lo, hi):  # pragma: no cover - compiled
            s = 0.0
            for i in range(lo, hi):
                s += t[i] + act[i] + tr[i]
                for k in range(en.shape[1]):
                    s += en[i, k]
                for k in range(cat.shape[1]):
                    s += cat[i, k] + dy[i, k]
            return s

        _FLOOR["pass"] = read_rows
    from concurrent.futures import ThreadPoolExecutor

    en, cat, dy, t, act, tr = arrays
    dy = dy if dy.ndim == 2 else dy.reshape(dy.shape[0], -1)
    n = t.shape[0]
    n_thr = KD.usable_cores()
    b = [i * n // n_thr for i in range(n_thr + 1)]
    with ThreadPoolExecutor(n_thr) as pool:
        return float(sum(pool.map(lambda i: _FLOOR["pass"](en, cat, dy, t, act, tr, b[i],
                                                            b[i + 1]), range(n_thr))))


def best_interleaved(fns: dict, rounds: int) -> dict[str, float]:
    best = {k: float("inf") for k in fns}
    for _ in range(rounds):
        for k, fn in fns.items():
            t0 = time.perf_counter()
            fn()
            best[k] = min(best[k], time.perf_counter() - t0)
    return best


def peak_mb(fn) -> float:
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1] / 1e6
    finally:
        tracemalloc.stop()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small ensemble (smoke run)")
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args(argv)
    n_traj, n_steps = (20, 400) if args.quick else (1000, 2000)
    rounds = 1 if args.quick else args.rounds
    warnings.simplefilter("ignore")
    ens = make_ensemble(n_traj, n_steps)
    compiled = KD.numba_available()
    t0 = time.perf_counter()
    ours(ens)  # compile (or load the cache of) the kernels
    t_first = time.perf_counter() - t0
    _, model = compute_trpes(ens, probe=PROBE, kinetic_energies=ENERGIES, delays=DELAYS,
                             convolve=False, weights="uniform", progress=False,
                             return_model=True)
    n_sticks = model.info["n_sticks"]
    print(f"TRPES end to end: {n_traj} trajectories x {n_steps} steps x {N_CATION} cation "
          f"states, 2 neutral states = {n_traj * n_steps * N_CATION:.2e} (snapshot, channel) "
          f"pairs, {n_sticks:.2e} open; map {DELAYS.size} x {ENERGIES.size}; probe 5 eV / "
          f"30 fs, no convolution, uniform weights; compiled kernels: "
          f"{'yes' if compiled else 'no (numpy fallback)'}; first call {t_first:.2f} s")
    a, b = ours(ens).mean(axis=0), peer_map(ens).mean(axis=0)
    print(f"  delay-averaged spectra agree with the peer's to "
          f"{np.abs(a - b).max() / np.abs(b).max():.1e} of the peak (binning vs point "
          "sampling; a sanity check, not a test)")
    t = time_paths(ens, model, rounds, compiled)
    del model  # its sticks
    print(f"  end to end: compute_trpes {t['ours'] * 1e3:.0f} ms, peer (histogram2d + "
          f"gaussian_filter1d) {t['peer'] * 1e3:.0f} ms -> {t['peer'] / t['ours']:.1f}x "
          "(goal >= 20x)")
    print(f"  numpy stick path (naive twin, return_model=True) {t['numpy_path'] * 1e3:.0f} ms"
          f" -> fused path {t['numpy_path'] / t['ours']:.1f}x faster")
    if compiled:
        print(f"  in-kernel: fused pass (sticks + deposit + alive) {t['fused'] * 1e3:.0f} ms "
              f"({t['peer'] / t['fused']:.0f}x the peer); deposit alone on prepared sticks "
              f"{t['deposit'] * 1e3:.0f} ms")
    else:
        print(f"  in-kernel: deposit alone on prepared sticks {t['deposit'] * 1e3:.0f} ms")
    rest = t["ours"] - t.get("fused", 0.0) - t["s_layout"] - t["s_range"] - t["s_broaden"] \
        - t["s_ground"]
    print(f"  steps of compute_trpes, each alone: layout pass (trajectory starts, time grid) "
          f"{t['s_layout'] * 1e3:.1f} ms, stick energy range {t['s_range'] * 1e3:.1f} ms, "
          f"fused pass {t.get('fused', math.nan) * 1e3:.1f} ms, broadening "
          f"{t['s_broaden'] * 1e3:.1f} ms, ground-state check {t['s_ground'] * 1e3:.1f} ms; "
          f"the rest (Python, weights, absorbing-state extension, fill check; a difference "
          f"of separately timed bests, noisy on a busy machine) {rest * 1e3:.1f} ms")
    print(f"  compute_trpes pinned to one core {t['ours_1core'] * 1e3:.0f} ms, on "
          f"{KD.usable_cores()} cores {t['ours'] * 1e3:.0f} ms "
          f"({t['ours_1core'] / t['ours']:.2f}x)")
    budget = t["peer"] / 20.0
    fl = (f"compiled row pass ({KD.usable_cores()} threads) {t['floor_compiled'] * 1e3:.1f} ms, "
          if compiled else "")
    print(f"  read floor (input arrays read once, no work): numpy sums "
          f"{t['floor_numpy'] * 1e3:.1f} ms, {fl}goal budget peer/20 = {budget * 1e3:.1f} ms; "
          f"compute_trpes = {t['ours'] / t['floor_numpy']:.1f}x the numpy floor")
    r, n_pass = time_cache(ens, rounds)
    print(f"  cached redraw ({n_pass} pass over the ensemble): probe width "
          f"{r['width'] * 1e3:.0f} ms, resolution {r['resolution'] * 1e3:.0f} ms (goal <= 150 "
          f"ms), photon energy {r['photon'] * 1e3:.0f} ms (goal <= 300 ms)")
    mb_in = input_bytes(ens) / 1e6
    p_ours, p_peer = peak_mb(lambda: ours(ens)), peak_mb(lambda: peer_map(ens))
    print(f"  peak memory (tracemalloc): compute_trpes {p_ours:.0f} MB, peer {p_peer:.0f} MB; "
          f"input arrays {mb_in:.0f} MB ({p_ours / mb_in:.2f}x and {p_peer / mb_in:.2f}x); "
          "pooled deposit accumulators reused from earlier calls are not counted")
    return 0


def time_paths(ens: Ensemble, model, rounds: int, compiled: bool) -> dict[str, float]:
    """Interleaved best times of the peer, compute_trpes, the numpy path and the kernels."""
    # the model from compute_trpes(return_model=True) holds the numpy path's sticks
    tb, e, w = model.tbin, model.sticks.energy, model.sticks.weight
    c = model._cache
    fns = {"peer": lambda: peer_map(ens), "ours": lambda: ours(ens),
           "ours_1core": one_core(lambda: ours(ens)),
           "numpy_path": lambda: ours_numpy_path(ens),
           "deposit": lambda: KD.deposit_moments(tb, e, w, n_time=model.n_time,
                                                 e_lo=c["e_lo"], h=c["h"],
                                                 n_fine=c["n_fine"], order=model.order,
                                                 tfrac=model.tfrac)}
    arrays = floor_arrays(ens)
    fns["floor_numpy"] = lambda: floor_numpy(arrays)
    if compiled:
        fns["fused"] = lambda: fused_only(ens, model)
        floor_compiled(arrays)  # compile
        fns["floor_compiled"] = lambda: floor_compiled(arrays)
    fns.update(stage_fns(ens))
    return best_interleaved(fns, rounds)


def stage_fns(ens: Ensemble) -> dict:
    """The steps of compute_trpes besides the fused pass, each alone: the layout pass
    (trajectory starts + time grid statistics), the stick energy range, the broadening
    of the moments into the map and the ground-state check."""
    from ensemblelab.compute.engine import as_source
    from ensemblelab.compute.spectroscopy.fused import block_layout, stick_energy_range
    from ensemblelab.compute.spectroscopy.maps import trpes_model
    from ensemblelab.compute.spectroscopy.weights import ground_state_ionisation_fraction

    source = as_source(ens)
    tail = THRESHOLD_TAIL * PROBE.effective_spectral_fwhm * FWHM_TO_SIGMA
    m = trpes_model(ens, probe=PROBE, weights="uniform", progress=False, keep_sticks=False)
    kw = {"kinetic_energies": ENERGIES, "delays": DELAYS, "convolve": False}
    return {"s_layout": lambda: block_layout(ens),
            "s_range": lambda: stick_energy_range(source, PROBE.total_energy, tail=tail,
                                                  shifts=None, client=None, scheduler=None),
            "s_broaden": lambda: m.broaden(**kw),
            "s_ground": lambda: ground_state_ionisation_fraction(ens, probe=PROBE)}


def one_core(fn):
    """``fn`` run with this process pinned to one CPU (every stage single-threaded)."""
    def run():
        cpus = os.sched_getaffinity(0)
        os.sched_setaffinity(0, {min(cpus)})
        try:
            return fn()
        finally:
            os.sched_setaffinity(0, cpus)
    return run


def time_cache(ens: Ensemble, rounds: int) -> tuple[dict[str, float], int]:
    """Redraw times of a StickCache for a new width, resolution and photon energy."""
    cache = prepare_map_cache(ens, probe=PROBE, photon_energies=(4.8, 5.2), weights="uniform")
    kw = {"kinetic_energies": ENERGIES, "delays": DELAYS, "convolve": False}
    cache.map(**kw)
    r = best_interleaved({
        "width": lambda: cache.map(probe_fwhm=40.0, **kw),
        "resolution": lambda: cache.map(resolution=0.05, **kw),
        "photon": lambda: cache.map(photon_energy=4.9, **kw)}, rounds)
    return r, cache.rebuilds


if __name__ == "__main__":
    sys.exit(main())
