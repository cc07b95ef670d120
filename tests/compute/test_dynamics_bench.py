"""Smoke test of benchmarks/bench_dynamics.py at tiny size (so the benchmark cannot rot)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_dynamics.py"


def test_bench_dynamics_runs_tiny():
    spec = importlib.util.spec_from_file_location("bench_dynamics", BENCH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    r = mod.run_benchmark(n_traj=6, t_max=10.0, n_loop=2, demo=False)
    assert r["vectorised_s"] > 0 and r["loop_scaled_s"] > 0
    assert r["same_active_states"]  # vectorised and naive engines agree on the subset
