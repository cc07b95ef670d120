"""Time ``ensemblelab report`` on the shipped 80-trajectory demo, section by section.

Run from the repository root:

    python benchmarks/bench_report.py             # CLI end to end (3 rounds) + sections
    python benchmarks/bench_report.py --rounds 5  # more rounds of the CLI and its peer
    python benchmarks/bench_report.py --quick     # in-process build only (no CLI run)

Prints, from one run: the command-line report end to end, as a user types it (a fresh
interpreter: imports, loading the 80 extended-XYZ files, the report; wall and CPU time),
``ensemblelab report demo_data/ensemble`` and ``ensemblelab report`` (the default demo,
which adds the transient-absorption section), interleaved round by round with its peer:
the start-up of a bare ``python -c "import numpy, pandas, matplotlib.figure"`` (the
floor any such command pays), as best and range over the rounds, the ratio of the bests
and the 8 s goal; then the in-process
``build_report`` with every section's wall time and share of the total (the sections are
each other's peers), and the clustering section's main call with and without the
small-input thread limit (:func:`ensemblelab.compute._threads.few_threads`), as a ratio.
Absolute times are noisy on a shared machine (the load average is printed); CPU time
shows how much of the wall time was waiting for a core. The demo data are invented.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data" / "ensemble"


#: the report's goal on the demo, end to end (seconds, wall)
GOAL_S = 8.0
#: the peer: a bare interpreter importing what every such command imports
PEER = [sys.executable, "-c", "import numpy, pandas, matplotlib.figure"]


def _timed(cmd: list[str]) -> tuple[float, float]:
    """(wall, CPU) seconds of `cmd` in a new process (output discarded)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, cwd=ROOT, stdout=subprocess.DEVNULL,
                   stderr=subprocess.DEVNULL, env={**os.environ, "PYTHONPATH": str(ROOT)})
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def cli_report(out: Path, data: Path | None = DEMO) -> tuple[float, float]:
    """(wall, CPU) seconds of ``python -m ensemblelab report [DATA] --out OUT`` (a new
    process; no DATA: the default demo)."""
    path = [] if data is None else [str(data)]
    return _timed([sys.executable, "-m", "ensemblelab", "report", *path, "--out", str(out),
                   "--overwrite"])


def cli_rounds(tmp: Path, rounds: int) -> dict[str, list[tuple[float, float]]]:
    """Peer and both CLI calls, interleaved round by round (each a list of (wall, CPU))."""
    out: dict[str, list[tuple[float, float]]] = {"peer": [], "path": [], "default": []}
    for _ in range(rounds):
        out["peer"].append(_timed(PEER))
        out["path"].append(cli_report(tmp / "cli"))
        out["default"].append(cli_report(tmp / "cli_default", None))
    return out


def _spread(rows: list[tuple[float, float]], i: int) -> str:
    vals = sorted(r[i] for r in rows)
    return f"{vals[0]:.2f} s (range {vals[0]:.2f}-{vals[-1]:.2f})"


def in_process(out: Path, data: Path = DEMO) -> dict[str, float]:
    """Per-section wall times of build_report on the loaded `data` (after a warm-up run)."""
    import ensemblelab as el
    from ensemblelab.report import build_report

    t0 = time.perf_counter()
    ens = el.load(data, nonfinite="keep", progress=False)
    t_load = time.perf_counter() - t0
    build_report(ens, out, overwrite=True, progress=False)  # warm: numba kernels, caches
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    build_report(ens, out, overwrite=True, progress=False, timings=timings)
    timings["total"] = time.perf_counter() - t0
    timings["load (not in total)"] = t_load
    return timings


def clustering_threads() -> tuple[float, float]:
    """(seconds with the library thread pools, seconds limited to one thread)."""
    from threadpoolctl import threadpool_limits

    import ensemblelab as el
    from ensemblelab.compute import _threads
    from ensemblelab.compute.structures.clustering import cluster_snapshots

    ens = el.load(DEMO, nonfinite="keep", progress=False)
    cluster_snapshots(ens, n_clusters=3)
    limit = _threads.THREADED_MIN_ROWS
    try:
        _threads.THREADED_MIN_ROWS = 0  # pools as the libraries set them
        with threadpool_limits(limits=None):
            t0 = time.perf_counter()
            a = cluster_snapshots(ens, n_clusters=3)
            t_pools = time.perf_counter() - t0
    finally:
        _threads.THREADED_MIN_ROWS = limit
    t0 = time.perf_counter()
    b = cluster_snapshots(ens, n_clusters=3)
    t_one = time.perf_counter() - t0
    if not (a.labels == b.labels).all():
        raise AssertionError("thread limit changed the cluster labels")
    return t_pools, t_one


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="skip the CLI runs")
    parser.add_argument("--rounds", type=int, default=3, help="rounds of the CLI runs (3)")
    args = parser.parse_args()
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"
          + ("; PYTHONDONTWRITEBYTECODE is set (modules compiled from source every run)"
             if os.environ.get("PYTHONDONTWRITEBYTECODE") else ""))
    with tempfile.TemporaryDirectory() as tmp:
        if not args.quick:
            runs = cli_rounds(Path(tmp), max(1, args.rounds))
            peer = min(w for w, _ in runs["peer"])
            print(f"CLI end to end, new process, best of {max(1, args.rounds)} interleaved "
                  f"rounds (wall; CPU = user + system):")
            print(f"  peer: python -c 'import numpy, pandas, matplotlib.figure'   "
                  f"wall {_spread(runs['peer'], 0)}, CPU {_spread(runs['peer'], 1)}")
            for key, name in (("path", "ensemblelab report demo_data/ensemble"),
                              ("default", "ensemblelab report (default demo, + absorption)")):
                best = min(w for w, _ in runs[key])
                print(f"  {name}: wall {_spread(runs[key], 0)}, CPU {_spread(runs[key], 1)}; "
                      f"{best / peer:.1f}x the peer; goal <= {GOAL_S:g} s: "
                      f"{'met' if best <= GOAL_S else 'NOT met'}")
        t = in_process(Path(tmp) / "lib")
    total = t["total"]
    print(f"build_report in process (ensemble loaded; second run): {total:.2f} s")
    for key, val in t.items():
        if key != "total":
            share = f"{100 * val / total:5.1f} %" if "not in total" not in key else "      "
            print(f"  {key:40s} {val:6.2f} s  {share}")
    t_pools, t_one = clustering_threads()
    print(f"cluster_snapshots on the demo: library thread pools {t_pools:.2f} s, "
          f"one thread (few_threads) {t_one:.2f} s: {t_pools / t_one:.1f}x; same labels")


if __name__ == "__main__":
    main()
