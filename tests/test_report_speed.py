"""The report's speed measures: progress shown, section timings, one thread on small inputs.

Results must not change: cluster labels with and without the thread limit are compared
(computed independently (not published): the same estimator with the libraries' own
thread pools), and the distance kernel against scipy.spatial.distance.pdist (reference
library).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from sklearn.cluster import KMeans
from threadpoolctl import threadpool_info

from ensemblelab.compute import _threads
from ensemblelab.compute.structures import _kernels_geometry as K
from ensemblelab.compute.structures.clustering import cluster_snapshots
from ensemblelab.testing import make_toy_ensemble


def _max_threads() -> int:
    return max((p["num_threads"] for p in threadpool_info()), default=1)


def test_few_threads_limits_small_inputs_only():
    if _max_threads() < 2:
        pytest.skip("one core: nothing to limit")
    before = _max_threads()
    with _threads.few_threads(1000):
        assert _max_threads() == 1
    assert _max_threads() == before
    with _threads.few_threads(_threads.THREADED_MIN_ROWS):
        assert _max_threads() == before


class _RecordingKMeans(KMeans):
    """KMeans that records the largest thread-pool size seen while fitting."""

    seen: list[int] = []

    def fit(self, X, y=None, sample_weight=None):
        _RecordingKMeans.seen.append(_max_threads())
        return super().fit(X, y, sample_weight)


def test_clustering_small_groups_fit_on_one_thread():
    if _max_threads() < 2:
        pytest.skip("one core: nothing to limit")
    _RecordingKMeans.seen = []
    ens = make_toy_ensemble(12, seed=3, t_max=80.0)
    cluster_snapshots(ens, estimator=_RecordingKMeans(n_clusters=2, n_init=2, random_state=0))
    assert _RecordingKMeans.seen and max(_RecordingKMeans.seen) == 1


@pytest.mark.parametrize("seed", [0, 5])
def test_thread_limit_keeps_cluster_labels(seed, monkeypatch):
    # computed independently (not published): the same clustering with the thread pools
    ens = make_toy_ensemble(25, seed=seed, t_max=150.0)
    limited = cluster_snapshots(ens, n_clusters=3, random_state=seed)
    monkeypatch.setattr(_threads, "THREADED_MIN_ROWS", 0)
    pooled = cluster_snapshots(ens, n_clusters=3, random_state=seed)
    assert (limited.labels == pooled.labels).all()
    np.testing.assert_allclose(limited.summary["fraction"], pooled.summary["fraction"],
                               atol=1e-12)


@pytest.mark.parametrize("n_atoms", [2, 5, 11])
def test_pair_distances_match_scipy_pdist(n_atoms):
    # reference library: scipy.spatial.distance.pdist (row-major i < j order)
    X = np.random.default_rng(n_atoms).normal(scale=3.0, size=(17, n_atoms, 3))
    i, j = K.pair_indices(n_atoms)
    got = K.pair_distances(X, i, j)
    np.testing.assert_allclose(got, np.stack([pdist(x) for x in X]), rtol=1e-14, atol=0)
    # arbitrary index arrays (bond lists) with repeats
    ii, jj = np.array([0, 1, 0, 1]), np.array([1, 0, n_atoms - 1, 1])
    expect = np.linalg.norm(X[:, ii] - X[:, jj], axis=-1)
    np.testing.assert_allclose(K.pair_distances(X, ii, jj), expect, rtol=1e-14, atol=0)


def test_report_times_sections_and_shows_progress(tmp_path, capsys):
    from ensemblelab.report import build_report

    ens = make_toy_ensemble(10, seed=2, t_max=100.0, dt=4.0)
    timings: dict[str, float] = {}
    build_report(ens, tmp_path / "r", energies=np.linspace(0, 2.5, 41),
                 delays=np.arange(-40.0, 101.0, 20.0), n_boot=20, timings=timings)
    assert {"Flagged trajectories", "Time-resolved photoelectron spectrum", "Populations",
            "Clusters", "Page"} <= set(timings)
    assert all(v >= 0 for v in timings.values())
    assert "report" in capsys.readouterr().err  # the tqdm bar goes to stderr
    build_report(ens, tmp_path / "q", energies=np.linspace(0, 2.5, 41),
                 delays=np.arange(-40.0, 101.0, 20.0), n_boot=20, progress=False)
    assert "report" not in capsys.readouterr().err


def test_fast_csv_text_equals_pandas():
    # reference library: pandas.DataFrame.to_csv of the neutralised frame, cell for cell
    import pandas as pd

    from ensemblelab._csv import neutralise_frame, to_csv_text

    rng = np.random.default_rng(11)
    n = 3000
    with np.errstate(over="ignore"):
        v = rng.normal(size=n) * 10.0 ** rng.integers(-320, 300, n)
    v[::7], v[::11], v[::13], v[5] = np.nan, np.inf, -0.0, 5e-324
    words = np.array(["S0", "a,b", 'say "hi"', "two\nlines", "cr\rhere", " pad ",
                      "=SUM(A1)", "-x", "", "'q"],
                     dtype=object)
    text = pd.array(words[rng.integers(0, len(words), n)], dtype="string")
    text[3] = pd.NA
    df = pd.DataFrame({"delay, fs": v, "n": rng.integers(-10**12, 10**12, n),
                       "u": rng.integers(0, 5, n).astype(np.uint8), "flag": rng.random(n) > 0.5,
                       "=label": text, "obj": words[rng.integers(0, len(words), n)]})
    assert to_csv_text(df) == neutralise_frame(df).to_csv(index=False)
    for sub in (["delay, fs"], ["=label", "n"], ["obj"]):
        assert to_csv_text(df[sub]) == neutralise_frame(df[sub]).to_csv(index=False)


def test_bench_report_smoke(tmp_path):
    # the benchmark's in-process timing runs on a small written ensemble (keeps it alive)
    import importlib.util
    from pathlib import Path

    from ensemblelab.io import write_extxyz

    path = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_report.py"
    spec = importlib.util.spec_from_file_location("bench_report", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    data = write_extxyz(make_toy_ensemble(6, seed=1, t_max=60.0, dt=4.0), tmp_path / "d" / "x")
    t = mod.in_process(tmp_path / "r", data=data)
    assert t["total"] > 0 and "Clusters" in t and "Populations" in t


def test_trapezoid_weights_match_numpy_trapezoid():
    # reference library: numpy.trapezoid on a non-uniform grid (rows with NaN stay NaN)
    from ensemblelab.compute.observables.scattering import trapezoid_weights

    rng = np.random.default_rng(4)
    x = np.sort(rng.uniform(0.5, 10.0, size=37))
    y = rng.normal(size=(6, 37, 11))
    y[2, 5, :] = np.nan
    got = np.einsum("q,tqr->tr", trapezoid_weights(x), y)
    want = np.trapezoid(y, x, axis=1)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14)
    assert np.isnan(got[2]).all() and np.isnan(want[2]).all()
    assert trapezoid_weights(x[:1]).tolist() == [0.0]  # common practice: no interval


def test_scattering_pdf_equals_trapezoid_of_its_integrand():
    # reference library: numpy.trapezoid of delta_sm(q) sin(q r) exp(-k q^2) over q
    from ensemblelab.compute.observables import compute_scattering

    ens = make_toy_ensemble(6, seed=7, t_max=60.0)
    q = np.linspace(0.5, 8.0, 41)
    m = compute_scattering(ens, kind="xray", q=q, delays=np.linspace(0.0, 60.0, 7),
                           damping=0.03)
    kern = np.sin(q[:, None] * m.r[None, :]) * np.exp(-0.03 * q**2)[:, None]
    want = np.trapezoid(m.delta_sm[:, :, None] * kern[None], q, axis=1)
    np.testing.assert_allclose(m.delta_pdf, want, rtol=1e-10, atol=1e-12 * np.abs(want).max())


def test_vector_add8_decided_once_and_equal_to_scalar():
    # computed independently (not published): the scalar products, compiled and in Python
    numba = pytest.importorskip("numba")
    from ensemblelab.compute.spectroscopy._intrinsics import add8_scalar, pick_add8

    first = pick_add8(numba)
    assert pick_add8(numba) is first  # one probe compile per process, not one per kernel
    compiled = numba.njit(add8_scalar)

    @numba.njit
    def use(acc, row, v, d):
        first(acc, row, v, d)

    rng = np.random.default_rng(11)
    for _ in range(50):
        acc = rng.normal(size=12)
        a, b, c = acc.copy(), acc.copy(), acc.copy()
        v, d = rng.normal(size=2) * 5.0
        compiled(a, np.uint64(3), v, d)
        add8_scalar(b, np.uint64(3), v, d)
        use(c, np.uint64(3), v, d)
        assert np.array_equal(a, b) and np.array_equal(a, c)


def test_neutralise_frame_long_text_columns_cell_by_cell_equal():
    # computed independently (not published): the per-cell path on the same labels
    import pandas as pd

    from ensemblelab._csv import neutralise_cell, neutralise_frame

    labels = ["total", "=SUM(A1)", "+1.5", "-x", "'quoted", "@cmd", "S1"]
    rng = np.random.default_rng(2)
    col = [labels[i] for i in rng.integers(0, len(labels), size=300)]
    mixed = list(col)
    mixed[7], mixed[9] = None, 3  # non-text cells: per-cell path
    frame = pd.DataFrame({"component": col, "mixed": mixed, "value": rng.normal(size=300)})
    got = neutralise_frame(frame)
    for name in ("component", "mixed"):
        want = frame[name].map(neutralise_cell)
        assert got[name].tolist() == want.tolist()
        assert got[name].dtype == want.dtype
    assert got["component"].tolist().count("'=SUM(A1)") == col.count("=SUM(A1)")


@pytest.mark.parametrize("element", ["H", "D", "C", "N", "O", "F", "S", "Cl", "Fe", "Br", "I"])
def test_xray_form_factor_read_without_xraydb_equals_xraydb(element):
    # reference library: xraydb.f0 (Waasmaier-Kirfel fits), bit for bit
    xraydb = pytest.importorskip("xraydb")
    from ensemblelab.compute.observables.form_factors import q_to_x, xray_form_factor

    q = np.linspace(0.0, 25.0, 257)
    want = np.asarray(xraydb.f0("H" if element == "D" else element, q_to_x(q)), dtype=float)
    assert np.array_equal(xray_form_factor(element, q), want)


def test_xray_form_factor_does_not_import_xraydb():
    # common practice: measured by importing in a fresh interpreter
    import subprocess
    import sys

    pytest.importorskip("xraydb")
    code = ("import sys, numpy as np\n"
            "from ensemblelab.compute.observables.form_factors import xray_form_factor\n"
            "xray_form_factor('C', np.linspace(0.5, 10, 5))\n"
            "print('xraydb' in sys.modules, 'sqlalchemy' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "False"]


def test_csv_text_of_repeated_grid_columns_equals_pandas():
    # reference library: pandas.DataFrame.to_csv (shortest round-trip floats, NaN empty)
    import pandas as pd

    from ensemblelab._csv import to_csv_text

    rng = np.random.default_rng(3)
    grid = np.array([-0.0, 0.0, 0.1, 1e-300, -2.5, np.nan, np.inf, 1 / 3])
    frame = pd.DataFrame({"delay": rng.choice(grid, size=2000),
                          "energy": np.repeat(np.linspace(0.0, 5.0, 20), 100),
                          "value": rng.normal(size=2000)})
    text = to_csv_text(frame)
    assert text == frame.to_csv(index=False)
    assert "-0.0," in text and "\n0.0," in text.replace("\r\n", "\n")


def test_importing_the_report_leaves_heavy_libraries_for_later():
    # common practice: measured by importing in a fresh interpreter (sys.modules)
    import subprocess
    import sys

    heavy = ["scipy.stats", "scipy.interpolate", "scipy.optimize", "sklearn", "matplotlib",
             "numba"]
    code = ("import sys\nimport ensemblelab.report\n"
            f"print(' '.join(m for m in {heavy!r} if m in sys.modules))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == ""
    # the names moved behind the lazy import still resolve, to the same objects
    code = ("import ensemblelab.compute.spectroscopy as S\n"
            "from ensemblelab.compute.spectroscopy.compare import compare_maps\n"
            "from ensemblelab.compute.spectroscopy import fit_measured_map, MapComparison\n"
            "print(S.compare_maps is compare_maps, callable(fit_measured_map), "
            "MapComparison.__name__)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["True", "True", "MapComparison"]


def test_report_bootstraps_the_map_total_only_with_the_same_error(tmp_path, monkeypatch):
    # computed independently (not published): the median relative standard error of the
    # full decomposed bootstrap (every component resampled too) is the one on the page
    import re

    from ensemblelab.compute import spectroscopy as S
    from ensemblelab.compute.spectroscopy import bootstrap_fused as BF
    from ensemblelab.report import build_report

    # exact replicates: total-only (fused route) and decomposed (stick route) agree to
    # rounding (the default float32 ones differ in pixels 1e-80 of the peak)
    monkeypatch.setattr(BF, "DEFAULT_GRID", BF.EXACT)
    ens = make_toy_ensemble(16, seed=4, t_max=120.0, dt=2.0)
    grids = {"energies": np.linspace(0, 2.5, 61), "delays": np.arange(-40.0, 121.0, 10.0)}
    calls: list[dict] = []
    real = S.compute_trpes

    def spy(e, **kw):
        calls.append(kw)
        return real(e, **kw)

    monkeypatch.setattr(S, "compute_trpes", spy)
    page = build_report(ens, tmp_path / "r", exclude_flagged=False, n_boot=0, progress=False,
                        **grids).read_text()
    boot = [kw for kw in calls if kw.get("interval") == "bootstrap"]
    assert len(boot) == 1 and boot[0]["decompose"] is None  # no component replicates
    plain = [kw for kw in calls if kw.get("interval") is None]
    assert plain and plain[0]["decompose"] == "neutral"  # the figures' decomposition
    full = real(ens, **(boot[0] | {"decompose": "neutral"}))
    total = real(ens, **boot[0])
    # the same replicates; the streamed deposit may sum in another order with components,
    # and the fused route recentres (rep - rep_unresampled + map: 2.5e-11 relative seen)
    np.testing.assert_allclose(total.rel_se, full.rel_se, rtol=1e-9, atol=1e-15)
    shown = re.search(r"above 5 % of the peak: ([0-9.]+) %", page)
    assert shown is not None and shown.group(1) == f"{100 * full.median_rel_se():.1f}"


@pytest.mark.parametrize("dtype", ["str", "string", object])
def test_neutralise_text_column_once_per_distinct_label(dtype, monkeypatch):
    # computed independently (not published): the per-cell path (Series.map) on the same
    # column; the fast path neutralises each distinct label once
    import pandas as pd

    from ensemblelab import _csv

    labels = ["total", "=SUM(A1)", "+1.5", "-x", "'quoted", "@cmd", "S1", ""]
    rng = np.random.default_rng(5)
    cells: list = [labels[i] for i in rng.integers(0, len(labels), size=500)]
    if dtype is not object:
        cells[3] = cells[40] = None
    col = pd.Series(cells, dtype=dtype, name="component")
    want = col.map(_csv.neutralise_cell)
    seen: list = []
    real = _csv.neutralise_cell
    monkeypatch.setattr(_csv, "neutralise_cell", lambda v: seen.append(v) or real(v))
    got = _csv.neutralise_frame(col.to_frame())["component"]
    assert len(seen) == len(set(labels)) + 1  # and the column name
    assert got.dtype == col.dtype
    assert got.isna().tolist() == want.isna().tolist()
    assert got.fillna("<na>").tolist() == want.fillna("<na>").tolist()


def test_program_relaxes_and_freezes_the_collector_but_python_calls_do_not(tmp_path):
    # common practice (Python's gc module): measured in a fresh interpreter run as the
    # program (argv from the command line) and through main(argv) from Python
    import gc
    import subprocess
    import sys

    from ensemblelab.cli import PROGRAM_GC_THRESHOLDS, main
    from ensemblelab.io import write_extxyz

    folder = write_extxyz(make_toy_ensemble(4, seed=1, t_max=20.0, dt=2.0), tmp_path / "t")
    code = ("import gc, sys\nfrom ensemblelab.cli import main\n"
            f"sys.argv = ['ensemblelab', 'info', {str(folder)!r}, '--no-progress']\n"
            "rc = main()\nprint('RESULT', rc, gc.get_freeze_count() > 0, *gc.get_threshold())\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.splitlines()[-1].split()
    assert out == ["RESULT", "0", "True", *map(str, PROGRAM_GC_THRESHOLDS)]
    before, frozen = gc.get_threshold(), gc.get_freeze_count()
    assert main(["info", str(folder), "--no-progress"]) == 0
    assert gc.get_threshold() == before and gc.get_freeze_count() == frozen


def test_few_threads_reuses_its_controller_until_a_module_is_imported(tmp_path, monkeypatch):
    # common practice (threadpoolctl): one library scan per set of loaded modules
    import importlib
    import sys

    with _threads.few_threads(10):
        first = _threads.thread_controller()
    with _threads.few_threads(10):
        assert _threads.thread_controller() is first
    (tmp_path / "_el_fresh_module.py").write_text("X = 1\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    importlib.import_module("_el_fresh_module")
    try:
        with _threads.few_threads(10):
            assert _threads.thread_controller() is not first  # scanned again
            assert _max_threads() == 1
    finally:
        sys.modules.pop("_el_fresh_module", None)
