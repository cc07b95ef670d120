"""Smoke test of benchmarks/bench_load.py at tiny size (keeps the benchmark from rotting)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_load.py"


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("bench_load", BENCH)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_bench_load_functions_run_at_tiny_size(bench, tmp_path):
    pytest.importorskip("ase")
    folder = bench.make_folder(tmp_path / "e", n_traj=2, n_frames=5, n_atoms=3)
    assert len(list(folder.glob("traj_*.xyz"))) == 2
    wall, cpu, frames = bench.time_ase(folder)
    assert frames == 10 and wall > 0  # ase reads our files frame for frame
    res = bench.run(n_traj=2, n_frames=5, n_atoms=3, with_memory=True)
    assert res["n_frames_total"] == 10
    assert res["speed_ratio"] > 0 and res["raw"] > 0
    # retained heap is at least the arrays themselves (tracemalloc sees numpy buffers)
    assert res["retained_ratio"] > 0.5


def test_bench_load_main_quick_prints_ratios(bench, capsys, monkeypatch):
    pytest.importorskip("ase")
    monkeypatch.setattr(bench, "run", lambda **kw: {
        "n_frames_total": 1, "ours_s": 1.0, "ase_s": 2.0, "ours_cpu_s": 1.0, "ase_cpu_s": 2.0,
        "speed_ratio": 2.0, "cpu_ratio": 2.0, "peak_ratio": 1.2, "retained_ratio": 1.0,
        "rss_peak_ratio": 1.3})
    assert bench.main(["--quick"]) == 0
    out = capsys.readouterr().out
    assert "speed ratio, wall (ase / ours)    : 2.0x" in out and "1.20" in out
