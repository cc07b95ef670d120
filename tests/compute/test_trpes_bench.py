"""Smoke test: the TRPES benchmark functions run at tiny size (so the script cannot rot)."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))

import bench_trpes  # noqa: E402


def test_bench_trpes_functions_tiny():
    tb, e, w = bench_trpes.make_inputs(2000)
    fast = bench_trpes.fast_map(tb, e, w)
    ref = bench_trpes.hist_filter_map(tb, e, w)
    assert fast.shape == ref.shape == (bench_trpes.N_DELAYS, bench_trpes.N_ENERGIES)
    # both estimate the same broadened map; the histogram one is binned (coarse): 5 %
    assert abs(fast.sum() - ref.sum()) <= 0.05 * ref.sum()
    r = bench_trpes.bench_rebroaden_and_contributions(3000, repeat=1)
    assert r["n_sticks"] > 0 and r["rebroaden"] > 0 and r["contrib"] > 0


def test_bench_trpes_quick_main(capsys):
    assert bench_trpes.main(["--quick"]) == 0
    out = capsys.readouterr().out
    assert "speed-up vs histogram2d" in out and "re-broaden" in out
