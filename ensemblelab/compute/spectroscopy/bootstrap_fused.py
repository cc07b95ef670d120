"""Bootstrap replicate maps of an in-memory ensemble by the fused compiled pass.

:mod:`.bootstrap` resamples whole trajectories; this is its fast route when the map
itself came from the fused pass (:mod:`.fused`: numba installed, a built-in cross
section, no decomposition, ``absorbing`` not ``"carry"``, no missing-data rescaling,
snapshots grouped by trajectory and sorted by time). No stick arrays are made:
:func:`._kernels_boot_fused.fused_replicates` forms the sticks per grid time, adds
their moments for every resample of a chunk and broadens each finished time row for
all resamples at once; the normaliser and the time matrix follow as on the stick
route (:func:`._kernels_replicate_maps.apply_time`).

Precision (:class:`ReplicateGrid`): the replicates may use fewer moments, a different
fine grid and float32 (``FAST``, the default of ``compute_trpes``). Their truncation
error is a fixed linear map of the histograms, the same for every resample, so the
replicates are *recentred*: resample ``b`` is reported as ``map + (rep_b - rep_1)``
where ``rep_1`` is the replicate of the unresampled ensemble (multiplicity 1 for every
trajectory, computed in the same pass) and ``map`` the full-precision map. What is
left of the truncation error is that error applied to ``rep_b - rep_1``, a fraction
(:func:`._kernels_broadening.truncation_bound`, about 1 % at 3 moments and 4 bins
per FWHM) of the resample's own deviation: the interval's half-width moves by about
that fraction, far less than the Monte-Carlo error of the quantiles of 200
resamples. ``EXACT`` (the map's own order and grid, float64) reproduces the stick
route to rounding; tests use it against the naive twin.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np

from . import _kernels_boot_fused as KBF
from . import _kernels_replicate_maps as KRM
from ._kernels_fused import fusable
from ._kernels_layout import block_layout
from .pulses import FWHM_TO_SIGMA
from .sticks import THRESHOLD_TAIL, check_shifts

__all__ = ["ReplicateGrid", "FAST", "EXACT", "DEFAULT_GRID", "can_fuse", "fused_bootstrap_maps"]


class ReplicateGrid(NamedTuple):
    """Moments, fine bins per FWHM and float type of the fused replicates (``order``
    / ``bins_per_fwhm`` None: the map's own)."""

    order: int | None
    bins_per_fwhm: float | None
    dtype: str


#: the default: 3 moments, 4 bins per FWHM, float32, recentred on the map
FAST = ReplicateGrid(order=3, bins_per_fwhm=4.0, dtype="float32")
#: the map's own moments and grid in float64 (the stick route's numbers)
EXACT = ReplicateGrid(order=None, bins_per_fwhm=None, dtype="float64")
#: what ``compute_trpes(interval="bootstrap")`` uses (set EXACT for the stick route's
#: numbers to rounding, at several times the cost)
DEFAULT_GRID = FAST


#: energy block and band cutoff of the broadening of float32 replicates (a relative
#: size far below float32's rounding, 6e-8)
F32_BLOCK, F32_CUTOFF = 8, 1e-9


def can_fuse(ens: Any, *, cross_section: Any, decompose: str | None, absorbing: str) -> bool:
    """True when the fused bootstrap may apply (the layout is checked later)."""
    from ...data.ensemble import Ensemble

    return (isinstance(ens, Ensemble) and KBF.available()
            and fusable(cross_section=cross_section, decompose=decompose,
                        absorbing=absorbing, keep_sticks=False))


def _unit_extension(ens: Any, layout: Any, unit: np.ndarray, w_traj: np.ndarray, *,
                    model: Any, probe: Any, shifts: np.ndarray | None) -> None:
    """Add the absorbed extension (a trajectory stopped in the absorbing state stays
    alive after its stop, as :func:`.sticks.block_alive`) to the unit profiles."""
    from .fused import last_row_extension

    state, t_end = model.info.get("absorbing_state"), model.t_known
    if state is None or model.info.get("absorbing", "zero") == "end" or t_end is None:
        return
    x = last_row_extension(ens, w_traj, layout, probe=probe, shifts=shifts, state=state,
                   t_end=t_end, start=model.grid_start, dt=model.time_step,
                   n_time=model.n_time)
    rows = np.searchsorted(layout.starts, x.rows, side="right") - 1
    for n, b0, f in zip(rows, x.ext_bin, x.ext_first, strict=True):
        unit[n, b0] += f
        unit[n, b0 + 1:] += 1.0


def fused_bootstrap_maps(ens: Any, model: Any, counts: np.ndarray, *,
                         intensity: np.ndarray | None,
                         probe: Any, fwhm: float, kinetic_energies: np.ndarray,
                         w_traj: np.ndarray,
                         cross_section: Any, ionisation_shifts: Any, cmat: np.ndarray,
                         blocks_of: Any, normalise_of: Any, grid: ReplicateGrid = FAST,
                         budget: int = 256 * 2**20, progress: bool = False
                         ) -> np.ndarray | None:
    """Replicate maps of the resamples ``counts``, or None when the layout does not fit.

    Parameters
    ----------
    ens : Ensemble
        The ensemble (grouped by trajectory and sorted by time, else None is returned).
    model : TRPESModel
        Its map's model (grid, fwhm, absorbing state).
    counts : ndarray, shape (n_boot, n_trajectories)
        Multiplicities of the resamples.
    intensity : ndarray, shape (n_delays, n_energies), or None
        The map (the replicates are recentred on it); None: not recentred, and the
        replicate of the unresampled ensemble comes first (n_boot + 1 in all).
    probe, kinetic_energies, w_traj, cross_section, ionisation_shifts
        As the map used them (``cross_section`` resolved).
    fwhm : float
        The narrowest stick FWHM (eV), :meth:`.model.TRPESModel.fwhm`.
    cmat : ndarray, shape (n_delays, n_time)
        Time matrix (without normaliser).
    blocks_of : callable
        ``blocks_of(e_lo, h, n_fine, order, block=..., cutoff=...)``: the banded
        broadening blocks
        (:func:`._kernels_replicate_maps.replicate_blocks`).
    normalise_of : callable
        ``normalise_of(alive, total)``: 1 / normaliser, shape (n_rep, n_time).
    grid : ReplicateGrid
        Precision of the replicates.
    budget : int
        Bytes of replicate rows per chunk of resamples (at least 8 resamples).
    progress : bool
        Show a progress bar (tqdm).

    Returns
    -------
    ndarray, shape (n_delays, n_energies, n_boot), or None
        In the precision of ``grid`` (float32 replicates stay float32).
    """
    layout = block_layout(ens)
    if layout is None or not layout.sorted or layout.starts is None:
        return None
    e_lo_m, h_m, n_fine_m = model.moment_grid(fwhm)
    order = model.order if grid.order is None else int(grid.order)
    h = h_m if grid.bins_per_fwhm is None else fwhm / grid.bins_per_fwhm
    n_fine = n_fine_m if h == h_m else int(math.ceil(n_fine_m * h_m / h)) + 1
    e_lo = e_lo_m if h == h_m else e_lo_m - 0.5 * h_m + 0.5 * h  # same lower edge
    dtype = np.dtype(grid.dtype)
    # float32: broadening entries below its rounding left out, narrower energy blocks
    # (fewer zeros multiplied; every time row of every resample is broadened)
    blocks = blocks_of(e_lo, h, n_fine, order, **(
        {} if dtype == np.float64 else {"block": F32_BLOCK, "cutoff": F32_CUTOFF}))
    n_traj, n_time = counts.shape[1], model.n_time
    n_e = len(kinetic_energies)
    # resample 0: every trajectory once (the unresampled ensemble), for the recentring
    # and copies of it up to a multiple of LANES resamples (whole vector loops in the kernel)
    n_all = counts.shape[0] + 1
    n_pad = -(-n_all // KBF.LANES) * KBF.LANES
    allc = np.vstack([np.ones((1 + n_pad - n_all, n_traj)), counts])
    n_rep = KBF.reps_per_chunk(n_pad, n_fine, order, dtype.itemsize)
    cap = budget // max(n_time * n_e * dtype.itemsize, 1)  # replicate rows of a chunk
    if n_rep > cap:
        n_rep = max(KBF.LANES, cap // KBF.LANES * KBF.LANES)
    # whole multiplicities below 256 (always, in practice) are read as bytes: every stick
    # reads its trajectory's row for every resample, a quarter of the memory traffic
    small = bool(np.all(allc == np.round(allc))) and float(allc.max(initial=0.0)) < 256
    rw_type = np.uint8 if small and allc.min(initial=0.0) >= 0 else dtype
    unit = np.zeros((n_traj, n_time))
    shifts = check_shifts(ionisation_shifts, ens.n_cation)
    # replicate maps in the replicates' precision (float32: half the memory traffic of the
    # time products, the recentring and the percentiles; the percentiles are float64)
    out = np.zeros((1, len(cmat), n_e, n_pad), dtype=dtype)
    c32 = np.ascontiguousarray(cmat, dtype=dtype)
    tail = THRESHOLD_TAIL * probe.effective_spectral_fwhm * FWHM_TO_SIGMA
    bar = None
    n_chunks = -(-n_pad // n_rep)
    if progress:
        from tqdm.auto import tqdm
        bar = tqdm(total=n_chunks, desc="bootstrap chunks", unit="chunk")
    try:
        for c, r0 in enumerate(range(0, n_pad, n_rep)):
            sub = allc[r0:r0 + n_rep]
            y = KBF.fused_replicates(
                ens, layout=layout, w_traj=w_traj, rw=np.ascontiguousarray(sub.T, rw_type),
                dtype=dtype,
                cross_section=cross_section, total_energy=probe.total_energy, tail=tail,
                start=model.grid_start, dt=model.time_step, n_time=n_time, e_lo=e_lo, h=h,
                n_fine=n_fine, order=order, shifts=shifts, blocks=blocks, n_energies=n_e,
                unit=unit if c == 0 else None)
            if c == 0:
                _unit_extension(ens, layout, unit, w_traj, model=model, probe=probe,
                                shifts=shifts)
            norm = normalise_of((sub * w_traj) @ unit, sub @ w_traj)
            KRM.apply_time(y[None], c32, norm, out[..., r0:r0 + sub.shape[0]])
            del y
            if bar is not None:
                bar.update()
    finally:
        if bar is not None:
            bar.close()
    reps = out[0, ..., n_pad - n_all:]  # the padding copies dropped
    if intensity is None:  # not recentred: the unresampled replicate first
        return reps
    reps[..., 1:] += (intensity - reps[..., 0])[..., None]  # recentre on the map
    return reps[..., 1:]
