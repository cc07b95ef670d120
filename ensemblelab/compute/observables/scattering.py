"""Time-resolved X-ray and electron scattering of an ensemble (independent-atom model).

Method. Each snapshot's isotropic intensity is the Debye sum
``I(q) = sum_a f_a^2 + sum_{a != b} f_a f_b sin(q r_ab)/(q r_ab)`` (Z. Phys. 1915 and
every diffraction textbook; common practice) with atomic form factors from
:mod:`.form_factors` (X-rays: the analytic fits carried by xraydb; electrons:
Mott-Bethe). ``q = 4 pi sin(theta)/lambda`` in inverse Angstrom (electron diffraction's
``s``); tabulations use ``sin(theta)/lambda = q/(4 pi)``.

Ensemble average and time. As for the photoelectron map: snapshots go on the uniform
internal time grid with their trajectory weight, the sum is divided by the alive
weight at each grid point, and the difference signal ``dI(u)`` (zero before launch,
u < 0) is convolved with the pump-probe cross-correlation. The difference is taken
against the molecules the pump removed from the ground state: the initial snapshots
with the same trajectory weights, so ``dI(0) = 0`` exactly (vertical excitation moves
no atom). The reported intensity is ``I_ref + f dI`` with ``f`` the excitation fraction
(default 1) and ``I_ref`` the reference (the same initial conditions by default), and
``percent_difference = 100 (I - I_ref) / I_ref`` scales linearly with ``f``.

Decomposition. ``dI = sum_g dI_g`` with ``dI_g(u) = (N_g(u) - I_ref0 A_g(u)) / A(u)``
(N_g, A_g: weighted intensity and alive weight of the snapshots of group g; A: all
alive weight), by active state (default) or by any per-snapshot labels (``by=``, e.g.
cluster labels); the components of the percent difference sum to it exactly.

Electron-style views (computed for both kinds): ``delta_sm = q dI / I_at`` (the
difference of the modified scattering ``sM = q I_mol / I_at``, same atoms so the same
``I_at``) and ``delta_pdf(r) = integral delta_sm(q) sin(q r) exp(-k q^2) dq`` (trapezoid
over the q grid; damping ``k`` defaults to ``ln 10 / q_max^2``, i.e. the integrand is
damped to 10 % at the last q: a common-practice choice against truncation ripples).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from ...data.observables import ScatteringMap
from ...errors import EnsembleWarning, SchemaError
from ..engine import BlockSource, BlockSpan, add, as_source, is_chunked, reduce
from ..spectroscopy._checks import check_grid, check_pulse
from ..spectroscopy.maps import time_grid
from ..spectroscopy.pulses import GaussianPulse
from ..spectroscopy.weights import resolve_weights, trajectory_weights, weights_word
from ._kernels_scattering import molecular_intensity
from ._timegrid import (
    EDGE_SIGMAS,
    alive_on_delays,
    cc_sigma,
    check_boot,
    delay_matrix,
    deposit_matrix,
    first_rows,
    percentile_band,
    poisson_counts,
    replicate_deposit,
    unknown_delays,
)
from .form_factors import form_factor_table

__all__ = ["compute_scattering", "debye_intensity", "scattering_partial", "trapezoid_weights"]

#: snapshots per kernel call inside a block (bounds the (chunk, n_q) temporaries)
CHUNK = 4096


def debye_intensity(geometries: npt.ArrayLike, symbols: Sequence[str], q: npt.ArrayLike, *,
                    kind: str = "xray", backend: str | None = None) -> np.ndarray:
    """Isotropic (Debye) scattering intensity of geometries.

    Parameters
    ----------
    geometries : array_like, shape (n_atoms, 3) or (n_geometries, n_atoms, 3)
        Coordinates in Angstrom.
    symbols : sequence of str, length n_atoms
    q : array_like, shape (n_q,)
        Momentum transfer ``4 pi sin(theta)/lambda`` in inverse Angstrom (>= 0).
    kind : {"xray", "electron"}
        Electron units squared for X-rays, Angstrom^2 for electrons.
    backend : {"numba", "numpy"}, optional

    Returns
    -------
    ndarray, shape (n_q,) or (n_geometries, n_q)

    Examples
    --------
    >>> import numpy as np
    >>> i0 = debye_intensity(np.zeros((1, 3)), ["O"], [0.0])
    >>> round(float(i0[0]), 1)  # a lone O atom at q = 0: Z^2 (fit value 7.998^2)
    64.0
    """
    g = np.asarray(geometries, dtype=float)
    single = g.ndim == 2
    g = g[None] if single else g
    if g.ndim != 3 or g.shape[2] != 3 or g.shape[1] != len(symbols):
        raise SchemaError(f"geometries must have shape (n_geometries, n_atoms={len(symbols)}, "
                          f"3); got {np.shape(geometries)}.")
    qa = check_grid(q, "q")
    _, index, table = form_factor_table(symbols, qa, kind=kind)
    atomic = (table[index] ** 2).sum(axis=0)
    out = molecular_intensity(g, index, table, qa, backend=backend) + atomic[None, :]
    return out[0] if single else out


def _groups(source: BlockSource, by: Any) -> tuple[list[str], Any, str]:
    """Group labels, the grouping spec handed to partials, and a word for params."""
    if by is None or (isinstance(by, str) and by == "state"):
        return list(source.state_labels), ("state", None), "active state"
    if isinstance(by, str):
        if by not in source.columns:
            raise SchemaError(f"The 'by' parameter names no snapshot column: {by!r}; columns "
                              f"are {source.columns}. Hint: pass an array of labels, one per "
                              "snapshot, e.g. cluster labels.")
        values = reduce(source, _unique_partial, np.union1d, args=(by,), columns=[by])
        return [str(v) for v in values], ("column", (by, np.asarray(values))), f"column {by}"
    labels = np.asarray(by)
    if labels.ndim != 1 or labels.shape[0] != source.n_snapshots:
        raise SchemaError(f"The 'by' parameter must give one label per snapshot "
                          f"(n_snapshots={source.n_snapshots}); got shape {labels.shape}.")
    values, codes = np.unique(labels, return_inverse=True)
    offsets = np.cumsum([0] + [s.n_snapshots for s in source.spans()])
    return [str(v) for v in values], ("codes", (codes.astype(np.int64), offsets)), "labels"


def _unique_partial(block: Any, span: BlockSpan, column: str) -> np.ndarray:
    """Distinct values of a snapshot column in one block (picklable for clusters)."""
    return np.unique(block.snapshots[column].to_numpy())


def _block_groups(block: Any, span: BlockSpan, spec: Any) -> np.ndarray:
    how, data = spec
    if how == "state":
        return block.snapshots["active"].to_numpy().astype(np.int64)
    if how == "column":
        col, values = data
        return np.searchsorted(values, block.snapshots[col].to_numpy()).astype(np.int64)
    codes, offsets = data
    start = int(offsets[span.index])
    return codes[start:start + block.n_snapshots]


def scattering_partial(block: Any, span: BlockSpan, settings: dict[str, Any]) -> dict[str, Any]:
    """Partial sums of one block of trajectories (see :mod:`ensemblelab.compute.engine`).

    Returns
    -------
    dict
        ``num`` (n_groups * n_time, n_q) weighted molecular intensities on the time
        grid, ``alive`` (n_groups * n_time,) weights, ``count`` (n_time,) snapshots,
        ``ref`` (n_q,) and ``ref_w`` (weighted initial snapshots), ``bad`` (snapshots
        without finite geometry).
    """
    grid, q = settings["grid"], settings["q"]
    n_groups, n_time = settings["n_groups"], int(grid["n_time"])
    w_traj, _ = trajectory_weights(block, weights=settings["weights"], pump=settings["pump"])
    w = w_traj[block.traj_index] if block.n_snapshots else np.zeros(0)
    snaps = block.snapshots
    time = snaps["time"].to_numpy()
    group = _block_groups(block, span, settings["groups"])
    geoms = block.geometries
    ok = np.all(np.isfinite(geoms.reshape(geoms.shape[0], -1)), axis=1)
    w = np.where(ok, w, 0.0)
    first = first_rows(snaps["traj"].to_numpy())
    out: dict[str, Any] = {
           "num": np.zeros((n_groups * n_time, q.size)), "alive": np.zeros(n_groups * n_time),
           "count": np.zeros(n_time), "ref": np.zeros(q.size), "ref_w": 0.0,
           "bad": float(np.count_nonzero(~ok)),
           "late_start": float(np.count_nonzero(time[first] > 1e-9))}
    is_first = np.zeros(block.n_snapshots, dtype=bool)
    is_first[first] = True
    boot = settings.get("boot")
    if boot is not None:  # Poisson-bootstrap replicates: counts of this block's trajectories
        counts = boot[:, span.traj_start:span.traj_start + block.n_trajectories]
        counts = counts[:, block.traj_index]
        n_boot = counts.shape[0]
        out.update(b_num=np.zeros((n_boot * n_time, q.size)), b_alive=np.zeros(n_boot * n_time),
                   b_ref=np.zeros((n_boot, q.size)), b_ref_w=np.zeros(n_boot))
    for s0 in range(0, block.n_snapshots, CHUNK):
        sl = slice(s0, min(s0 + CHUNK, block.n_snapshots))
        g = np.where(ok[sl, None, None], geoms[sl], 0.0)
        imol = molecular_intensity(g, settings["element_of_atom"], settings["table"], q,
                                   backend=settings["backend"])
        mat = deposit_matrix(time[sl], group[sl], w[sl], grid, n_groups)
        out["num"] += mat @ imol
        out["alive"] += np.asarray(mat.sum(axis=1)).ravel()
        cnt = deposit_matrix(time[sl], np.zeros(sl.stop - s0, dtype=np.int64),
                             ok[sl].astype(float), grid, 1)
        out["count"] += np.asarray(cnt.sum(axis=1)).ravel()
        fw = np.where(is_first[sl], w[sl], 0.0)
        out["ref"] += fw @ imol
        out["ref_w"] += float(fw.sum())
        if boot is not None:
            wb = counts[:, sl] * w[sl][None, :]
            bmat = replicate_deposit(time[sl], wb, grid)
            out["b_num"] += bmat @ imol
            out["b_alive"] += np.asarray(bmat.sum(axis=1)).ravel()
            fb = wb * is_first[sl][None, :]
            out["b_ref"] += fb @ imol
            out["b_ref_w"] += fb.sum(axis=1)
    return out


def _replicate_percent(total: dict[str, Any], *, n_time: int, times: np.ndarray,
                       cmat: np.ndarray, unknown: np.ndarray, fraction: float,
                       atomic: np.ndarray, given_ref: np.ndarray | None, ci: float
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Percentile band of the percent difference over the bootstrap replicates."""
    n_boot = total["b_ref_w"].size
    b_num = total["b_num"].reshape(n_boot, n_time, -1)
    b_alive = total["b_alive"].reshape(n_boot, n_time)
    reps = np.full((n_boot, cmat.shape[0], b_num.shape[2]), np.nan)
    for b in range(n_boot):
        if total["b_ref_w"][b] <= 0:
            continue
        ref_b = total["b_ref"][b] / total["b_ref_w"][b]
        a = b_alive[b]
        inv = np.where(a > 0, 1.0 / np.where(a > 0, a, 1.0), 0.0)
        d = (b_num[b] - ref_b[None, :] * a[:, None]) * inv[:, None]
        d[times < 0] = 0.0
        conv = fraction * (cmat @ d)
        conv[unknown] = np.nan
        ref = atomic + ref_b if given_ref is None else given_ref
        reps[b] = 100.0 * conv / ref[None, :]
    return percentile_band(reps, ci)


