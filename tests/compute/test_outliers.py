"""Outlier trajectories: every injected fault kind is found with its reason and first bad time."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest

from ensemblelab.compute.structures.outliers import (
    OutlierThresholds,
    flag_trajectories,
    kinetic_energy,
)
from ensemblelab.errors import SchemaError

sys.path.insert(0, str(Path(__file__).parent))
from _structures_synth import FAULT_KINDS, build, inject, make_clean  # noqa: E402

STEP = 30  # faults start at step 30 (t = 15 fs with dt = 0.5 fs)


@pytest.fixture(scope="module")
def faulty():
    d = make_clean(40, seed=1)
    truth = {k: (kind, inject(d, k, kind, STEP)) for k, kind in enumerate(FAULT_KINDS)}
    return build(d), truth, d


def test_every_fault_kind_flagged_with_reason_and_first_bad_time(faulty):
    ens, truth, d = faulty
    table = flag_trajectories(ens).set_index("traj")
    words = {"energy_drift": "drifted", "energy_jump": "jumped", "large_gap_hop": "gap",
             "norm_error": "sum to", "nonfinite": "non-finite", "missing_steps": "missing",
             "early_end": "ended", "topology_change": "bond 2-3 (O-H) broken"}
    for traj_id, (kind, t_bad) in truth.items():
        row = table.loc[traj_id]
        assert row["flagged"], (kind, row["reason"])
        kinds = row["flags"].split(";")
        assert kind in kinds
        assert ";" not in "".join(r for r in row["reason"].split("; "))
        reasons = row["reason"].split("; ")
        assert len(reasons) == len(kinds)
        assert words[kind] in reasons[kinds.index(kind)]
        if t_bad is None:
            # flying H: first time the O-H distance exceeds 1.2 * 1.25 * (0.66 + 0.31) A
            # (covalent radii from memory, Dalton Trans. 2008), computed independently here
            rows = np.flatnonzero(d["traj"] == traj_id)
            r = np.linalg.norm(d["geometries"][rows, 3] - d["geometries"][rows, 2], axis=1)
            t_bad = d["time"][rows][np.argmax(r > 1.2 * 1.25 * (0.66 + 0.31))]
        assert row["first_bad_time"] == pytest.approx(t_bad, abs=1e-9), kind


def test_clean_trajectories_not_flagged(faulty):
    ens, truth, _ = faulty
    table = flag_trajectories(ens)
    clean = table[~table["traj"].isin(list(truth))]
    assert not clean["flagged"].any(), clean.loc[clean.flagged, "reason"].tolist()
    assert clean["first_bad_time"].isna().all()
    # the multivariate score is reported but not counted as broken by default
    assert table["score"].notna().all()
    assert (table.loc[table.unusual, "flags"].str.contains("unusual")).all()


def test_without_flagged_returns_new_clean_ensemble(faulty):
    ens, truth, _ = faulty
    table = flag_trajectories(ens, multivariate=False)
    clean = ens.without(table[table.flagged])
    assert set(clean.trajectories["traj"]) == set(range(len(FAULT_KINDS), 40))
    assert ens.n_trajectories == 40  # source untouched


def test_thresholds_are_tunable(faulty):
    ens, truth, _ = faulty
    loose = flag_trajectories(ens, thresholds={"hop_gap": 5.0}, multivariate=False)
    assert "large_gap_hop" not in loose.loc[2, "flags"]
    strict = flag_trajectories(ens, thresholds=OutlierThresholds(norm=1e-6), multivariate=False)
    assert "norm_error" in strict.loc[3, "flags"]
    with pytest.raises(SchemaError, match="unknown field"):
        flag_trajectories(ens, thresholds={"hopgap": 1.0})
    counted = flag_trajectories(
        ens, thresholds={"broken_kinds": ("unusual",)}, random_state=0)
    assert counted["flagged"].sum() == counted["unusual"].sum()


def test_end_ok_states_and_small_gap_option():
    d = make_clean(10, seed=2)
    inject(d, 0, "early_end", 60)  # ends on S1 (after its hop)
    ens = build(d)
    assert "early_end" in flag_trajectories(ens, multivariate=False).loc[0, "flags"]
    last_state = int(ens.trajectory(0).snapshots["active"].iloc[-1])
    ok = flag_trajectories(ens, thresholds={"end_ok_states": (last_state,)},
                           multivariate=False)
    assert "early_end" not in ok.loc[0, "flags"]
    gap = flag_trajectories(ens, thresholds={"s1s0_gap": 5.0}, multivariate=False)
    # S1-S0 is ~3 eV < 5 eV whenever on S1; traj 0 may end before reaching S1
    assert gap["flags"].iloc[1:].str.contains("small_s1s0_gap").all()


def test_kinetic_energy_units():
    # 1 amu at 1 Angstrom/fs: (1/2) m v^2 = 0.5 * 1.66053906660e-27 kg * 1e10 m^2/s^2 / e
    # = 51.8... eV (CODATA via scipy.constants; computed independently here)
    from scipy import constants as sc

    expected = 0.5 * sc.physical_constants["atomic mass constant"][0] * 1e10 / sc.e
    e = kinetic_energy(np.array([[[1.0, 0, 0]]]), np.array([1.0]))
    assert e[0] == pytest.approx(expected, rel=1e-14)
    assert expected == pytest.approx(51.8, abs=0.1)


@pytest.mark.skipif(importlib.util.find_spec("ensemblelab.demo") is None,
                    reason="demo ensemble not available")
def test_demo_injected_faults_recall_and_false_positives():
    # issue requirement: recall 100 % on the demo's injected faults, false positives <= 5 %
    # of the clean trajectories (ground truth: ens.metadata["injected_faults"])
    import inspect

    from ensemblelab import demo

    if not hasattr(demo, "make_ensemble") or \
            "faults" not in inspect.signature(demo.make_ensemble).parameters:
        pytest.skip("demo.make_ensemble has no faults option yet")
    ens = demo.make_ensemble(faults=True)
    truth = {int(k): v for k, v in ens.metadata["injected_faults"].items()}
    # default thresholds (common practice, common practice): the demo model hops near
    # its crossing seams, so its ordinary hops stay below the 0.5 eV hop-gap threshold
    # (99th percentile about 0.44 eV, computed independently, not published) while the
    # injected large-gap hop (several eV) stands far above it
    hops = ens.hops()
    clean_hops = hops[~hops["traj"].isin(list(truth))]
    assert clean_hops["gap"].quantile(0.99) < OutlierThresholds().hop_gap
    injected = hops.loc[hops["traj"].isin([k for k, v in truth.items() if v == "large_gap_hop"]),
                        "gap"]
    assert injected.max() > 4 * OutlierThresholds().hop_gap
    table = flag_trajectories(ens)
    flagged = set(table.loc[table.flagged, "traj"].astype(int))
    missed = {k: v for k, v in truth.items() if k not in flagged}
    assert not missed, missed
    clean = set(ens.trajectories["traj"].astype(int)) - set(truth)
    false_pos = flagged & clean
    assert len(false_pos) <= 0.05 * len(clean), table[table.traj.isin(false_pos)].reason.tolist()
