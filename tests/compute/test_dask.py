"""Lazy (chunked) ensembles give the in-memory results: TRPES, contributions, populations, flags.

Check values throughout: the in-memory result on the same ensemble (computed
independently, not published); the lazy path must agree to 1e-12 relative.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ensemblelab import load
from ensemblelab.compute.kinetics.populations import populations
from ensemblelab.compute.spectroscopy import compute_trpes, contributions
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.compute.structures.outliers import flag_trajectories
from ensemblelab.io.chunked import save_chunked
from ensemblelab.testing import make_toy_ensemble

pytest.importorskip("dask")
RTOL = 1e-12  # the tolerance for lazy vs in-memory

KW = {"probe": GaussianPulse(photon_energy=5.0, fwhm=30.0),
      "pump": GaussianPulse(photon_energy=4.0, fwhm=20.0),
      "kinetic_energies": np.linspace(0.0, 2.0, 81), "delays": np.arange(-40.0, 121.0, 8.0),
      "progress": False}


def _demo_or_toy():
    try:
        from ensemblelab.demo import make_ensemble
    except ImportError:
        return make_toy_ensemble(24, t_max=100.0, ragged=True, seed=7)
    return make_ensemble(n_trajectories=24, seed=7)


@pytest.fixture(scope="module", params=["demo", "many_chunks"])
def pair(request, tmp_path_factory):
    if request.param == "demo":
        ens, size = _demo_or_toy(), 5
    else:  # a generated ensemble split into many chunks of 2 trajectories
        ens, size = make_toy_ensemble(41, t_max=90.0, ragged=True, seed=11), 2
    path = save_chunked(ens, tmp_path_factory.mktemp(request.param) / "s.ens", chunk_size=size)
    lazy = load(path, lazy=True)
    assert lazy.n_chunks == -(-ens.n_trajectories // size)
    return ens, lazy


def _close(a, b):
    scale = np.nanmax(np.abs(a)) if np.size(a) else 1.0
    np.testing.assert_allclose(a, b, rtol=RTOL, atol=RTOL * scale)


@pytest.mark.parametrize("by", [None, "neutral", "pair"])
def test_lazy_trpes_equals_in_memory(pair, by):
    ens, lazy = pair
    ref = compute_trpes(ens, decompose=by, **KW)
    got = compute_trpes(lazy, decompose=by, **KW)
    _close(got.intensity, ref.intensity)
    _close(got.alive, ref.alive)
    assert np.all(np.isfinite(ref.alive_count))
    _close(got.alive_count, ref.alive_count)
    assert sorted(got.components) == sorted(ref.components)
    for k in ref.components:
        _close(got.components[k], ref.components[k])
    assert got.params == ref.params
    assert np.abs(ref.intensity).max() > 0  # a real map, not zeros on both sides


@pytest.mark.parametrize("photon", [4.0, 4.2])
def test_lazy_trpes_with_partly_closed_channels(pair, photon):
    # the probe opens the S2 channel (IP 3.5 eV) but not the S1 one (IP 4.5 eV, at least
    # 0.3 eV = 11 probe standard deviations above, where the probe spectrum's tail gives no
    # sticks; computed independently (not published)): the chunks
    # are partly open and the stick energy range is read from the chunks, not the manifest
    ens, lazy = pair
    kw = {**KW, "probe": GaussianPulse(photon_energy=photon, fwhm=30.0)}
    ref = compute_trpes(ens, decompose="cation", **kw)
    got = compute_trpes(lazy, decompose="cation", **kw)
    _close(got.intensity, ref.intensity)
    assert got.params == ref.params
    assert 0 < got.params["n_sticks"] < ens.n_snapshots  # some channels closed, some open


def test_lazy_trpes_without_manifest_summaries(pair, tmp_path):
    # a store whose manifest lacks the per-chunk summaries (time steps, IP range, times)
    # is read with a pass over the chunks and gives the same map
    import json
    import shutil

    ens, lazy = pair
    copy = tmp_path / "old.ens"
    shutil.copytree(lazy.path, copy)
    manifest = json.loads((copy / "manifest.json").read_text())
    for rec in manifest["chunks"]:
        for key in ("dt_values", "dt_counts", "ip_min", "ip_max", "n_times"):
            rec.pop(key)
        (copy / rec["dir"] / "times.npy").unlink()
    (copy / "manifest.json").write_text(json.dumps(manifest))
    old = load(copy, lazy=True)
    _close(compute_trpes(old, **KW).intensity, compute_trpes(ens, **KW).intensity)
    np.testing.assert_array_equal(old.times, ens.times)


@pytest.mark.parametrize("scheduler", ["threads", "synchronous"])
def test_lazy_trpes_schedulers(pair, scheduler):
    ens, lazy = pair
    got = compute_trpes(lazy, scheduler=scheduler, **KW)
    _close(got.intensity, compute_trpes(ens, **KW).intensity)


@pytest.mark.parametrize("by", ["snapshot", "traj", "active"])
def test_lazy_contributions_equal_in_memory(pair, by):
    ens, lazy = pair
    region = {"energy_range": (0.4, 1.6), "delay_range": (0.0, 60.0), "group_by": by}
    ref = contributions(ens, compute_trpes(ens, **KW), **region)
    got = contributions(lazy, compute_trpes(lazy, **KW), **region)
    assert len(ref) > 0
    pd.testing.assert_frame_equal(got, ref, rtol=RTOL, check_dtype=False)
    assert got.attrs["total"] == pytest.approx(ref.attrs["total"], rel=RTOL)


def test_lazy_contributions_of_an_in_memory_map(pair):
    ens, lazy = pair
    m = compute_trpes(ens, **KW)  # the map does not know the lazy ensemble: grid is rebuilt
    region = {"energy_range": (0.4, 1.6), "delay_range": (0.0, 60.0), "group_by": "traj"}
    pd.testing.assert_frame_equal(contributions(lazy, m, **region),
                                  contributions(ens, m, **region), rtol=RTOL)


@pytest.mark.parametrize(("kind", "method"), [("active", "wilson"), ("amplitudes", "wilson"),
                                              ("diabatic", "bootstrap")])
def test_lazy_populations_equal_in_memory(pair, kind, method):
    ens, lazy = pair
    if kind == "diabatic" and ens.adt is None:
        pytest.skip("no ADT matrices")
    ref = populations(ens, kind=kind, interval=method, n_boot=40)
    got = populations(lazy, kind=kind, interval=method, n_boot=40)
    pd.testing.assert_frame_equal(got, ref, rtol=RTOL)
    assert got.attrs == ref.attrs


def test_lazy_populations_on_a_grid_with_exclusions(pair):
    ens, lazy = pair
    ex = ens.trajectories["traj"].to_numpy()[::3]
    kw = {"time_grid": np.linspace(0.0, 80.0, 17), "exclude": ex, "weights": "uniform"}
    pd.testing.assert_frame_equal(populations(lazy, **kw), populations(ens, **kw), rtol=RTOL)


def test_lazy_flags_equal_in_memory(pair):
    ens, lazy = pair
    th = {"hop_gap": 2.0, "drift_reject": 2.0}
    ref = flag_trajectories(ens, thresholds=th)
    got = flag_trajectories(lazy, thresholds=th)
    pd.testing.assert_frame_equal(got, ref, rtol=RTOL)
    assert ref["flagged"].any()  # the ragged ensemble has early ends to find


def test_lazy_trpes_on_a_local_cluster(pair):
    distributed = pytest.importorskip("distributed")
    ens, lazy = pair
    # two workers talking TCP on loopback (threads in this process keep the test fast)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                       host="127.0.0.1", protocol="tcp://",
                                       dashboard_address=None)
    try:
        with distributed.Client(cluster) as client:
            got = compute_trpes(lazy, client=client, **KW)
            pops = populations(lazy, client=client)
    finally:
        cluster.close()
    _close(got.intensity, compute_trpes(ens, **KW).intensity)
    pd.testing.assert_frame_equal(pops, populations(ens), rtol=RTOL)


def test_bench_scale_smoke(tmp_path):
    import importlib.util
    from pathlib import Path

    file = Path(__file__).resolve().parents[2] / "benchmarks" / "bench_scale.py"
    spec = importlib.util.spec_from_file_location("bench_scale", file)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    path = tmp_path / "s.ens"
    bench.generate(path, n_trajectories=7, n_steps=40, chunk_size=3, progress=False)
    bench._warm_up(path)
    lazy = bench.lazy_run(path, progress=False)
    mem = bench.memory_run(path, n_subset=7)
    # same trajectories both ways: the same sticks, one per snapshot (every channel is
    # open at 5 eV; computed independently, not published)
    assert lazy["n_sticks"] == mem["n_sticks"] == 7 * 40
    part = bench.load_subset(path, n_subset=4)  # a chunk and a part of the next
    np.testing.assert_array_equal(part.trajectories["traj"].to_numpy(), np.arange(4))
    assert part.n_snapshots == 4 * 40 and part.dyson.shape == (4 * 40, 1)
