"""Smoke test of benchmarks/bench_explorer_redraw.py at tiny size (keeps it from rotting)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_explorer_redraw.py"


def test_bench_explorer_redraw_quick_run(capsys):
    sys.path.insert(0, str(BENCH.parent))
    spec = importlib.util.spec_from_file_location("bench_explorer_redraw", BENCH)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    res = bench.run(quick=True, rounds=1)
    for name in ("width", "resolution", "photon energy"):
        r = res[name]
        assert r["redraw_ms"] > 0 and r["old_ms"] > 0
        assert r["rebuilds"] == 1  # every change served by the first cache
    band = bench.run_band(bench.build_view(40, 200), rounds=1)
    assert band.pop("first brush")["builds"] == 1
    for name in ("width", "resolution", "photon energy"):
        assert band[name]["redraw_ms"] > 0 and band[name]["old_ms"] > 0
        assert band[name]["builds"] == 1  # the band's sticks made once, at the first brush
    assert bench.main(["--quick", "--rounds", "1"]) == 0
    out = capsys.readouterr().out
    assert "width change: redraw" in out and "old full recompute" in out
    assert "with a band selected" in out and "band sticks made so far: 1" in out
