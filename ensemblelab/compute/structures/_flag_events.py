"""Flag events of :mod:`.outliers` and the bond-topology rule (shared helpers)."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from ...errors import SchemaError
from . import _kernels_geometry as _k

if TYPE_CHECKING:
    from ...data.ensemble import Ensemble

__all__ = ["TOPOLOGY_CHUNK_ELEMENTS", "FlagEvents", "first_per_traj", "fmt", "topology_flags"]

#: snapshot x atom-pair elements per chunk of the topology check (about 2 MB per float
#: temporary; the check is row by row, so the chunk size does not change its result)
TOPOLOGY_CHUNK_ELEMENTS = 1 << 18


class FlagEvents:
    """Collects (traj row, kind, time, reason, excess) events; keeps the first per kind.

    ``excess`` is the measured value over its limit (> 1: past it); the largest per kind
    is kept.
    """

    def __init__(self, n_traj: int) -> None:
        self.events: list[dict[str, tuple[float, str, float]]] = [{} for _ in range(n_traj)]

    def add(self, row: int, kind: str, time: float, reason: str, excess: float) -> None:
        cur = self.events[row].get(kind)
        if cur is None:
            self.events[row][kind] = (float(time), reason, float(excess))
        elif time < cur[0]:
            self.events[row][kind] = (float(time), reason, max(float(excess), cur[2]))
        elif excess > cur[2]:
            self.events[row][kind] = (cur[0], cur[1], float(excess))


def first_per_traj(mask: np.ndarray, tix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Trajectory rows with any True in `mask`, and the first snapshot row of each."""
    idx = np.flatnonzero(mask)
    rows, first = np.unique(tix[idx], return_index=True)
    return rows, idx[first]


def fmt(x: float) -> str:
    return f"{x:.3g}"



def topology_flags(ens: Ensemble, th: Any, tix: np.ndarray, time: np.ndarray,
              flags: FlagEvents, chunk_size: int) -> None:
    """Bond-topology flags (``topology_change``, ``bond_formed``) of an ensemble block.

    Bonds are pairs closer than ``th.bond_scale`` times the sum of covalent radii at
    the first finite snapshot; a change must last ``th.bond_persist_steps`` steps.
    """
    from .geometry import covalent_radii_for

    try:
        rad = covalent_radii_for(ens.symbols)
    except SchemaError:
        return  # unknown elements: no covalent radii, no topology check
    i, j = _k.pair_indices(ens.n_atoms)
    cut = th.bond_scale * (rad[i] + rad[j])
    finite = np.isfinite(ens.geometries).all(axis=(1, 2))
    rows0, pos0 = first_per_traj(finite, tix)
    ref_row = np.full(len(ens.trajectories), -1)
    ref_row[rows0] = pos0
    r0_all = _k.pair_distances(ens.geometries[pos0], i, j) if len(pos0) else np.zeros((0, len(i)))
    r0_of = np.full((len(ens.trajectories), len(i)), np.nan)
    r0_of[rows0] = r0_all
    bonded0 = r0_of < cut
    sym = ens.symbols
    n = ens.n_snapshots
    any_mask = {"broken": np.zeros(n, bool), "formed": np.zeros(n, bool)}
    first_pair = {"broken": np.zeros(n, np.int64), "formed": np.zeros(n, np.int64)}
    dist = {"broken": np.zeros(n), "formed": np.zeros(n)}
    over = {"broken": np.zeros(n), "formed": np.zeros(n)}
    # a handful of (rows, pairs) float temporaries live per chunk: bound their size
    step = max(1, min(int(chunk_size), TOPOLOGY_CHUNK_ELEMENTS // max(1, len(i))))
    for s in range(0, n, step):
        sl = slice(s, min(n, s + step))
        r = _k.pair_distances(ens.geometries[sl], i, j)
        t_ix = tix[sl]
        b0 = bonded0[t_ix]
        r0 = r0_of[t_ix]
        with np.errstate(invalid="ignore"):
            masks = {"broken": b0 & ((r > cut * (1 + th.bond_margin)) | (r > th.bond_stretch * r0)),
                     "formed": ~b0 & np.isfinite(r0) & (r < cut * (1 - th.bond_margin))}
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = {"broken": np.fmax(r / (cut * (1 + th.bond_margin)),
                                       r / (th.bond_stretch * r0)),
                     "formed": cut * (1 - th.bond_margin) / r}
        for word, mask in masks.items():
            any_mask[word][sl] = mask.any(axis=1)
            p = np.argmax(mask, axis=1)
            first_pair[word][sl] = p
            dist[word][sl] = r[np.arange(len(p)), p]
            over[word][sl] = np.where(mask, ratio[word], 0.0).max(axis=1)
    # the change must persist for bond_persist_steps consecutive steps (or to the end)
    k = max(1, int(th.bond_persist_steps))
    last = np.r_[np.flatnonzero(tix[1:] != tix[:-1]), n - 1]
    end_of = last[np.searchsorted(last, np.arange(n))]
    for word, mask in any_mask.items():
        c = np.r_[0, np.cumsum(mask)]
        stop = np.minimum(np.arange(n) + k, end_of + 1)
        ok = mask & (c[stop] - c[np.arange(n)] == stop - np.arange(n))
        worst = np.zeros(len(ens.trajectories))
        np.maximum.at(worst, tix[ok], over[word][ok])
        for traj_row, loc in zip(*first_per_traj(ok, tix), strict=True):
            pp = int(first_pair[word][loc])
            a_, b_ = int(i[pp]), int(j[pp])
            t = time[loc]
            flags.add(int(traj_row), "topology_change" if word == "broken" else "bond_formed", t,
                      f"bond {a_}-{b_} ({sym[a_]}-{sym[b_]}) {word} at {fmt(t)} fs "
                      f"({dist[word][loc]:.2f} Angstrom, {r0_of[traj_row, pp]:.2f} Angstrom "
                      "at t=0)", float(worst[traj_row]))