def _check_fraction(value: float | None) -> float:
    if value is None:
        return 1.0
    f = float(value)
    if not (math.isfinite(f) and 0.0 < f <= 1.0):
        raise SchemaError(f"The 'excitation_fraction' parameter must be a float in (0, 1]. "
                          f"Got {value!r} instead.")
    return f


def trapezoid_weights(x: np.ndarray) -> np.ndarray:
    """Weights ``w`` with ``w @ y == np.trapezoid(y, x)`` (up to rounding), shape (n,).

    ``w_0 = (x_1 - x_0)/2``, ``w_i = (x_{i+1} - x_{i-1})/2``, ``w_{n-1} = (x_{n-1} -
    x_{n-2})/2`` (the trapezoidal rule written as a dot product; common practice): one
    matrix product instead of a (n_delays, n_q, n_r) temporary.
    """
    x = np.asarray(x, dtype=float)
    w = np.zeros(x.size)
    if x.size > 1:
        dx = np.diff(x)
        w[:-1] += 0.5 * dx
        w[1:] += 0.5 * dx
    return w


def compute_scattering(
    ens: Any,
    *,
    kind: str = "xray",
    q: npt.ArrayLike,
    delays: npt.ArrayLike,
    pump: GaussianPulse | None = None,
    probe: GaussianPulse | None = None,
    convolve: bool = True,
    reference: str | npt.ArrayLike = "initial",
    by: str | npt.ArrayLike | None = None,
    excitation_fraction: float | None = None,
    weights: str = "auto",
    time_step: float | None = None,
    r: npt.ArrayLike | None = None,
    damping: float | None = None,
    backend: str | None = None,
    n_boot: int = 0,
    ci: float = 0.95,
    random_state: Any = 0,
    client: Any = None,
    scheduler: Any = None,
    progress: bool = False,
) -> ScatteringMap:
    """Time-resolved scattering map of an ensemble (independent-atom model).

    Parameters
    ----------
    ens : Ensemble or lazy (chunked) ensemble
    kind : {"xray", "electron"}
        X-ray (form factors in electron units) or electron scattering (Mott-Bethe
        factors in Angstrom).
    q : array_like, shape (n_q,)
        Momentum transfer ``4 pi sin(theta)/lambda`` in inverse Angstrom, increasing, >= 0.
    delays : array_like, shape (n_delays,)
        Pump-probe delays in fs, increasing.
    pump, probe : GaussianPulse, optional
        Their cross-correlation smears the signal in time (``convolve=True``); with one
        pulse its own width is used, with none the pure signal is returned. The pump also
        gives doorway weights when ``weights`` resolves to them (see below).
    convolve : bool, default True
    reference : "initial" or array_like, shape (n_q,)
        Reference intensity of the percent difference: the ground-state initial
        conditions (first snapshot of each trajectory, trajectory weights) or a given
        intensity in the map's units.
    by : None, "state", str or array_like, shape (n_snapshots,)
        Decompose the difference signal by active state (None, "state"), by a snapshot
        column, or by per-snapshot labels such as cluster labels.
    excitation_fraction : float in (0, 1], optional
        Fraction of molecules excited (default 1); the difference signal scales with it.
    weights : {"auto", "doorway", "uniform", "ensemble"} or str
        Default "auto": sampling-aware, never applies the pump twice (as for
        :func:`ensemblelab.compute_trpes`).
    time_step : float, optional
        Internal time grid step (fs); default the trajectories' median output step.
    r : array_like, shape (n_r,), optional
        Distances (Angstrom) of the pair-distribution difference; default 0..10 by 0.02.
    damping : float, optional
        ``k`` (Angstrom^2) of ``exp(-k q^2)`` in the sine transform; default
        ``ln 10 / q_max^2``.
    backend : {"numba", "numpy"}, optional
        Debye kernel (default numba when installed).
    n_boot : int, default 0
        Poisson-bootstrap replicates over trajectories for an interval of the percent
        difference (``percent_lower``, ``percent_upper``); 0: none (``params`` says so).
        Costs about one extra sparse product per replicate and chunk.
    ci : float, default 0.95
        Level of the percentile interval.
    random_state : int or Generator, optional
        Seed of the replicate counts.
    client, scheduler, progress
        As for the other reductions (chunked stores run block by block).

    Returns
    -------
    ScatteringMap

    Examples
    --------
    >>> import numpy as np
    >>> from ensemblelab.testing import make_toy_ensemble
    >>> m = compute_scattering(make_toy_ensemble(4), q=np.linspace(0.5, 8, 16),
    ...                        delays=np.array([0.0, 20.0]), convolve=False)
    >>> m.intensity.shape, bool(np.allclose(m.percent_difference[0], 0.0))
    ((2, 16), True)
    """
    if kind not in ("xray", "electron"):
        raise SchemaError(f"The 'kind' parameter must be 'xray' or 'electron'. Got {kind!r} "
                          "instead.")
    qa = check_grid(q, "q")
    if qa.size and qa[0] < 0:
        raise SchemaError("q must be >= 0 (inverse Angstrom, q = 4 pi sin(theta)/lambda).")
    delays_a = check_grid(delays, "delays")
    pump = check_pulse(pump, "pump", optional=True)
    probe = check_pulse(probe, "probe", optional=True)
    fraction = _check_fraction(excitation_fraction)
    source = as_source(ens)
    weights, note = resolve_weights(source, weights=weights, pump=pump)
    if note:  # the same sampling-aware default as compute_trpes: never the pump twice
        warnings.warn(f"compute_scattering: {note}", EnsembleWarning, stacklevel=2)
    symbols = tuple(ens.symbols)
    _, index, table = form_factor_table(symbols, qa, kind=kind)
    atomic = (table[index] ** 2).sum(axis=0)
    grid = time_grid(source, time_step, client=client, scheduler=scheduler)
    labels, spec, by_word = _groups(source, by)
    n_boot, ci = check_boot(n_boot, ci)
    settings = {"grid": grid, "q": qa, "n_groups": len(labels), "groups": spec,
                "weights": weights, "pump": pump, "element_of_atom": index, "table": table,
                "backend": backend,
                "boot": poisson_counts(n_boot, source.n_trajectories, random_state)
                if n_boot else None}
    total = reduce(source, scattering_partial, add, args=(settings,),
                   fields=["geometries"], columns=[spec[1][0]] if spec[0] == "column" else None,
                   client=client, scheduler=scheduler, progress=progress,
                   desc="scattering")
    n_groups, n_time = len(labels), int(grid["n_time"])
    num = total["num"].reshape(n_groups, n_time, qa.size)
    alive_g = total["alive"].reshape(n_groups, n_time)
    alive = alive_g.sum(axis=0)
    if total["ref_w"] <= 0:
        raise SchemaError("No initial snapshot with a finite geometry and positive weight; "
                          "cannot form the reference. Hint: check the trajectory weights.")
    ref_mol = total["ref"] / total["ref_w"]  # molecules removed from the ground state
    inv = np.where(alive > 0, 1.0 / np.where(alive > 0, alive, 1.0), 0.0)
    d_pure = (num - ref_mol[None, None, :] * alive_g[:, :, None]) * inv[None, :, None]
    times = grid["start"] + grid["dt"] * np.arange(n_time)
    d_pure[:, times < 0, :] = 0.0
    sigma = cc_sigma(pump, probe, convolve)
    cmat = delay_matrix(delays_a, grid, sigma)
    d_groups = fraction * np.einsum("dt,gtq->gdq", cmat, d_pure)
    unknown = unknown_delays(delays_a, grid, cmat)
    d_groups[:, unknown, :] = np.nan
    d_total = d_groups.sum(axis=0)
    if isinstance(reference, str):
        if reference != "initial":
            raise SchemaError(f"The 'reference' parameter must be 'initial' or an array of "
                              f"n_q={qa.size} intensities. Got {reference!r} instead.")
        ref = atomic + ref_mol
        ref_word = "initial conditions"
    else:
        ref = np.asarray(reference, dtype=float)
        if ref.shape != qa.shape or not np.all(np.isfinite(ref)) or np.any(ref <= 0):
            raise SchemaError(f"reference must be {qa.size} finite positive intensities; got "
                              f"shape {ref.shape}.")
        ref_word = "given"
    band: tuple[np.ndarray | None, np.ndarray | None] = (None, None)
    if n_boot:
        band = _replicate_percent(total, n_time=n_time, times=times, cmat=cmat,
                                  unknown=unknown, fraction=fraction, atomic=atomic,
                                  given_ref=None if ref_word != "given" else ref, ci=ci)
    intensity = ref[None, :] + d_total
    percent = 100.0 * d_total / ref[None, :]
    comps = {lab: 100.0 * d_groups[i] / ref[None, :] for i, lab in enumerate(labels)}
    delta_sm = qa[None, :] * d_total / atomic[None, :]
    r_a = np.arange(0.0, 10.0 + 1e-9, 0.02) if r is None else check_grid(r, "r")
    qmax = float(qa[-1]) if qa.size else 0.0
    k = (math.log(10.0) / qmax**2 if qmax > 0 else 0.0) if damping is None else float(damping)
    if not (math.isfinite(k) and k >= 0):
        raise SchemaError(f"The 'damping' parameter must be a float >= 0 (Angstrom^2). Got "
                          f"{damping!r} instead.")
    kern = np.sin(qa[:, None] * r_a[None, :]) * np.exp(-k * qa**2)[:, None]
    delta_pdf = (delta_sm @ (trapezoid_weights(qa)[:, None] * kern)
                 if qa.size > 1 else np.zeros((delays_a.size, r_a.size)))
    t_known = grid["t_known"]
    params = {
        "kind": kind, "observable": "scattering",
        "pump": None if pump is None else {"photon_energy": pump.photon_energy,
                                           "fwhm": pump.fwhm, "n_photons": pump.n_photons},
        "probe": None if probe is None else {"photon_energy": probe.photon_energy,
                                             "fwhm": probe.fwhm, "n_photons": probe.n_photons},
        "convolve": bool(convolve), "sigma_cc": sigma, "excitation_fraction": fraction,
        "weights": weights_word(source, weights=weights, pump=pump),
        "reference": ref_word, "decomposed_by": by_word, "time_step": grid["dt"],
        "t_end": t_known, "edge_delay": (t_known - EDGE_SIGMAS * sigma) if sigma else t_known,
        "damping": k, "snapshots_without_geometry": total["bad"],
        "form_factors": "xraydb f0 (analytic fits)" + (", Mott-Bethe" if kind == "electron"
                                                       else ""),
        "q_convention": "q = 4 pi sin(theta)/lambda (1/Angstrom)", "chunked": is_chunked(ens),
        "interval": ({"method": "Poisson bootstrap over trajectories, percentile",
                      "n_boot": n_boot, "ci": ci} if n_boot else
                     "none (pass n_boot > 0 for a bootstrap interval of percent_difference)"),
    }
    if total["late_start"]:
        warnings.warn(f"{int(total['late_start'])} trajectory(ies) start after t = 0 (truncated "
                      "or strided at the start?); their first snapshot stands in for the "
                      "initial condition in the reference.", EnsembleWarning, stacklevel=2)
    if total["bad"]:

        warnings.warn(f"{int(total['bad'])} snapshot(s) have non-finite geometries and were "
                      "left out of the average (numerator and alive weight).", EnsembleWarning,
                      stacklevel=2)
    return ScatteringMap(q=qa, delays=delays_a, intensity=intensity, reference=ref,
                         percent_difference=percent, components=comps, atomic=atomic,
                         delta_sm=delta_sm, r=r_a, delta_pdf=delta_pdf,
                         percent_lower=band[0], percent_upper=band[1],
                         alive=alive_on_delays(delays_a, grid, alive),
                         alive_count=alive_on_delays(delays_a, grid, total["count"]),
                         params=params)
