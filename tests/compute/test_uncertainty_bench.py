"""Smoke test: the uncertainty benchmark runs at tiny size (so the script cannot rot)."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))

import bench_uncertainty  # noqa: E402


def test_bench_uncertainty_quick_main(capsys):
    assert bench_uncertainty.main(["--quick"]) == 0
    out = capsys.readouterr().out
    assert "band_share_table" in out and "naive loop over resamples" in out
