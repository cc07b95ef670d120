"""Smoke test of benchmarks/bench_explorer.py at tiny size (keeps the benchmark from rotting)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_explorer.py"


def test_bench_explorer_quick_run_measures_both_cases(capsys):
    spec = importlib.util.spec_from_file_location("bench_explorer", BENCH)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    results = bench.run(quick=True)
    assert len(results) == 2
    for r in results.values():
        assert r["brush_ms"] > 0 and r["region_intensity_ms"] > 0
        assert r["contributions_ms"] > 0
        # a brush includes one region_intensity() call, so it cannot be faster than it
        # (allowing timer noise)
        assert r["ratio"] > 0.5
    assert bench.main(["--quick"]) == 0
    assert "brush -> all views" in capsys.readouterr().out
