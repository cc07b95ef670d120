"""Benchmark: vectorised FSSH engine against the naive per-trajectory loop (demo model).

Runs N trajectories x T fs of the invented demo model at a 0.25 fs step with the
vectorised engine, and the naive reference twin on a subset of the same
trajectories (same random numbers), scaled per trajectory to N. Also times the
default demo (``make_ensemble()``). Absolute timings are noisy on shared
machines; the ratio is measured in the same run.

Usage::

    python benchmarks/bench_dynamics.py            # 500 trajectories x 500 fs
    python benchmarks/bench_dynamics.py --quick    # smoke run
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from ensemblelab.compute.dynamics import run_fssh
from ensemblelab.compute.dynamics._reference_fssh import run_fssh_reference
from ensemblelab.demo import DEFAULT_SCENARIO, make_ensemble
from ensemblelab.demo import _sample_initial as sample_initial


def initial_conditions(n_traj: int, seed: int = 0):
    """Doorway-selected initial conditions of the demo model."""
    model = DEFAULT_SCENARIO.model()
    rng = np.random.default_rng(seed)
    q, v, sel = sample_initial(DEFAULT_SCENARIO, model, n_traj, rng, n_pool=40 * n_traj)
    idx = sel["sample"].to_numpy()
    return model, q[idx], v[idx], sel["state"].to_numpy()


def run_benchmark(n_traj: int = 500, t_max: float = 500.0, dt: float = 0.25,
                  n_loop: int = 10, demo: bool = True) -> dict[str, float]:
    """Time both engines; returns the figures (seconds and the speed-up ratio)."""
    model, q0, v0, s0 = initial_conditions(n_traj)
    kw = dict(q0=q0, v0=v0, initial_state=s0, t_max=t_max, dt=dt, save_every=8,
              decoherence="edc", random_state=1)
    t0 = time.perf_counter()
    res = run_fssh(model, **kw)
    t_vec = time.perf_counter() - t0
    sub = np.arange(min(n_loop, n_traj))
    t0 = time.perf_counter()
    ref = run_fssh_reference(model, **kw, trajectories=sub)
    t_loop_sub = time.perf_counter() - t0
    t_loop = t_loop_sub / sub.size * n_traj
    same = bool(np.array_equal(res.active[:, sub], ref["active"]))
    out = {"n_traj": n_traj, "t_max": t_max, "dt": dt, "vectorised_s": t_vec,
           "loop_subset_s": t_loop_sub, "loop_subset_n": int(sub.size),
           "loop_scaled_s": t_loop, "speedup": t_loop / t_vec, "same_active_states": same}
    if demo:
        t0 = time.perf_counter()
        make_ensemble()
        out["demo_default_s"] = time.perf_counter() - t0
    return out


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="tiny smoke run")
    args = p.parse_args(argv)
    if args.quick:
        r = run_benchmark(n_traj=20, t_max=50.0, n_loop=2, demo=False)
    else:
        r = run_benchmark()
    print(f"FSSH, invented demo model (3 states, 4 coordinates), {r['n_traj']} trajectories x "
          f"{r['t_max']:g} fs, dt = {r['dt']} fs, EDC on")
    print(f"  vectorised engine        : {r['vectorised_s']:8.2f} s")
    print(f"  naive loop, {r['loop_subset_n']:3d} trajs    : {r['loop_subset_s']:8.2f} s "
          f"(scaled per trajectory to {r['n_traj']}: {r['loop_scaled_s']:.1f} s)")
    print(f"  speed-up (loop / vector) : {r['speedup']:8.1f} x   (goal >= 30 x)")
    print(f"  same active states on the subset: {r['same_active_states']}")
    if "demo_default_s" in r:
        print(f"  demo default make_ensemble() (80 trajs x 500 fs): {r['demo_default_s']:.2f} s "
              "(goal < 30 s on 2 cores)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
