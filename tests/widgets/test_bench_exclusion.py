"""Smoke test of benchmarks/bench_exclusion.py at tiny size (keeps the benchmark from rotting)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_exclusion.py"


def test_bench_exclusion_quick_run_measures_time_memory_and_peer(capsys):
    spec = importlib.util.spec_from_file_location("bench_exclusion", BENCH)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    r = bench.run(quick=True)
    assert r["exclusion_ms"] > 0 and r["without_ms"] > 0
    assert r["ratio"] == r["exclusion_ms"] / r["without_ms"]
    assert r["n_exclusions"] == 3  # the quick run's count (common practice: a smoke size)
    assert bench.main(["--quick"]) == 0
    assert "ratio exclusion / copy" in capsys.readouterr().out


def test_bench_exclusion_build_figure_has_its_peer():
    spec = importlib.util.spec_from_file_location("bench_exclusion", BENCH)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    b = bench.run_build(quick=True)
    # the background build returns before its jobs finish (common practice: a usable
    # map first), and the jobs' own times are reported
    assert 0 < b["usable_s"] <= b["all_done_s"]
    assert b["ratio"] == b["usable_s"] / b["synchronous_s"]
    assert "job clustering the snapshots" in b and "job checking the trajectories" in b
