"""Bands: what makes a region of a photoelectron map; the strongest snapshots, sums over
clusters, states or trajectories with their shares, and the share of any snapshot."""

from __future__ import annotations

from .analysis import (
    BAND_GROUPS,
    BandAnalysis,
    SnapshotGroups,
    analyse_band,
    group_band,
    label_groups,
)
from .band_sticks import BandSticks, prepare_band_sticks

__all__ = [
    "analyse_band",
    "BandAnalysis",
    "SnapshotGroups",
    "BAND_GROUPS",
    "group_band",
    "label_groups",
    "BandSticks",
    "prepare_band_sticks",
]
