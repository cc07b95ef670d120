"""The fused (compiled) TRPES map partial: ensemble arrays to moment histograms in one pass.

:func:`fused_partial` returns what :func:`.maps.trpes_partial` returns (moment histogram,
alive weights, counts) without building the sticks: :mod:`._kernels_fused` forms each
(snapshot, channel) contribution and deposits it directly. The numpy path
(:func:`.sticks.block_sticks`) remains the reference and the fallback; the map
reduction uses this one when :func:`use_fused` holds (numba installed, no
decomposition, ``absorbing`` not ``"carry"``, a built-in cross-section model, no sticks
to keep). The formulas are those of :mod:`.sticks` and :mod:`.gaps`; the absorbing
state's alive extension is :func:`.sticks.absorbed_extension` itself.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ...errors import SchemaError
from ..engine import reduce
from ._kernels_fused import (
    block_layout,
    compiled_available,
    fusable,
    fused_energy_range,
    fused_pass,
    last_rows,
    trajectory_rows,
)
from .gaps import time_fill
from .pulses import FWHM_TO_SIGMA
from .sticks import THRESHOLD_TAIL, absorbed_extension, energy_range

__all__ = ["use_fused", "fused_partial", "energy_range_partial", "stick_energy_range",
           "block_layout"]


def use_fused(*, cross_section: Any, decompose: str | None, absorbing: str,
              keep_sticks: bool) -> bool:
    """True when :func:`fused_partial` can replace the numpy stick preparation."""
    return fusable(cross_section=cross_section, decompose=decompose, absorbing=absorbing,
                   keep_sticks=keep_sticks)


def energy_range_partial(block: Any, span: Any, total_energy: float, tail: float = 0.0,
                         shifts: np.ndarray | None = None) -> dict[str, float]:
    """:func:`.sticks.energy_range`, compiled when numba is installed (same result)."""
    if block.cation_energies is None or block.dyson is None or not compiled_available():
        return energy_range(block, span, total_energy, tail, shifts)
    return fused_energy_range(block, total_energy, tail, shifts)


def stick_energy_range(source: Any, total_energy: float, *, tail: float,
                       shifts: np.ndarray | None, client: Any,
                       scheduler: Any) -> tuple[float, float]:
    """Range of the stick energies ``total_energy - IP`` over the channels that give sticks
    (excess energy above ``-tail``; IP shifted by ``shifts``).

    From each block's ``ip_min`` / ``ip_max`` summary where known: a block whose every
    channel gives sticks yields ``top - ip_max`` and ``top - ip_min`` (with the shifts'
    extremes: a cover, exact without shifts), a block without any gives nothing; only
    blocks that are partly open at this photon energy (or lack the summary) are read.
    """
    lo, hi = math.inf, -math.inf
    s_lo = 0.0 if shifts is None else float(shifts.min())
    s_hi = 0.0 if shifts is None else float(shifts.max())
    top = total_energy + tail
    pending = []
    for span in source.spans():
        s = span.summary
        if "ip_min" not in s:
            pending.append(span.index)
        elif s["ip_min"] is None or s["ip_min"] + s_lo >= top:
            continue  # no finite IP, or every channel closed
        elif s["ip_max"] + s_hi < top:
            lo = min(lo, total_energy - (s["ip_max"] + s_hi))
            hi = max(hi, total_energy - (s["ip_min"] + s_lo))
        else:
            pending.append(span.index)
    if pending:
        rest = reduce(source, energy_range_partial, _merge_range, args=(total_energy, tail, shifts),
                      fields=["energies", "cation_energies"], indices=pending, client=client,
                      scheduler=scheduler, desc="energy range")
        lo, hi = min(lo, rest["e_min"]), max(hi, rest["e_max"])
    return (lo if math.isfinite(lo) else 0.0), (hi if math.isfinite(hi) else 0.0)


def _merge_range(a: dict[str, float], b: dict[str, float]) -> dict[str, float]:
    return {"e_min": min(a["e_min"], b["e_min"]), "e_max": max(a["e_max"], b["e_max"])}


def fused_partial(block: Any, opts: dict[str, Any], w_traj: np.ndarray) -> dict[str, Any]:
    """The map partial of one block by the fused pass (see :func:`.maps.trpes_partial`).

    Parameters
    ----------
    block : Ensemble or block
        The block's arrays.
    opts : dict
        The reduction options of :func:`.maps.trpes_model`.
    w_traj : ndarray, shape (n_trajectories,)
        The block's trajectory weights.

    Returns
    -------
    dict
        ``hist`` (order, 1, n_time, n_fine), ``hist_comp`` (None), ``alive``,
        ``alive_count``, ``alive_channel``, ``n_sticks``, ``total_weight``,
        ``weight_sq`` and ``counts``.
    """
    probe = opts["probe"]
    n_time = opts["n_time"]
    shifts = opts.get("ionisation_shifts")
    common = {"w_traj": w_traj, "cross_section": opts["cross_section"],
              "total_energy": probe.total_energy,
              "tail": THRESHOLD_TAIL * probe.effective_spectral_fwhm * FWHM_TO_SIGMA,
              "start": opts["start"], "dt": opts["dt"], "n_time": n_time,
              "e_lo": opts["e_lo"], "h": opts["h"], "n_fine": opts["n_fine"],
              "order": opts["order"], "shifts": shifts}
    fill = opts.get("fill")
    layout = opts.get("layout")  # the in-memory ensemble's (the one block), else per block
    common["layout"] = layout if layout is not None else block_layout(block)
    try:
        r = fused_pass(block, deposit=True, alive=True, fill=fill, **common)
        alive, alive_count, alive_channel = r["alive"], r["alive_count"], r["alive_channel"]
        counts = {"n_missing_data": r["n_missing"], "n_absorbed": 0,
                  "n_absorbed_ionisable": 0}
        state, t_end = opts.get("absorbing_state"), opts.get("t_end")
        if (state is not None and opts.get("absorbing", "zero") != "end" and t_end is not None
                and block.n_snapshots):
            x = last_row_extension(block, w_traj, common["layout"], probe=probe, shifts=shifts,
                           state=state, t_end=t_end, start=opts["start"], dt=opts["dt"],
                           n_time=n_time)
            alive = alive + x.ext
            alive_count = alive_count + x.ext_n
            alive_channel = alive_channel + x.ext[:, None]
            counts.update(x.counts)
        if fill is None and opts.get("local_fill", True):
            local = time_fill(alive, alive_channel, alive_count)
            if local is not None:  # missing data: deposit again with the rescaling
                r = fused_pass(block, deposit=True, alive=False, fill=local, **common)
    except ValueError as exc:
        raise SchemaError(f"compute_trpes: {exc}") from exc
    return {"alive": alive, "alive_count": alive_count, "hist": r["hist"], "hist_comp": None,
            "n_sticks": np.int64(r["n_sticks"]), "total_weight": np.array(float(w_traj.sum())),
            "weight_sq": np.array(float(np.sum(w_traj * w_traj))),
            "alive_channel": alive_channel,
            "counts": {k: np.int64(v) for k, v in counts.items()}}


def last_row_extension(block: Any, w_traj: np.ndarray, layout: Any, *, probe: Any,
               shifts: np.ndarray | None, state: int, t_end: float, start: float, dt: float,
               n_time: int) -> Any:
    """:func:`.sticks.absorbed_extension` from each trajectory's last row only."""
    time = block.snapshots["time"].to_numpy()
    if layout is not None and layout.sorted:  # the last row of each group
        rows = np.where(np.diff(layout.starts) > 0, layout.starts[1:] - 1, -1)
    else:
        rows = last_rows(trajectory_rows(block), time, block.n_trajectories)
    traj = np.flatnonzero(rows >= 0)
    last = rows[traj]
    active = block.snapshots["active"].to_numpy()[last]
    ip = block.cation_energies[last] - block.energies[last, active][:, None]
    if shifts is not None:
        ip = ip + shifts[None, :]
    dyson = block.dyson[last] if block.dyson.ndim == 2 else block.dyson[last, active]
    has = np.isfinite(ip) & np.isfinite(dyson)
    ekin = np.where(has, probe.total_energy - ip, -np.inf)
    return absorbed_extension(last, active, time[last], w_traj[traj], ekin,
                              probe=probe, absorbing_state=state, t_end=t_end, start=start,
                              dt=dt, n_time=n_time)
