"""Smoke test of benchmarks/bench_explorer_memory.py at tiny size (keeps it from rotting)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

BENCH = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_explorer_memory.py"


@pytest.mark.filterwarnings("ignore")
def test_bench_explorer_memory_measures_against_the_ensemble_size(tmp_path):
    spec = importlib.util.spec_from_file_location("bench_explorer_memory", BENCH)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    from ensemblelab.io import load
    from ensemblelab.io.store import save_store

    ens = bench.synthetic_ensemble(8, t_max=40.0)
    store = save_store(ens, tmp_path / "ensemble")
    loaded = load(store)
    # the peer: every array's nbytes plus the tables (computed independently here)
    arrays = sum(v.nbytes for v in vars(loaded).values() if isinstance(v, np.ndarray))
    assert bench.ensemble_nbytes(loaded) > arrays
    r = bench._child(str(store), traced=True)
    assert r["nbytes"] == bench.ensemble_nbytes(loaded)
    assert r["n_snapshots"] == ens.n_snapshots and r["errors"] == 0
    # a peak is at least what is held at the end (common practice)
    assert r["traced_peak"] >= r["traced_done"] > 0
    assert {"rss_loaded", "rss_shown", "rss_done"} <= set(r)
