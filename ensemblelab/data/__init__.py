"""Layer 1: the data model (numpy + pandas only)."""

from .elements import atomic_numbers_for, masses_for
from .ensemble import (
    REQUIRED_COLUMNS,
    SCHEMA_VERSION,
    SNAPSHOT_ARRAYS,
    TRAJECTORY_ARRAYS,
    Ensemble,
)

__all__ = [
    "Ensemble",
    "SCHEMA_VERSION",
    "REQUIRED_COLUMNS",
    "SNAPSHOT_ARRAYS",
    "TRAJECTORY_ARRAYS",
    "masses_for",
    "atomic_numbers_for",
]
