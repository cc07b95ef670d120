"""Missing electronic data on the time grid: per-channel alive weights and gap filling.

A snapshot whose data for a cation channel are missing (NaN) leaves that channel's
numerator and alive weight (not computed is not zero signal). Two consequences on the
uniform time grid of a map:

* a channel's alive weight ``A_k(t)`` can be smaller than the total ``A(t)``: its sticks
  are scaled by ``A(t) / A_k(t)`` so that the map's division by ``A`` becomes a
  division by ``A_k``;
* at a grid time where no snapshot has data for a channel (electronic structure run
  every n-th step only, or a grid finer than the output), its signal is undefined, not
  zero: it takes the value linearly interpolated from the nearest grid times with data
  (constant beyond the last one), and where no channel has data the alive weight is
  interpolated likewise.

:func:`time_fill` computes this once for the whole ensemble (the alive weights are
sums over blocks); :meth:`TimeFill.expand` applies it to one block's sticks, so the
in-memory and chunked paths give the same map.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["TimeFill", "time_fill"]


@dataclass(frozen=True)
class TimeFill:
    """How the sticks of each channel are rescaled and copied into the gaps.

    Attributes
    ----------
    alive : ndarray, shape (n_time,)
        Alive weight with the full gaps interpolated (the map's normaliser).
    alive_count : ndarray, shape (n_time,) or None
        Snapshot count with the full gaps interpolated.
    scale : ndarray, shape (n_time, n_cation)
        ``alive / A_k`` where channel k has data, 0 elsewhere.
    key, gap, factor : ndarray, shape (n_copies,)
        Copies: a stick of channel ``k`` at grid index ``b`` (``key = k n_time + b``,
        sorted) is copied to grid index ``gap`` with weight factor ``factor`` (instead
        of ``scale``).
    n_time : int
    """

    alive: np.ndarray
    alive_count: np.ndarray | None
    scale: np.ndarray
    key: np.ndarray
    gap: np.ndarray
    factor: np.ndarray
    n_time: int

    def expand(self, tbin: np.ndarray, tfrac: np.ndarray | None, chan: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sticks after rescaling and copying, all on grid points.

        Parameters
        ----------
        tbin, tfrac, chan : ndarray, shape (n_sticks,)
            Grid index, fraction towards the next point (or None) and channel.

        Returns
        -------
        src : ndarray of int, shape (n_out,)
            Stick each output stick comes from.
        bins : ndarray of int, shape (n_out,)
            Its grid index (no fraction: every output stick is on a grid point).
        factor : ndarray, shape (n_out,)
            Multiplier of the source stick's weight.
        """
        n = tbin.size
        src = np.arange(n)
        bins = tbin
        share = np.ones(n)
        if tfrac is not None:  # split the linear interpolation between the two points
            later = np.flatnonzero(tfrac > 0)
            src = np.r_[src, later]
            bins = np.r_[tbin, tbin[later] + 1]
            share = np.r_[1.0 - tfrac, tfrac[later]]
        ch = chan[src]
        base = share * self.scale[np.minimum(bins, self.n_time - 1), ch]
        key = ch * self.n_time + bins
        lo = np.searchsorted(self.key, key, side="left")
        hi = np.searchsorted(self.key, key, side="right")
        reps = hi - lo
        if not reps.any():
            return src, bins, base
        rep = np.repeat(np.arange(key.size), reps)
        idx = np.arange(rep.size) - np.repeat(np.cumsum(reps) - reps, reps) + lo[rep]
        return (np.r_[src, src[rep]], np.r_[bins, self.gap[idx]],
                np.r_[base, share[rep] * self.factor[idx]])


def _interp_gaps(values: np.ndarray, valid: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """`values` with the points in [lo, hi] that are not valid linearly interpolated."""
    out = values.astype(float).copy()
    idx = np.arange(values.size)
    gaps = ~valid & (idx >= lo) & (idx <= hi)
    if gaps.any() and valid.any():
        out[gaps] = np.interp(idx[gaps], idx[valid], values[valid])
    return out


def time_fill(alive: np.ndarray, alive_channel: np.ndarray,
              alive_count: np.ndarray | None = None) -> TimeFill | None:
    """The rescaling and gap filling for an ensemble's alive weights (None: nothing to do).

    Parameters
    ----------
    alive : ndarray, shape (n_time,)
        Alive weight of the snapshots with data for some channel.
    alive_channel : ndarray, shape (n_time, n_cation)
        Alive weight of the snapshots with data for each channel.
    alive_count : ndarray, shape (n_time,), optional
        Snapshot count (gaps interpolated too).

    Returns
    -------
    TimeFill or None
    """
    n_time, n_cat = alive_channel.shape
    valid = alive > 0
    if not valid.any():
        return None
    lo, hi = int(np.argmax(valid)), int(n_time - 1 - np.argmax(valid[::-1]))
    a_f = _interp_gaps(alive, valid, lo, hi)
    scale = np.zeros((n_time, n_cat))
    keys, gaps, facs = [], [], []
    idx = np.arange(n_time)
    for k in range(n_cat):
        ak = alive_channel[:, k]
        vk = ak > 0
        if not vk.any():
            continue
        scale[vk, k] = a_f[vk] / ak[vk]
        g = idx[~vk & (idx >= lo) & (idx <= hi)]
        if not g.size:
            continue
        pos = np.flatnonzero(vk)
        j = np.searchsorted(pos, g)  # first valid point after each gap point
        left = pos[np.maximum(j - 1, 0)]
        right = pos[np.minimum(j, pos.size - 1)]
        has_l, has_r = j > 0, j < pos.size
        span = np.where(has_l & has_r, right - left, 1)
        lam_l = np.where(has_l & has_r, (right - g) / span, np.where(has_l, 1.0, 0.0))
        lam_r = 1.0 - lam_l
        for b, lam in ((left, lam_l), (right, lam_r)):
            use = lam > 0
            keys.append(k * n_time + b[use])
            gaps.append(g[use])
            facs.append(lam[use] * a_f[g[use]] / ak[b[use]])
    key = np.concatenate(keys) if keys else np.zeros(0, dtype=np.int64)
    if not key.size and np.array_equal(a_f, alive) and np.all(
            (scale == 1.0) | ((alive_channel <= 0) & (alive[:, None] <= 0))):
        return None
    gap = np.concatenate(gaps) if gaps else np.zeros(0, dtype=np.int64)
    fac = np.concatenate(facs) if facs else np.zeros(0)
    order = np.argsort(key, kind="stable")
    count = None if alive_count is None else _interp_gaps(alive_count, valid, lo, hi)
    return TimeFill(alive=a_f, alive_count=count, scale=scale, key=key[order].astype(np.int64),
                    gap=gap[order].astype(np.int64), factor=fac[order], n_time=n_time)
