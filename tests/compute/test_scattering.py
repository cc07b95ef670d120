"""Time-resolved scattering (independent-atom model): form factors, Debye kernels, maps.

Sources of the check values are written beside each one.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants

from ensemblelab import Ensemble, compute_scattering, load
from ensemblelab.compute.observables import debye_intensity, electron_form_factor, xray_form_factor
from ensemblelab.compute.observables._kernels_scattering import molecular_intensity
from ensemblelab.compute.observables._reference_scattering import debye_intensity_reference
from ensemblelab.compute.spectroscopy.pulses import GaussianPulse
from ensemblelab.errors import EnsembleWarning, SchemaError
from ensemblelab.testing import make_toy_ensemble

xraydb = pytest.importorskip("xraydb")

A0 = constants.physical_constants["Bohr radius"][0] * 1e10  # Angstrom (CODATA via scipy)
Q_OF_X01 = 4 * math.pi * 0.1  # q at sin(theta)/lambda = 0.1 1/Angstrom


# ------------------------------------------------------------------ form factors
@pytest.mark.parametrize("element", ["H", "C", "N", "O", "S"])
def test_xray_factors_equal_the_package_tables_at_sin_theta_over_lambda(element):
    # reference library: xraydb f0 takes sin(theta)/lambda = q / (4 pi)
    q = np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0, 12.0])
    assert np.allclose(xray_form_factor(element, q), xraydb.f0(element, q / (4 * math.pi)),
                       rtol=1e-14, atol=0)


def test_xray_check_values_at_q_2():
    # computed independently (not published) via xraydb f0 at sin(theta)/lambda = 2/(4 pi)
    assert xray_form_factor("C", [2.0])[0] == pytest.approx(4.16441, abs=1e-5)
    assert xray_form_factor("O", [2.0])[0] == pytest.approx(6.31826, abs=1e-5)


def test_hydrogen_factor_matches_the_exact_1s_form_factor():
    # computed independently (not published) via xraydb: 0.81083 at sin(theta)/lambda = 0.1
    f = xray_form_factor("H", [Q_OF_X01])[0]
    assert f == pytest.approx(0.81083, abs=1e-5)
    # exact hydrogen 1s: f = [1 + (q a0 / 2)^2]^-2 (from memory; textbook result); the fit
    # agrees to its accuracy
    assert f == pytest.approx((1 + (Q_OF_X01 * A0 / 2) ** 2) ** -2, abs=5e-5)


@pytest.mark.parametrize(("element", "z", "f_e"), [
    # computed independently (not published): Mott-Bethe from xraydb f0 at s = 0.1 1/A
    ("C", 6, 2.13052), ("O", 8, 1.80643), ("H", 1, 0.45274)])
def test_mott_bethe_electron_factors(element, z, f_e):
    got = electron_form_factor(element, [Q_OF_X01])[0]
    assert got == pytest.approx(f_e, abs=1e-5)
    # the formula itself, f_e = 2 (Z - f_X) / (a0 q^2) (from memory, Mott-Bethe)
    fx = xraydb.f0(element, 0.1)[0]
    assert got == pytest.approx(2 * (z - fx) / (A0 * Q_OF_X01**2), rel=1e-12)


def test_electron_factor_is_finite_and_continuous_near_q_0():
    q = np.linspace(0.0, 1.0, 2001)  # crosses the frozen-mismatch switch at q = 0.2513
    f = electron_form_factor("C", q)
    assert np.all(np.isfinite(f))
    assert np.max(np.abs(np.diff(f))) < 1e-3  # no step (smooth on a 0.5 mA^-1 grid)


def test_bad_q_is_refused():
    with pytest.raises(SchemaError, match="q"):
        xray_form_factor("C", [-1.0])
    with pytest.raises(SchemaError, match="element"):
        xray_form_factor("Xx", [1.0])


# ------------------------------------------------------------------ Debye sums
def test_forward_scattering_is_the_square_of_the_electron_count():
    # I(q -> 0) = (sum Z)^2 for X-rays (common practice); the fits give f(0) = Z to ~1e-3
    geom = np.array([[0.0, 0.0, 0.0], [1.2, 0.0, 0.0], [0.0, 1.1, 0.3], [2.0, 1.0, -0.4]])
    i0 = debye_intensity(geom, ["C", "O", "H", "N"], [0.0])[0]
    assert i0 == pytest.approx((6 + 8 + 1 + 7) ** 2, rel=2e-3)


def test_co_diatomic_equals_the_analytic_formula_and_the_check_value():
    geom = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1.128]])
    q = np.linspace(0.0, 12.0, 301)
    got = debye_intensity(geom, ["C", "O"], q)
    fc, fo = xray_form_factor("C", q), xray_form_factor("O", q)
    x = q * 1.128
    sinc = np.where(x > 0, np.sin(x) / np.where(x > 0, x, 1.0), 1.0)
    # analytic diatomic: f1^2 + f2^2 + 2 f1 f2 sin(qr)/(qr) (from memory; Debye formula)
    assert np.allclose(got, fc**2 + fo**2 + 2 * fc * fo * sinc, rtol=1e-12, atol=0)
    # computed independently (not published) via xraydb f0: I(q = 2.0) = 75.3238
    assert debye_intensity(geom, ["C", "O"], [2.0])[0] == pytest.approx(75.3238, abs=1e-4)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize("uniform", [True, False])
def test_kernels_equal_the_naive_twin(backend, uniform):
    if backend == "numba":
        pytest.importorskip("numba")
    rng = np.random.default_rng(7)
    g = rng.normal(scale=1.5, size=(30, 6, 3))
    g[0, 1] = g[0, 0]  # coincident atoms: sinc(0) = 1
    el = np.array([0, 1, 1, 2, 0, 2])
    q = np.linspace(0.0, 15.0, 301) if uniform else np.sort(rng.uniform(0.0, 15.0, 301))
    q[0] = 0.0
    table = rng.uniform(0.5, 6.0, size=(3, q.size))
    got = molecular_intensity(g, el, table, q, backend=backend)
    f = table[el]
    want = np.array([debye_intensity_reference(x, f, q) for x in g]) - (f**2).sum(axis=0)
    assert np.allclose(got, want, rtol=0, atol=1e-10 * np.abs(want).max())


def test_numba_and_numpy_backends_agree_on_many_snapshots():
    pytest.importorskip("numba")
    rng = np.random.default_rng(3)
    g = rng.normal(scale=1.5, size=(5000, 12, 3))  # several numba blocks and numpy chunks
    el = np.array([0] * 6 + [1] * 6)
    q = np.linspace(0.1, 10.0, 200)
    table = np.vstack([xray_form_factor("C", q), xray_form_factor("H", q)])
    a = molecular_intensity(g, el, table, q, backend="numba")
    b = molecular_intensity(g, el, table, q, backend="numpy")
    assert np.allclose(a, b, rtol=0, atol=1e-9 * np.abs(b).max())


# ------------------------------------------------------------------ maps
def _two_trajectories() -> Ensemble:
    """Two diatomic-like CO trajectories of different lengths (truncated second one)."""
    t0 = np.arange(0.0, 50.0, 10.0)
    t1 = np.arange(0.0, 30.0, 10.0)
    r0 = 1.128 + 0.05 * np.arange(t0.size)
    r1 = 1.128 + 0.20 * np.arange(t1.size)
    r = np.concatenate([r0, r1])
    geoms = np.zeros((r.size, 2, 3))
    geoms[:, 1, 2] = r
    active = np.concatenate([[2, 2, 1, 1, 1], [2, 1, 1]])
    return Ensemble.from_arrays(traj=np.r_[np.zeros(t0.size), np.ones(t1.size)].astype(int),
                                time=np.r_[t0, t1], active=active, geometries=geoms,
                                symbols=["C", "O"], energies=np.zeros((r.size, 3)))


def _by_hand(ens, q, kind="xray"):
    """Alive-normalised average and initial reference with the naive Debye twin."""
    fn = xray_form_factor if kind == "xray" else electron_form_factor
    f = np.array([fn(s, q) for s in ens.symbols])
    per = np.array([debye_intensity_reference(g, f, q) for g in ens.geometries])
    t = ens.snapshots["time"].to_numpy()
    traj = ens.snapshots["traj"].to_numpy()
    ref = per[[np.flatnonzero(traj == j)[0] for j in np.unique(traj)]].mean(axis=0)
    avg = {float(tt): per[t == tt].mean(axis=0) for tt in np.unique(t)}
    return ref, avg, per


@pytest.mark.parametrize("kind", ["xray", "electron"])
def test_pure_map_is_the_alive_normalised_average_against_the_initial_reference(kind):
    ens = _two_trajectories()
    q = np.linspace(0.5, 10.0, 40)
    delays = np.array([0.0, 10.0, 20.0, 30.0, 40.0])
    m = compute_scattering(ens, kind=kind, q=q, delays=delays, convolve=False)
    ref, avg, _ = _by_hand(ens, q, kind)  # computed independently (naive Debye twin)
    assert np.allclose(m.reference, ref, rtol=1e-12)
    for i, d in enumerate(delays[:3]):  # both trajectories alive
        assert np.allclose(m.intensity[i], avg[d], rtol=1e-12)
    # at 30 and 40 fs only trajectory 0 is alive: the average is renormalised to it
    assert np.allclose(m.intensity[4], avg[40.0], rtol=1e-12)
    assert np.allclose(m.percent_difference, 100 * (m.intensity - ref) / ref, rtol=1e-12)
    assert np.allclose(m.percent_difference[0], 0.0, atol=1e-12)  # no atom moved at launch
    assert m.alive[0] == 2 and m.alive[-1] == 1
    # after every trajectory has ended the signal is unknown (NaN), not "no change"
    late = compute_scattering(ens, kind=kind, q=q, delays=np.array([40.0, 60.0]),
                              convolve=False)
    assert np.all(np.isfinite(late.percent_difference[0]))
    assert np.all(np.isnan(late.percent_difference[1])) and late.alive[1] == 0


def test_excitation_fraction_scales_the_difference():
    ens = _two_trajectories()
    kw = {"q": np.linspace(0.5, 10.0, 40), "delays": np.array([10.0, 20.0]),
          "convolve": False}
    full = compute_scattering(ens, **kw)
    part = compute_scattering(ens, excitation_fraction=0.12, **kw)
    assert np.allclose(part.percent_difference, 0.12 * full.percent_difference, rtol=1e-12)
    assert np.allclose(part.intensity - part.reference, 0.12 * (full.intensity -
                                                                full.reference), rtol=1e-12)
    with pytest.raises(SchemaError, match="excitation_fraction"):
        compute_scattering(ens, excitation_fraction=1.5, **kw)


def test_components_by_state_and_by_labels_sum_to_the_total():
    ens = make_toy_ensemble(12, t_max=60.0, ragged=True, seed=11)
    kw = {"q": np.linspace(0.3, 8.0, 30), "delays": np.arange(-20.0, 61.0, 10.0),
          "pump": GaussianPulse(photon_energy=4.0, fwhm=25.0),
          "probe": GaussianPulse(photon_energy=9.0, fwhm=20.0)}
    m = compute_scattering(ens, **kw)
    assert set(m.components) == {"S0", "S1", "S2"}
    assert np.allclose(m.component_sum(), m.percent_difference, atol=1e-12)
    labels = np.where(ens.snapshots["traj"].to_numpy() % 3 == 0, "A", "B")
    by = compute_scattering(ens, by=labels, **kw)
    assert set(by.components) == {"A", "B"}
    assert np.allclose(by.component_sum(), m.percent_difference, atol=1e-12)
    col = compute_scattering(ens.assign(cluster=labels), by="cluster", **kw)
    for lab in ("A", "B"):
        assert np.allclose(col.components[lab], by.components[lab], rtol=1e-12, atol=1e-15)
    # one delay computed alone gives the same components (no dependence on the grid)
    only_a = compute_scattering(ens, by=labels, **{**kw, "delays": np.array([30.0])})
    assert np.allclose(only_a.component_sum(), m.percent_difference[5], atol=1e-12)


def test_convolved_step_is_half_at_zero_delay():
    # one trajectory that jumps to a new geometry after launch: the difference rises
    # linearly from 0 (t = 0) to its plateau (t = 0.5 fs), i.e. a step at 0.25 fs under
    # the trapezoid rule; a step at t_s convolved with a normalised Gaussian of width
    # sigma_cc is Phi(-t_s / sigma_cc) at delay 0 (derived; 0.5 for t_s = 0)
    t = np.arange(0.0, 400.0, 0.5)
    geoms = np.zeros((t.size, 2, 3))
    geoms[:, 1, 2] = 1.5
    geoms[0, 1, 2] = 1.128
    ens = Ensemble.from_arrays(traj=np.zeros(t.size, dtype=int), time=t,
                               active=np.ones(t.size, dtype=int), geometries=geoms,
                               symbols=["C", "O"], energies=np.zeros((t.size, 2)))
    pump = GaussianPulse(photon_energy=4.0, fwhm=30.0)
    probe = GaussianPulse(photon_energy=4.0, fwhm=40.0)  # T_cc = 50 fs
    q = np.array([1.0, 3.0])
    pure = compute_scattering(ens, q=q, delays=np.array([100.0]), convolve=False)
    conv = compute_scattering(ens, q=q, delays=np.array([0.0, 200.0]), pump=pump, probe=probe)
    from scipy.stats import norm  # reference library

    sigma_cc = 50.0 / (2 * math.sqrt(2 * math.log(2)))
    assert np.allclose(conv.percent_difference[0],
                       norm.cdf(-0.25 / sigma_cc) * pure.percent_difference[0], rtol=1e-4)
    assert np.allclose(conv.percent_difference[1], pure.percent_difference[0], rtol=1e-9)


def test_sm_and_pair_distribution_difference():
    ens = _two_trajectories()
    q = np.linspace(0.2, 12.0, 120)
    m = compute_scattering(ens, kind="electron", q=q, delays=np.array([20.0]),
                           convolve=False, r=np.array([1.0, 1.5, 2.0]), damping=0.02)
    d_i = m.intensity - m.reference
    sm = q * d_i / m.atomic  # sM = q I_mol / I_at (from memory)
    assert np.allclose(m.delta_sm, sm, rtol=1e-12)
    for j, rr in enumerate([1.0, 1.5, 2.0]):
        integrand = sm[0] * np.sin(q * rr) * np.exp(-0.02 * q**2)
        from scipy.integrate import trapezoid  # reference library

        assert m.delta_pdf[0, j] == pytest.approx(trapezoid(integrand, q), rel=1e-10)


def test_trajectories_starting_late_are_reported():
    ens = _two_trajectories()
    late = Ensemble.from_arrays(traj=ens.snapshots["traj"],
                                time=ens.snapshots["time"] + 10.0 * ens.snapshots["traj"],
                                active=ens.snapshots["active"], geometries=ens.geometries,
                                symbols=ens.symbols, energies=ens.energies)
    with pytest.warns(EnsembleWarning, match="1 trajectory"):
        compute_scattering(late, q=np.linspace(0.5, 5.0, 10), delays=[20.0], convolve=False)


def test_given_reference_and_bad_inputs():
    ens = _two_trajectories()
    q = np.linspace(0.5, 5.0, 10)
    ref = np.full(q.size, 100.0)
    m = compute_scattering(ens, q=q, delays=np.array([10.0]), convolve=False, reference=ref)
    assert np.allclose(m.percent_difference, 100 * (m.intensity - 100.0) / 100.0)
    with pytest.raises(SchemaError, match="kind"):
        compute_scattering(ens, kind="neutron", q=q, delays=[0.0])
    with pytest.raises(SchemaError, match="by"):
        compute_scattering(ens, q=q, delays=[0.0], by="no_such_column")


def test_missing_geometries_are_left_out_with_a_warning():
    ens = _two_trajectories()
    g = np.array(ens.geometries)
    g[2, 1, 2] = np.nan  # trajectory 0 at 20 fs
    bad = Ensemble.from_arrays(traj=ens.snapshots["traj"], time=ens.snapshots["time"],
                               active=ens.snapshots["active"], geometries=g,
                               symbols=ens.symbols, energies=ens.energies)
    q = np.linspace(0.5, 5.0, 10)
    with pytest.warns(EnsembleWarning, match="non-finite"):
        m = compute_scattering(bad, q=q, delays=np.array([20.0]), convolve=False)
    _, _, per = _by_hand(ens, q)
    assert np.allclose(m.intensity[0], per[7], rtol=1e-12)  # only trajectory 1 at 20 fs
    assert m.alive[0] == 1
    assert np.all(np.isfinite(m.intensity))


def test_chunked_store_gives_the_in_memory_map(tmp_path):
    pytest.importorskip("dask")
    from ensemblelab.io.chunked import save_chunked

    ens = make_toy_ensemble(9, t_max=40.0, ragged=True, seed=2)
    lazy = load(save_chunked(ens, tmp_path / "s.ens", chunk_size=2), lazy=True)
    kw = {"q": np.linspace(0.5, 6.0, 12), "delays": np.arange(-10.0, 41.0, 10.0),
          "pump": GaussianPulse(photon_energy=4.0, fwhm=20.0), "scheduler": "synchronous"}
    a = compute_scattering(ens, **kw)
    labels = ens.snapshots["traj"].to_numpy() % 2
    b = compute_scattering(lazy, by=labels, n_boot=20, **kw)
    assert np.allclose(a.intensity, b.intensity, rtol=1e-12)
    assert np.allclose(b.component_sum(), a.percent_difference, atol=1e-12)
    c = compute_scattering(ens, n_boot=20, **kw)  # same replicates in memory and chunked
    assert np.allclose(b.percent_lower, c.percent_lower, rtol=1e-10, atol=1e-14)
    assert np.allclose(b.percent_upper, c.percent_upper, rtol=1e-10, atol=1e-14)


def test_bootstrap_band_matches_the_standard_error_of_a_mean():
    # each trajectory jumps after launch to its own bond length and stays there, so the
    # percent difference at a later delay is a plain mean over independent trajectories;
    # the 95 % band is then about +-1.96 sd / sqrt(N) (normal approximation; common
    # practice) and the Poisson bootstrap should reproduce it
    rng = np.random.default_rng(5)
    n_traj, t = 300, np.array([0.0, 10.0, 20.0])
    r = np.column_stack([np.full(n_traj, 1.128), np.repeat(rng.normal(1.3, 0.08, n_traj)[:, None],
                                                           2, axis=1)]).ravel()
    geoms = np.zeros((r.size, 2, 3))
    geoms[:, 1, 2] = r
    ens = Ensemble.from_arrays(traj=np.repeat(np.arange(n_traj), t.size),
                               time=np.tile(t, n_traj), active=np.ones(r.size, dtype=int),
                               geometries=geoms, symbols=["C", "O"],
                               energies=np.zeros((r.size, 2)))
    q = np.array([2.0, 4.0])
    m = compute_scattering(ens, q=q, delays=np.array([20.0]), convolve=False, n_boot=400,
                           random_state=1)
    per = debye_intensity(geoms[2::3], ["C", "O"], q)  # each trajectory at 20 fs
    ref = debye_intensity(geoms[0], ["C", "O"], q)
    values = 100 * (per - ref) / ref
    assert np.allclose(m.percent_difference[0], values.mean(axis=0), rtol=1e-10)
    half = 1.96 * values.std(axis=0, ddof=1) / math.sqrt(n_traj)
    width = (m.percent_upper - m.percent_lower)[0] / 2
    assert np.allclose(width, half, rtol=0.2)
    assert np.all(m.percent_lower <= m.percent_difference)
    assert np.all(m.percent_difference <= m.percent_upper)
    assert m.params["interval"]["n_boot"] == 400
    none = compute_scattering(ens, q=q, delays=np.array([20.0]), convolve=False)
    assert none.percent_lower is None and "none" in none.params["interval"]


def test_modified_scattering_of_a_diatomic():
    # sM = q I_mol / I_at with I_mol = 2 f1 f2 sin(qr)/(qr), I_at = f1^2 + f2^2 (from memory)
    t = np.array([0.0, 10.0])
    geoms = np.zeros((2, 2, 3))
    geoms[:, 1, 2] = [1.128, 1.3]
    ens = Ensemble.from_arrays(traj=[0, 0], time=t, active=[1, 1], geometries=geoms,
                               symbols=["C", "O"], energies=np.zeros((2, 2)))
    q = np.linspace(0.5, 10.0, 50)
    m = compute_scattering(ens, kind="electron", q=q, delays=t, convolve=False)
    sm, sm_ref = m.modified_scattering()
    fc, fo = electron_form_factor("C", q), electron_form_factor("O", q)
    want = q * 2 * fc * fo * np.sin(q * 1.3) / (q * 1.3) / (fc**2 + fo**2)
    assert np.allclose(sm[1], want, rtol=1e-10)
    assert np.allclose(sm - sm_ref, m.delta_sm, atol=1e-12)


def test_doorway_weights_enter_average_and_reference():
    # three trajectories with different excitation energies: the pump's doorway factors
    # (method: J. Chem. Phys. 2004, classical doorway-window approximation) weight both the
    # excited average and the removed ground-state molecules, so nothing changes at t = 0
    from ensemblelab.compute.spectroscopy.weights import doorway_weights

    t = np.array([0.0, 10.0])
    r = np.array([[1.10, 1.30], [1.15, 1.45], [1.20, 1.25]])
    geoms = np.zeros((6, 2, 3))
    geoms[:, 1, 2] = r.ravel()
    exc = np.array([[0.0, 4.0], [0.0, 4.1], [0.0, 4.4]])
    osc = np.array([[0.0, 0.3], [0.0, 0.3], [0.0, 0.3]])
    ens = Ensemble.from_arrays(traj=np.repeat(np.arange(3), 2), time=np.tile(t, 3),
                               active=np.ones(6, dtype=int), geometries=geoms,
                               symbols=["C", "O"], energies=np.zeros((6, 2)),
                               excitation_energies=exc, oscillator_strengths=osc)
    pump = GaussianPulse(photon_energy=4.05, fwhm=30.0)
    q = np.linspace(0.5, 8.0, 12)
    m = compute_scattering(ens, q=q, delays=t, pump=pump, convolve=False, weights="doorway")
    w = doorway_weights(ens, pump=pump)
    assert np.ptp(w) > 0.1 * w.max()  # the weights really differ
    per = debye_intensity(geoms, ["C", "O"], q)
    assert m.params["weights"] == "doorway"
    assert np.allclose(m.reference, w @ per[0::2] / w.sum(), rtol=1e-12)
    assert np.allclose(m.intensity[1], w @ per[1::2] / w.sum(), rtol=1e-12)
    assert np.allclose(m.percent_difference[0], 0.0, atol=1e-12)


def test_default_weights_never_apply_the_pump_twice():
    # an ensemble already selected by the pump (metadata sampling="doorway-selected") is
    # averaged uniformly by default, as compute_trpes does; an explicit "doorway" weights
    # it again (method: J. Chem. Phys. 2004, classical doorway-window approximation)
    t = np.array([0.0, 10.0])
    r = np.array([[1.10, 1.30], [1.15, 1.45], [1.20, 1.25]])
    geoms = np.zeros((6, 2, 3))
    geoms[:, 1, 2] = r.ravel()
    exc = np.array([[0.0, 4.0], [0.0, 4.1], [0.0, 4.4]])
    osc = np.full((3, 2), 0.3)
    ens = Ensemble.from_arrays(traj=np.repeat(np.arange(3), 2), time=np.tile(t, 3),
                               active=np.ones(6, dtype=int), geometries=geoms,
                               symbols=["C", "O"], energies=np.zeros((6, 2)),
                               excitation_energies=exc, oscillator_strengths=osc,
                               metadata={"sampling": "doorway-selected"})
    pump = GaussianPulse(photon_energy=4.05, fwhm=30.0)
    q = np.linspace(0.5, 8.0, 12)
    m = compute_scattering(ens, q=q, delays=t, pump=pump, convolve=False)
    per = debye_intensity(geoms, ["C", "O"], q)
    assert m.params["weights"] == "uniform"
    np.testing.assert_allclose(m.intensity[1], per[1::2].mean(axis=0), rtol=1e-12)
