"""Smoke test: the scattering benchmark runs at tiny size (so the script cannot rot), and
kernel and peer agree (the peer is the straightforward numpy pair loop)."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))

pytest.importorskip("xraydb")

import bench_scattering  # noqa: E402


def test_bench_scattering_tiny():
    res = bench_scattering.run_benchmark(2000, n_q=50, n_peer=300)
    assert res["max_rel_difference"] < 1e-10
    assert res["kernel_s"] > 0 and res["peer_scaled_s"] > 0 and res["end_to_end_s"] > 0
