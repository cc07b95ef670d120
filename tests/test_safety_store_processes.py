"""Crash and concurrency safety of the native store, with real processes.

``kill -9`` of a writer at random moments, two writers on one store, and readers
during saves. Each test runs subprocesses and is bounded in time.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from ensemblelab import load, save
from ensemblelab.errors import StoreError
from ensemblelab.io._safety import writer_lock
from ensemblelab.testing import assert_ensemble_equal, make_toy_ensemble

ROOT = Path(__file__).resolve().parents[1]
#: the two versions the writers alternate between (invented toy data)
VERSIONS = {"A": dict(n_trajectories=120, seed=1), "B": dict(n_trajectories=90, seed=2)}


def _child(code: str, *args: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code), *args], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _which(ens, expected: dict) -> str:
    """The name of the version `ens` equals exactly (AssertionError when it is a mix)."""
    for name, ref in expected.items():
        if ens.n_trajectories == ref.n_trajectories:
            assert_ensemble_equal(ens, ref)
            return name
    raise AssertionError(f"loaded {ens.n_trajectories} trajectories: neither version")


WRITER = """
    import sys
    from ensemblelab import save
    from ensemblelab.errors import StoreError
    from ensemblelab.testing import make_toy_ensemble
    path, seconds = sys.argv[1], float(sys.argv[2])
    versions = [make_toy_ensemble(120, seed=1), make_toy_ensemble(90, seed=2)]
    print("ready", flush=True)
    import time
    end = time.monotonic() + seconds
    saved = refused = 0
    i = 0
    while time.monotonic() < end:
        try:
            save(versions[i % 2], path, overwrite=True)
            saved += 1
        except StoreError as exc:
            assert "being written by another process" in str(exc), str(exc)
            refused += 1
        i += 1
    print(f"done {saved} {refused}", flush=True)
"""


def test_kill_9_during_save_never_loses_the_store_and_leaks_nothing(tmp_path):
    expected = {k: make_toy_ensemble(**v) for k, v in VERSIONS.items()}
    path = tmp_path / "s"
    save(expected["A"], path)
    rng = random.Random(14)
    trials = 12
    seen = set()
    for _ in range(trials):
        proc = _child(WRITER, str(path), "1e9")
        assert proc.stdout.readline().strip() == "ready", proc.stderr.read()
        time.sleep(rng.uniform(0.0, 0.4))  # a random point inside the save loop
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        proc.stdout.close()
        proc.stderr.close()
        # at every instant the path holds one complete version, never a mix or nothing
        seen.add(_which(load(path), expected))
    assert seen  # at least one version loaded after each kill
    # the next save cleans whatever the killed writers left: one version folder, no siblings
    save(expected["B"], path, overwrite=True)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s"]
    versions = [p.name for p in path.iterdir() if p.name.startswith("v-")]
    assert len(versions) == 1, versions
    assert_ensemble_equal(load(path), expected["B"])


def test_kill_9_during_first_save_leaves_nothing_that_blocks_the_next(tmp_path):
    path = tmp_path / "new"
    proc = _child(f"""
        from ensemblelab import save
        from ensemblelab.io import _versioned
        from ensemblelab.testing import make_toy_ensemble
        ens = make_toy_ensemble(120, seed=1)
        real = _versioned.StoreTransaction.commit
        def stop(self, *a, **k):
            print("ready", flush=True)
            import time; time.sleep(60)
        _versioned.StoreTransaction.commit = stop
        save(ens, {str(path)!r})
    """)
    assert proc.stdout.readline().strip() == "ready", proc.stderr.read()
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stdout.close()
    proc.stderr.close()
    assert not path.exists()  # never a half-written store at the path
    leftovers = [p.name for p in tmp_path.iterdir()]
    assert leftovers and all(n.startswith(".new.new-") for n in leftovers)  # the staging copy
    ens = make_toy_ensemble(40, seed=3)
    save(ens, path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["new"]  # stale copy cleaned
    assert_ensemble_equal(load(path), ens)


def test_two_writers_and_a_reader_see_whole_versions_only(tmp_path):
    expected = {k: make_toy_ensemble(**v) for k, v in VERSIONS.items()}
    path = tmp_path / "s"
    save(expected["A"], path)
    writers = [_child(WRITER, str(path), "4.0") for _ in range(2)]
    for w in writers:
        assert w.stdout.readline().strip() == "ready", w.stderr.read()
    loads = 0
    counts = {"A": 0, "B": 0}
    end = time.monotonic() + 4.0
    while time.monotonic() < end:
        counts[_which(load(path), expected)] += 1
        loads += 1
    results = []
    for w in writers:
        out, err = w.communicate(timeout=60)
        assert w.returncode == 0, err  # no raw FileNotFoundError / ENOTEMPTY in a writer
        results.append([int(x) for x in out.split()[1:]])
    saved = sum(r[0] for r in results)
    refused = sum(r[1] for r in results)
    print(f"\n{loads} loads during {saved} saves ({refused} refused with the lock message): "
          f"{counts}")
    assert saved > 0 and loads > 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s"]  # no leaked folders
    assert len([p for p in path.iterdir() if p.name.startswith("v-")]) == 1


def test_second_writer_gets_a_clear_lock_error(tmp_path):
    path = save(make_toy_ensemble(4), tmp_path / "s")
    with writer_lock(path / ".lock", store=path):  # as if another process were saving
        with pytest.raises(StoreError, match="being written by another process"):
            save(make_toy_ensemble(5, seed=1), path, overwrite=True)
    save(make_toy_ensemble(5, seed=1), path, overwrite=True)  # free again
    assert load(path).n_trajectories == 5
    assert json.loads((path / "manifest.json").read_text())["layout"] == "single"
