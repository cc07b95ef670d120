"""Fused compiled pass from ensemble arrays to TRPES moment histograms (private).

The numpy path (:func:`.sticks.block_sticks` then :func:`.model.deposit`) builds every
stick as a row of several arrays of length ``n_snapshots x n_cation`` (ionisation and
kinetic energies, masks, cross sections, weights, time indices) before depositing
them. For 10^7 (snapshot, channel) contributions those temporaries cost far more than
the deposit itself. This module does the same arithmetic in one compiled pass per
thread over the snapshots: for each snapshot and cation channel it forms

* the ionisation energy ``IP = E_cation,k - E_neutral,active + shift_k`` (eV),
* the excess energy ``E = n h nu - IP`` and the threshold test ``E > -tail``
  (the erf open fraction is applied by the broadening, as on the numpy path),
* the cross section (the built-in models only: squared Dyson norm, hydrogenic
  Coulomb, hydrogenic plane wave, Wigner threshold law),
* the stick weight ``w_traj * sigma``, its time-grid index and linear split,
* the alive weights (total, count, per channel) of the snapshots with data,
* and, with missing data, the per-channel rescaling and gap copies of
  :class:`.gaps.TimeFill`,

and adds the stick's ``order`` Taylor moments straight into the accumulator (same
layout and definition as :mod:`._kernels_deposit`). Nothing of length ``n_sticks`` is
allocated. Threads: when the snapshots are grouped by trajectory and sorted by time
(:func:`._kernels_layout.block_layout`) and no missing-data fill applies, each thread
takes a range of grid times (each trajectory's snapshots in it found by bisection) and
fills those rows of one shared accumulator; otherwise each takes whole trajectories
with an accumulator of its own, added at the end. The numpy path stays the reference
("naive twin"): tests compare both on ensembles with missing data, absorbing
trajectories, shifts, several cross-section models, in memory and chunked, on one
thread and several.

Preconditions (:func:`fusable`): numba installed, no decomposition, ``absorbing`` not
``"carry"``, a built-in cross-section model, and no sticks to keep. Otherwise the
caller uses the numpy path.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from ...units import HARTREE_EV
from ._kernels_layout import (
    MIN_SNAPSHOTS_PER_THREAD,
    Layout,
    block_arrays,
    block_layout,
    fused_energy_range,
    last_rows,
    trajectory_rows,
)
from .cross_sections import AnionThresholdLaw, DysonNorm, HydrogenicCoulomb, HydrogenicPWA

__all__ = ["fusable", "compiled_available", "cross_section_code", "fused_energy_range",
           "fused_pass", "last_rows", "trajectory_rows", "block_layout", "Layout",
           "MIN_SNAPSHOTS_PER_THREAD"]

_LOCK = threading.Lock()
_COMPILED: dict[str, Any] = {}


def cross_section_code(cs: Any) -> tuple[int, float, float] | None:
    """``(kind, p1, p2)`` of a built-in cross-section model for the kernel, else None.

    kind 0: squared Dyson norm; 1: hydrogenic Coulomb (p1 = sigma0 in Mb for Z = 1);
    2: hydrogenic plane wave (p1 = zeta in bohr^-1, p2 = 1 for a fixed zeta);
    3: Wigner threshold law (p1 = l + 1/2). Exact types only (a subclass may
    override ``__call__``).
    """
    t = type(cs)
    if t is DysonNorm:
        return 0, 0.0, 0.0
    if t is HydrogenicCoulomb:
        from scipy.constants import physical_constants

        alpha = physical_constants["fine-structure constant"][0]
        a0_cm = physical_constants["Bohr radius"][0] * 100.0
        return 1, 2.0**9 * math.pi**2 * alpha * a0_cm**2 / 3.0 / 1e-18, 0.0
    if t is HydrogenicPWA:
        return 2, 0.0 if cs.zeta is None else float(cs.zeta), 0.0 if cs.zeta is None else 1.0
    if t is AnionThresholdLaw:
        return 3, cs.l + 0.5, 0.0
    return None


def compiled_available() -> bool:
    """True when the compiled fused kernels can be used (numba installed)."""
    return _kernels() is not None


def fusable(*, cross_section: Any, decompose: str | None, absorbing: str,
            keep_sticks: bool) -> bool:
    """True when the fused pass can replace the numpy stick preparation."""
    return (not keep_sticks and decompose is None and absorbing != "carry"
            and cross_section_code(cross_section) is not None and _kernels() is not None)


# ----------------------------------------------------------------- compiled functions
def _sigma(kind, p1, p2, d, e, ip, omega):  # pragma: no cover - compiled by numba
    """Cross section of one stick (see :mod:`.cross_sections`); e >= 0 (eV)."""
    if kind == 0:
        return d
    if kind == 1:
        i = ip if ip > 1e-300 else 1e-300
        z2 = 2.0 * i / HARTREE_EV
        x = math.sqrt(e / i)
        if x < 1e-6:
            eac = 1.0 - x * x / 3.0
            den = 1.0
        else:
            eac = math.atan(x) / x
            den = -math.expm1(-2.0 * math.pi / x)
        r = ip / (ip + e)
        return d * (p1 / z2 * r * r * r * r * math.exp(-4.0 * eac) / den)
    if kind == 2:
        ea = e / HARTREE_EV
        ia = ip / HARTREE_EV
        z = p1 if p2 > 0.0 else math.sqrt(2.0 * (ia if ia > 0.0 else 0.0))
        k2 = 2.0 * ea
        return d * (omega / HARTREE_EV * k2**1.5 * z**5 / (z * z + k2) ** 6)
    return d * e**p1


#: sticks collected (their accumulator lines prefetched) before they are added
BATCH = 64

#: time ranges per thread of the time-split pass (taken in turn by the threads), at
#: least; and accumulator bytes per time range, at most (1 thread, 38 MB accumulator
#: of the end-to-end benchmark: 116 ms CPU in one range, 92-94 ms in 2-4, 104 ms in 16;
#: 2 threads: 2 ranges each best)
JOBS_PER_THREAD = 2
JOB_BYTES = 16 << 20


def _prefetch(arr, index):  # pragma: no cover - replaced by a numba intrinsic
    """Hint the CPU to fetch ``arr[index]`` (no effect on results)."""


def _add8(acc, row, v, d):  # pragma: no cover - replaced by a numba intrinsic
    """``acc[row + k] += v d^k``, k = 0..7."""


def _flush(acc, buf_r, buf_d, buf_v, nb, order):  # pragma: no cover - compiled by numba
    """Add the ``nb`` queued sticks to ``acc``; returns 0 (the new queue length)."""
    for q in range(nb):
        if order == 8:
            _add8(acc, buf_r[q], buf_v[q], buf_d[q])
        else:
            vq = buf_v[q]
            for m in range(order):
                acc[buf_r[q] + np.uint64(m)] += vq
                vq *= buf_d[q]
    return 0


def _grid_index(t, start, dt):  # pragma: no cover - compiled by numba
    """Time-grid index of time ``t`` (the rounding of every pass)."""
    return np.int64(math.floor((t - start) / dt + 1e-9))


def _first_at(time, lo, hi, start, dt, j):  # pragma: no cover - compiled by numba
    """First row of ``lo:hi`` (times sorted) whose grid index is >= ``j`` (else hi)."""
    while lo < hi:
        mid = (lo + hi) >> 1
        if _grid_index(time[mid], start, dt) < j:
            lo = mid + 1
        else:
            hi = mid
    return lo


def _pass(time, active, starts, tix, w_traj, energies, cat, dyson, by_state, shifts, kind,
          p1, p2, total, tail, start, dt, n_time, shift_e, inv_h, n_fine, order, do_dep,
          acc, do_alive, alive, alive_n, alive_ch, fill_on, scale, f_off, f_gap, f_fac,
          r_lo, r_hi, j_lo, j_hi, spill, zero, counts):  # pragma: no cover - numba
    """Alive weights and/or moment deposit of the snapshots of trajectory rows
    ``r_lo:r_hi`` (rows ``starts[r]:starts[r + 1]``) whose grid index is in
    ``j_lo:j_hi`` (see the module doc).

    Each trajectory's snapshots in ``j_lo:j_hi`` are found by bisection (times sorted
    within trajectories; ``j_lo == 0`` also takes those before the grid, ``j_hi ==
    n_time`` those after it, which count as outside). A linear split's second share at
    ``j_hi < n_time`` goes to accumulator row ``spill`` (the caller adds it to row
    ``j_hi``). ``zero``: zero the accumulator rows ``j_lo:j_hi`` and ``spill`` here
    (first touch in this thread). ``tix`` (not empty): the trajectory row of each
    snapshot, for one range ``starts = [lo, hi]`` of a block not grouped by trajectory.

    ``counts`` (int64, 4): sticks outside the grid, invalid cross sections, snapshots
    lacking data for some channel, sticks deposited (as the numpy path counts them).
    """
    n_cat = cat.shape[1]
    fn = float(n_fine)
    line = n_fine * order
    buf_r = np.zeros(BATCH, np.uint64)
    buf_d = np.zeros(BATCH)
    buf_v = np.zeros(BATCH)
    nb = 0
    two_lines = order != 8 or acc.ctypes.data % 64 != 0
    by_tix = tix.shape[0] > 0
    n_bad = 0
    n_sig = 0
    n_miss = 0
    n_st = 0
    if zero and do_dep:  # first touch of this thread's rows, in order, in this thread
        for q in range(j_lo * line, j_hi * line):
            acc[q] = 0.0
        for q in range(spill * line, (spill + 1) * line):
            acc[q] = 0.0
    for r in range(r_lo, r_hi):
        s0 = starts[r]
        s1 = starts[r + 1]
        if j_lo > 0:
            s0 = _first_at(time, s0, s1, start, dt, j_lo)
        if j_hi < n_time:
            s1 = _first_at(time, s0, s1, start, dt, j_hi)
        w = 0.0 if by_tix else w_traj[r]
        for i in range(s0, s1):
            a = active[i]
            en = energies[i, a]
            if by_tix:
                w = w_traj[tix[i]]
            pos = (time[i] - start) / dt
            j = np.int64(math.floor(pos + 1e-9))
            f = pos - j
            if abs(f) < 1e-9:
                f = 0.0
            if j < 0 or j >= n_time:
                n_bad += 1
                continue
            s = a if by_state else 0
            n_has = 0
            for k in range(n_cat):
                ip = cat[i, k] - en + shifts[k]
                d = dyson[i, s, k]
                if not (math.isfinite(ip) and math.isfinite(d)):
                    continue
                n_has += 1
                if do_alive:
                    alive_ch[j, k] += w * (1.0 - f)
                    if f > 0.0 and j + 1 < n_time:
                        alive_ch[j + 1, k] += w * f
                e = total - ip
                if not do_dep or not e > -tail:
                    continue
                sig = _sigma(kind, p1, p2, d, e if e > 0.0 else 0.0, ip, total)
                if not (math.isfinite(sig) and sig >= 0.0):
                    n_sig += 1
                    continue
                v = w * sig
                p = e * inv_h + shift_e
                if not (p >= 0.0 and p < fn):
                    n_bad += 1
                    continue
                b = np.int64(p)
                dd = p - b - 0.5
                if not fill_on:  # the stick at j (and its share at j + 1)
                    n_st += 1
                    rr = np.uint64((j * n_fine + b) * order)
                    buf_r[nb] = rr
                    buf_d[nb] = dd
                    buf_v[nb] = v * (1.0 - f)
                    _prefetch(acc, rr)
                    if two_lines:
                        _prefetch(acc, rr + np.uint64(order - 1))
                    nb += 1
                    if nb == BATCH:
                        nb = _flush(acc, buf_r, buf_d, buf_v, nb, order)
                    if f > 0.0:
                        if j + 1 >= n_time:
                            n_bad += 1
                        else:
                            tgt = j + 1 if j + 1 < j_hi else spill
                            rr = np.uint64((tgt * n_fine + b) * order)
                            buf_r[nb] = rr
                            buf_d[nb] = dd
                            buf_v[nb] = v * f
                            _prefetch(acc, rr)
                            if two_lines:
                                _prefetch(acc, rr + np.uint64(order - 1))
                            nb += 1
                            if nb == BATCH:
                                nb = _flush(acc, buf_r, buf_d, buf_v, nb, order)
                    continue
                for part in range(2):  # the two grid points of the linear split
                    if part == 1 and not f > 0.0:
                        break
                    bb = j + part
                    if bb >= n_time:
                        n_bad += 1
                        break
                    share = (1.0 - f) if part == 0 else f
                    # per-channel rescaling, then the copies into gaps
                    c0 = f_off[k * n_time + bb]
                    c1 = f_off[k * n_time + bb + 1]
                    for c in range(c0 - 1, c1):
                        n_st += 1
                        if c < c0:
                            tgt = bb if bb < j_hi else spill
                            wt = v * (share * scale[bb, k])
                        else:
                            tgt = f_gap[c]
                            wt = v * share * f_fac[c]
                        rr = np.uint64((tgt * n_fine + b) * order)
                        buf_r[nb] = rr
                        buf_d[nb] = dd
                        buf_v[nb] = wt
                        _prefetch(acc, rr)
                        if two_lines:
                            _prefetch(acc, rr + np.uint64(order - 1))
                        nb += 1
                        if nb == BATCH:
                            nb = _flush(acc, buf_r, buf_d, buf_v, nb, order)
            if n_has < n_cat:
                n_miss += 1
            if do_alive and n_has > 0:
                alive[j] += w * (1.0 - f)
                alive_n[j] += 1.0 - f
                if f > 0.0 and j + 1 < n_time:
                    alive[j + 1] += w * f
                    alive_n[j + 1] += f
    _flush(acc, buf_r, buf_d, buf_v, nb, order)
    counts[0] += n_bad
    counts[1] += n_sig
    counts[2] += n_miss
    counts[3] += n_st


def _kernels() -> dict[str, Callable[..., Any]] | None:
    """The compiled functions, or None when numba is not installed."""
    if "pass" not in _COMPILED:
        with _LOCK:
            if "pass" not in _COMPILED:
                try:
                    import numba
                except ImportError:
                    _COMPILED["pass"] = None
                else:
                    from ._intrinsics import compiled_helpers

                    jit = numba.njit(cache=True, nogil=True, boundscheck=False)
                    g = globals()
                    g["_prefetch"], g["_add8"] = compiled_helpers(numba)
                    inl = numba.njit(nogil=True, boundscheck=False, inline="always")
                    g["_sigma"] = inl(_sigma)
                    g["_grid_index"] = inl(_grid_index)
                    g["_flush"] = numba.njit(nogil=True, boundscheck=False)(_flush)
                    g["_first_at"] = inl(_first_at)
                    _COMPILED["pass"] = jit(_pass)
    return None if _COMPILED["pass"] is None else _COMPILED


def fused_pass(block: Any, *, w_traj: np.ndarray, cross_section: Any, total_energy: float,
               tail: float, start: float, dt: float, n_time: int, e_lo: float, h: float,
               n_fine: int, order: int, shifts: np.ndarray | None, deposit: bool = True,
               alive: bool = True, fill: Any = None, n_threads: int | None = None,
               layout: Layout | None = None) -> dict[str, Any]:
    """One fused pass over a block: moment histogram and/or alive weights.

    Parameters
    ----------
    block : Ensemble or block
        With ``energies``, ``cation_energies``, ``dyson`` and the snapshot table.
    w_traj : ndarray, shape (n_trajectories,)
        Trajectory weights.
    cross_section : CrossSection
        A built-in model (:func:`cross_section_code` is not None).
    total_energy, tail : float
        ``n h nu`` of the probe and the threshold tail (eV).
    start, dt, n_time : float, float, int
        Time grid (fs).
    e_lo, h, n_fine, order
        Fine energy grid and moments (see :mod:`._kernels_deposit`).
    shifts : ndarray, shape (n_cation,), optional
        Ionisation-energy shifts (eV).
    deposit, alive : bool
        What to compute.
    fill : TimeFill, optional
        Missing-data rescaling and gap copies applied to the deposit.
    n_threads : int, optional
        Threads (default: usable cores, one per ``MIN_SNAPSHOTS_PER_THREAD``).
    layout : Layout, optional
        The block's :func:`._kernels_layout.block_layout` (computed when not given).

    Returns
    -------
    dict
        ``hist`` (order, 1, n_time, n_fine) or None, ``alive``, ``alive_count``
        (n_time,), ``alive_channel`` (n_time, n_cation) or None, ``n_missing``,
        ``n_sticks``.

    Raises
    ------
    ValueError
        A stick outside the grid or an invalid cross section (the caller words it).

    Notes
    -----
    Threads share the work by grid time when the snapshots are grouped by trajectory
    and sorted by time and no missing-data fill applies: each fills its own rows of one
    accumulator (no per-thread copies to zero and add). Otherwise they share the
    trajectories, each with its own accumulator, added at the end.
    """
    from ._kernels_deposit import pooled_accumulators, release_accumulators, usable_cores

    k = _kernels()
    assert k is not None
    code = cross_section_code(cross_section)
    assert code is not None
    a = block_arrays(block, shifts)
    n = block.n_snapshots
    n_cat = a["cat"].shape[1]
    time = np.ascontiguousarray(block.snapshots["time"].to_numpy(), dtype=np.float64)
    w_traj = np.ascontiguousarray(w_traj, dtype=np.float64)
    if layout is None:
        layout = block_layout(block)
    if n_threads is None:
        n_threads = max(1, min(usable_cores(), n // MIN_SNAPSHOTS_PER_THREAD))
    n_threads = max(1, min(int(n_threads), max(n, 1)))
    line = n_fine * order
    by_time = deposit and fill is None and layout is not None and layout.sorted
    no_tix: np.ndarray = np.zeros(0, dtype=np.int64)
    jobs: list[tuple[np.ndarray, np.ndarray, int, int, int, int]]
    if by_time:
        assert layout is not None and layout.starts is not None
        # time ranges taken in turn by the threads: their rows of the accumulator stay
        # in the shared cache while filled, and a thread held up by other work on a
        # shared machine leaves its share to the others
        n_jobs = max(JOBS_PER_THREAD * n_threads if n_threads > 1 else 1,
                     -(-8 * n_time * line // JOB_BYTES))
        cuts = time_cuts(time, layout.starts, start, dt, n_time,
                          -(-n_jobs // n_threads) * n_threads)
        jobs = [(layout.starts, no_tix, 0, block.n_trajectories, cuts[t], cuts[t + 1])
                for t in range(len(cuts) - 1)]
    elif layout is not None and layout.starts is not None:
        r_cut = np.searchsorted(layout.starts, [t * n // n_threads
                                                for t in range(n_threads + 1)])
        r_cut[0], r_cut[-1] = 0, block.n_trajectories
        jobs = [(layout.starts, no_tix, int(r_cut[t]), int(r_cut[t + 1]), 0, n_time)
                for t in range(n_threads)]
    else:  # not grouped by trajectory: snapshot ranges, trajectory row of each
        tix = np.ascontiguousarray(trajectory_rows(block), dtype=np.int64)
        jobs = [(np.array([t * n // n_threads, (t + 1) * n // n_threads], dtype=np.int64),
                 tix, 0, 1, 0, n_time) for t in range(n_threads)]
    if fill is not None:
        scale = np.ascontiguousarray(fill.scale, dtype=np.float64)
        f_off = np.searchsorted(fill.key, np.arange(n_cat * n_time + 1)).astype(np.int64)
        f_gap, f_fac = fill.gap.astype(np.int64), fill.factor.astype(np.float64)
    else:
        scale = np.zeros((1, 1))
        f_off, f_gap, f_fac = np.zeros(2, np.int64), np.zeros(1, np.int64), np.zeros(1)
    inv_h = 1.0 / h
    shift_e = 0.5 - e_lo * inv_h
    kind, p1, p2 = code
    if not deposit:
        accs = [np.zeros(1) for _ in range(n_threads)]
    elif by_time:  # one accumulator; a spill row per time range after the grid's rows
        accs = pooled_accumulators((n_time + len(jobs)) * line, 1) * len(jobs)
    else:
        accs = pooled_accumulators(n_time * line, n_threads)

    def run(t: int) -> tuple[np.ndarray, ...]:
        acc = accs[t]
        if deposit and not by_time:
            acc.fill(0.0)  # in order, in the thread that will use the memory
        al, al_n = np.zeros(n_time + 1), np.zeros(n_time + 1)
        al_ch = np.zeros((n_time + 1, n_cat)) if alive else np.zeros((1, 1))
        counts = np.zeros(4, dtype=np.int64)
        starts, tix, r_lo, r_hi, j_lo, j_hi = jobs[t]
        k["pass"](time, a["active"], starts, tix, w_traj, a["energies"], a["cat"],
                  a["dyson"], a["by_state"], a["shifts"], kind, p1, p2, float(total_energy),
                  float(tail), float(start), float(dt), int(n_time), shift_e, inv_h,
                  int(n_fine), int(order), bool(deposit), acc, bool(alive), al,
                  al_n, al_ch, fill is not None, scale, f_off, f_gap, f_fac, int(r_lo),
                  int(r_hi), int(j_lo), int(j_hi), int(n_time + t), by_time,
                  counts)
        return acc, al, al_n, al_ch, counts

    try:
        if n_threads == 1 or len(jobs) == 1:
            parts = [run(t) for t in range(len(jobs))]
        else:
            size = accs[0].size
            cuts_s = [t * size // n_threads for t in range(n_threads + 1)]

            def run_sum(t: int) -> None:  # accs[0] += accs[1] + ..., split over threads
                sl = slice(cuts_s[t], cuts_s[t + 1])
                for other in accs[1:]:
                    accs[0][sl] += other[sl]

            with ThreadPoolExecutor(n_threads) as pool:
                parts = list(pool.map(run, range(len(jobs))))
                if deposit and not by_time:
                    list(pool.map(run_sum, range(n_threads)))
        acc, al, al_n, al_ch, counts = parts[0]
    finally:
        if deposit and not by_time:
            release_accumulators(accs[1:])
    if by_time:  # the spill rows: second shares of a split past a range's last row
        for t in range(len(jobs) - 1):
            j = jobs[t][5]
            acc[j * line:(j + 1) * line] += acc[(n_time + t) * line:(n_time + t + 1) * line]
    for p in parts[1:]:
        al += p[1]
        al_n += p[2]
        al_ch += p[3]
        counts += p[4]
    if counts[1]:
        raise ValueError("the cross-section model must return finite values >= 0, one per "
                         "stick.")
    if counts[0]:
        raise ValueError(f"fused TRPES pass: {int(counts[0])} stick(s) or snapshot(s) outside "
                         "the time or fine energy grid. Hint: size the grids from the data.")
    hist = (acc[:n_time * line].reshape(1, n_time, n_fine, order).transpose(3, 0, 1, 2)
            if deposit else None)
    return {"hist": hist, "alive": al[:n_time], "alive_count": al_n[:n_time],
            "alive_channel": al_ch[:n_time] if alive else None,
            "n_missing": int(counts[2]), "n_sticks": int(counts[3])}


def time_cuts(time: np.ndarray, starts: np.ndarray, start: float, dt: float, n_time: int,
               n_threads: int) -> list[int]:
    """Grid rows ``0 = c_0 < c_1 < ... = n_time`` giving each thread about as many
    snapshots (each trajectory's taken as spread evenly from its first to its last
    grid row)."""
    if n_threads == 1 or n_time < 2 * n_threads:
        return [0, n_time]
    n_k = np.diff(starts)
    has = n_k > 0
    first = starts[:-1][has]
    last = starts[1:][has] - 1
    jf = np.clip(np.floor((time[first] - start) / dt + 1e-9), 0, n_time - 1).astype(np.int64)
    jl = np.clip(np.floor((time[last] - start) / dt + 1e-9), 0, n_time - 1).astype(np.int64)
    rate = n_k[has] / (jl - jf + 1.0)
    d = np.zeros(n_time + 1)
    np.add.at(d, jf, rate)
    np.add.at(d, jl + 1, -rate)
    cum = np.cumsum(np.cumsum(d)[:n_time])
    if not cum.size or cum[-1] <= 0:
        return [0, n_time]
    inner = np.searchsorted(cum, cum[-1] * np.arange(1, n_threads) / n_threads) + 1
    return sorted({0, n_time, *(int(c) for c in inner if 0 < c < n_time)})
