"""Blocks of whole trajectories: the contract between data sources and the reduction engine.

A :class:`BlockSource` (an in-memory ensemble wrapped by
:class:`ensemblelab.compute.engine.EnsembleSource`, or a chunked store opened as
:class:`ensemblelab.io.lazy.LazyEnsemble`) hands out picklable loaders, one per block of
whole trajectories, and a :class:`BlockSpan` per block saying where it sits. Defined in
the data layer so that io implements it and compute consumes it without either
importing the other.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol, runtime_checkable

__all__ = ["BlockSpan", "BlockSource"]


@dataclass(frozen=True)
class BlockSpan:
    """Where a block sits in its source, known without reading it.

    Attributes
    ----------
    index : int
        Block number (0-based).
    traj_start : int
        Row of the source's trajectory table holding the block's first trajectory.
    n_trajectories, n_snapshots : int
        Sizes of the block.
    summary : mapping
        What the source knows about the block without reading it (a chunked store's
        manifest: ``t_min``, ``t_max``, ``dt_values``, ``dt_counts``, ``ip_min``,
        ``ip_max``); empty when nothing is known.
    """

    index: int
    traj_start: int
    n_trajectories: int
    n_snapshots: int
    summary: Mapping[str, Any] = field(default_factory=dict)


@runtime_checkable
class BlockSource(Protocol):
    """Blocks of whole trajectories plus the small tables every block shares.

    Implemented by :class:`EnsembleSource` (one block) and by
    :class:`ensemblelab.io.lazy.LazyEnsemble` (one block per chunk).
    """

    trajectories: Any  # pandas.DataFrame, one row per trajectory (with ``t_end``)
    state_labels: tuple[str, ...]
    cation_labels: tuple[str, ...]
    metadata: dict[str, Any]

    @property
    def n_trajectories(self) -> int: ...

    @property
    def n_snapshots(self) -> int: ...

    @property
    def n_states(self) -> int: ...

    @property
    def n_cation(self) -> int: ...

    @property
    def columns(self) -> list[str]: ...

    @property
    def times(self) -> Any:
        """Sorted distinct snapshot times (fs), ndarray."""
        ...

    def has(self, name: str) -> bool:
        """Whether the source holds array `name`."""
        ...

    def spans(self) -> list[BlockSpan]:
        """One :class:`BlockSpan` per block, in trajectory order."""
        ...

    def block_loaders(self, fields: Iterable[str] | None = None,
                      columns: Iterable[str] | None = None) -> list[Callable[[], Any]]:
        """One picklable loader per block.

        ``fields`` names the arrays a partial reads (None: a whole, validated
        Ensemble); ``columns`` the snapshot columns besides ``traj``, ``time`` and
        ``active``.
        """
        ...
