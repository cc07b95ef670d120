"""The reduction engine: reduce() itself, block sources, and one computation path.

Check values: naive sums and counts over the same ensemble (computed independently, not
published), and the in-memory result for the chunked store (the same partials must give
it to 1e-12 relative).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from ensemblelab import load
from ensemblelab.compute.engine import (
    BlockSource,
    EnsembleSource,
    add,
    as_source,
    median_from_counts,
    reduce,
    time_statistics,
)
from ensemblelab.compute.spectroscopy import compute_trpes, contributions, region_intensity
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.data.spectrum import TRPESMap
from ensemblelab.errors import SchemaError
from ensemblelab.io.chunked import save_chunked
from ensemblelab.testing import make_toy_ensemble

RTOL = 1e-12
KW = {"probe": GaussianPulse(photon_energy=5.0, fwhm=30.0),
      "pump": GaussianPulse(photon_energy=4.0, fwhm=20.0),
      "kinetic_energies": np.linspace(0.0, 2.0, 61), "delays": np.arange(-30.0, 91.0, 6.0),
      "progress": False}
REGION = {"energy_range": (0.4, 1.6), "delay_range": (0.0, 60.0)}


@pytest.fixture(scope="module")
def ens():
    return make_toy_ensemble(13, t_max=70.0, ragged=True, seed=5)


@pytest.fixture(scope="module")
def lazy(ens, tmp_path_factory):
    pytest.importorskip("dask")
    path = save_chunked(ens, tmp_path_factory.mktemp("engine") / "s.ens", chunk_size=3)
    return load(path, lazy=True)


def _count_per_state(block, span, n_states):
    """A toy partial: snapshots per active state, and the trajectory rows it saw."""
    active = block.snapshots["active"].to_numpy()
    return {"count": np.bincount(active, minlength=n_states).astype(np.int64),
            "rows": np.arange(span.traj_start, span.traj_start + span.n_trajectories)}


def _merge(a, b):
    return {"count": a["count"] + b["count"], "rows": np.concatenate([a["rows"], b["rows"]])}


def test_reduce_counts_snapshots_like_a_naive_sum(ens, lazy):
    # naive twin: bincount over every snapshot of the in-memory ensemble
    naive = np.bincount(ens.snapshots["active"].to_numpy(), minlength=ens.n_states)
    for source in (as_source(ens), lazy):
        out = reduce(source, _count_per_state, _merge, args=(ens.n_states,), fields=[],
                     scheduler="synchronous")
        np.testing.assert_array_equal(out["count"], naive)
        # every trajectory row seen exactly once, in order
        np.testing.assert_array_equal(out["rows"], np.arange(ens.n_trajectories))
    assert lazy.n_chunks == 5  # 13 trajectories in blocks of 3 (computed independently)


def test_reduce_without_combine_returns_block_results_in_order(lazy):
    sizes = reduce(lazy, lambda b, span: (span.index, b.n_snapshots), None, fields=[],
                   scheduler="synchronous")
    assert [i for i, _ in sizes] == list(range(lazy.n_chunks))
    assert sum(n for _, n in sizes) == lazy.n_snapshots


def test_reduce_on_a_subset_and_finish(lazy):
    spans = lazy.spans()
    got = reduce(lazy, lambda b, span: b.n_trajectories, add, finish=lambda n: 2 * n,
                 fields=[], indices=[1, 3], scheduler="synchronous")
    assert got == 2 * (spans[1].n_trajectories + spans[3].n_trajectories)


def test_sources_implement_the_protocol(ens, lazy):
    assert isinstance(as_source(ens), EnsembleSource)
    assert isinstance(lazy, BlockSource) and as_source(lazy) is lazy
    with pytest.raises(SchemaError, match="'ens' parameter"):
        as_source(np.zeros(3))


def test_time_statistics_from_manifest_equal_a_pass_over_the_data(ens, lazy):
    mem, lz = time_statistics(as_source(ens)), time_statistics(lazy)
    time, traj = ens.snapshots["time"].to_numpy(), ens.snapshots["traj"].to_numpy()
    dt = np.diff(time)[traj[1:] == traj[:-1]]
    assert mem["median_step"] == lz["median_step"] == float(np.median(dt))
    assert (mem["t_min"], mem["t_max"]) == (lz["t_min"], lz["t_max"]) == (time.min(), time.max())


@pytest.mark.parametrize("counts", [[3], [1, 1], [2, 1, 4], [5, 5]])
def test_median_from_counts_equals_numpy_median(counts):
    values = np.array([0.5, 1.0, 2.5, 4.0])[:len(counts)]
    expanded = np.repeat(values, counts)
    assert median_from_counts(values, np.array(counts)) == float(np.median(expanded))


def test_one_path_map_contributions_populations_flags(ens, lazy):
    from ensemblelab.compute.kinetics.populations import populations
    from ensemblelab.compute.structures.outliers import flag_trajectories

    ref, model = compute_trpes(ens, decompose="neutral", return_model=True, **KW)
    got, lazy_model = compute_trpes(lazy, decompose="neutral", return_model=True, **KW)
    scale = np.abs(ref.intensity).max()
    assert scale > 0
    np.testing.assert_allclose(got.intensity, ref.intensity, rtol=RTOL, atol=RTOL * scale)
    assert lazy_model.sticks is None and model.sticks.n_sticks == ref.params["n_sticks"]
    for group in ("snapshot", "traj"):
        a = contributions(ens, ref, group_by=group, model=model, **REGION)
        b = contributions(lazy, got, group_by=group, model=lazy_model, **REGION)
        c = contributions(lazy, got, group_by=group, **REGION)  # grid rebuilt from params
        assert len(a) > 0
        pd.testing.assert_frame_equal(b, a, rtol=RTOL, check_dtype=False)
        pd.testing.assert_frame_equal(c, a, rtol=RTOL, check_dtype=False)
    pd.testing.assert_frame_equal(populations(lazy, interval="bootstrap", n_boot=30),
                                  populations(ens, interval="bootstrap", n_boot=30), rtol=RTOL)
    th = {"hop_gap": 2.0, "drift_reject": 2.0}
    pd.testing.assert_frame_equal(flag_trajectories(lazy, thresholds=th),
                                  flag_trajectories(ens, thresholds=th), rtol=RTOL)


def test_model_given_or_rebuilt_gives_the_same_region(ens):
    m, model = compute_trpes(ens, return_model=True, **KW)
    with_model = region_intensity(ens, m, model=model, **REGION)
    rebuilt = region_intensity(ens, m, **REGION)  # the map alone: model from its params
    assert with_model.sum() > 0
    np.testing.assert_allclose(with_model, rebuilt, rtol=RTOL, atol=0.0)
    other = make_toy_ensemble(5, seed=2)
    with pytest.raises(SchemaError, match="'model' parameter"):
        region_intensity(other, m, model=model, **REGION)


def test_trpes_map_has_no_attributes_beyond_its_fields(ens):
    m = compute_trpes(ens, **KW)
    declared = {f.name for f in dataclasses.fields(TRPESMap)}
    assert not hasattr(m, "__dict__")  # slots: nothing can be attached afterwards
    assert set(TRPESMap.__slots__) == declared
    with pytest.raises((AttributeError, TypeError)):
        object.__setattr__(m, "_model", None)


def test_chunked_model_refuses_a_width_it_cannot_rebroaden(lazy):
    _, model = compute_trpes(lazy, return_model=True, **KW)
    kw = {k: KW[k] for k in ("kinetic_energies", "delays")}
    model.broaden(resolution=0.5, **kw)  # wider sticks: the moments still serve
    narrow = GaussianPulse(photon_energy=5.0, fwhm=300.0)  # 10x narrower sticks
    with pytest.raises(SchemaError, match="chunked store"):
        model.broaden(probe=narrow, **kw)
