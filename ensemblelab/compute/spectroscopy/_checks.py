"""Argument checks, defaults and time-grid helpers shared by the TRPES modules (private).

The names here are public within the spectroscopy package (no leading underscore) so
that :mod:`.sticks`, :mod:`.model`, :mod:`.maps` and :mod:`.contributions` share one
wording of every error.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from ...errors import SchemaError
from .cross_sections import CrossSection, cross_section_from_description
from .pulses import GaussianPulse

__all__ = ["DEFAULT_ORDER", "DEFAULT_BINS_PER_FWHM", "REUSE_TOLERANCE", "TIME_CUTOFF",
           "EDGE_SIGMAS", "DECOMPOSITIONS", "check_grid", "check_nonneg", "check_pulse",
           "check_decompose", "check_time_step", "check_ranges", "settings_from_params",
           "component_labels", "grid_from_range", "time_bins", "stick_settings_from_params"]

#: Taylor moments kept per fine energy bin (truncation bound 2.8e-7 of the peak at 4 bins
#: per FWHM; 8 moments of float64 are one 64-byte cache line, see ._kernels_deposit)
DEFAULT_ORDER = 8
#: fine energy bins per FWHM of the stick Gaussian
DEFAULT_BINS_PER_FWHM = 4.0
#: cached moments are re-broadened for a new width while the truncation bound of the
#: moment expansion (``_kernels_broadening.truncation_bound``) stays below this
REUSE_TOLERANCE = 3e-5
#: kernel half-width of the temporal convolution in sigma_cc
TIME_CUTOFF = 8.0
#: edge-affected region at the end, in sigma_cc (three standard deviations: common practice)
EDGE_SIGMAS = 3.0
#: the additive decompositions of a map
DECOMPOSITIONS = (None, "neutral", "cation", "pair", "diabatic")


def check_grid(values: npt.ArrayLike, name: str) -> np.ndarray:
    """A non-empty, finite, strictly increasing 1-D float array, or a SchemaError."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 1 or arr.size < 1 or not np.all(np.isfinite(arr)):
        raise SchemaError(f"The {name!r} parameter must be a non-empty 1-D array of finite "
                          f"floats. Got shape {arr.shape}.")
    if arr.size > 1 and np.any(np.diff(arr) <= 0):
        raise SchemaError(f"The {name!r} parameter must increase strictly.")
    return arr


def check_nonneg(value: float, name: str) -> float:
    """A finite float >= 0, or a SchemaError."""
    if not isinstance(value, int | float | np.floating | np.integer) or not (
        math.isfinite(float(value)) and float(value) >= 0
    ):
        raise SchemaError(f"The {name!r} parameter must be a float in the range [0, inf). Got "
                          f"{value!r} instead.")
    return float(value)


def check_pulse(p: object, name: str, *, optional: bool = False) -> GaussianPulse | None:
    """A GaussianPulse (or None when `optional`), or a SchemaError."""
    if p is None and optional:
        return None
    if not isinstance(p, GaussianPulse):
        raise SchemaError(f"The {name!r} parameter must be a GaussianPulse. Got "
                          f"{type(p).__name__} instead.")
    return p


def check_decompose(decompose: object) -> str | None:
    """One of :data:`DECOMPOSITIONS`, or a SchemaError."""
    if decompose not in DECOMPOSITIONS:
        raise SchemaError(f"The 'decompose' parameter must be one of {list(DECOMPOSITIONS)}. "
                          f"Got {decompose!r} instead.")
    return decompose


def check_time_step(time_step: float | None) -> float | None:
    """None or a float > 0, or a SchemaError."""
    if time_step is None:
        return None
    dt = check_nonneg(time_step, "time_step")
    if dt == 0:
        raise SchemaError("The 'time_step' parameter must be > 0.")
    return dt


def check_ranges(energy_range: Sequence[float], delay_range: Sequence[float]
                 ) -> tuple[tuple[float, float], tuple[float, float]]:
    """``(e1, e2), (t1, t2)`` with low < high, or a SchemaError."""
    e1, e2 = (float(x) for x in energy_range)
    t1, t2 = (float(x) for x in delay_range)
    if not (e2 > e1 and t2 > t1):
        raise SchemaError(f"energy_range and delay_range must be (low, high) with low < high; "
                          f"got {energy_range!r}, {delay_range!r}.")
    return (e1, e2), (t1, t2)


def settings_from_params(
    p: dict[str, Any],
) -> tuple[GaussianPulse, GaussianPulse | None, CrossSection, str]:
    """(probe, pump, cross-section model, weights) that made a map, from its ``params``
    (the model with its parameters: exponent, partial wave, tables)."""
    try:
        probe = GaussianPulse(**p["probe"])
        pump = GaussianPulse(**p["pump"]) if p.get("pump") else None
    except (KeyError, TypeError) as exc:
        raise SchemaError("trpes_map.params lacks the probe settings; pass a map made by "
                          "compute_trpes.") from exc
    cs = cross_section_from_description(p.get("cross_section") or {"model": "dyson"})
    w = p.get("weights", "auto")
    weights = w if w in ("doorway", "ensemble", "uniform", "auto") else w.split(":", 1)[-1]
    return probe, pump, cs, weights


def stick_settings_from_params(p: dict[str, Any]) -> dict[str, Any]:
    """``ionisation_shifts`` and ``absorbing`` that made a map, from its ``params``."""
    shifts = p.get("ionisation_shifts")
    return {"ionisation_shifts": None if shifts is None else list(shifts),
            "absorbing": p.get("absorbing", "zero")}


def component_labels(source: Any, decompose: str | None) -> list[str]:
    """Labels of the components of a decomposition (empty for None).

    `source` is an Ensemble or a block source (``state_labels``, ``cation_labels``,
    ``metadata``).
    """
    if decompose is None:
        return []
    if decompose == "neutral":
        return list(source.state_labels)
    if decompose == "cation":
        return list(source.cation_labels)
    if decompose == "pair":
        return [f"{a}->{b}" for a in source.state_labels for b in source.cation_labels]
    meta = source.metadata
    dl = list(meta.get("diabatic_labels") or [f"d{lab}" for lab in source.state_labels])
    has = source.has if hasattr(source, "has") else (
        lambda name: getattr(source, name, None) is not None)
    if has("adt_cation"):  # cation states diabatised too
        cl = list(meta.get("cation_diabatic_labels")
                  or [f"d{lab}" for lab in source.cation_labels])
    else:  # no cation ADT: the cation states stay adiabatic, and are named so
        cl = list(source.cation_labels)
    return [f"{a}->{b}" for a in dl for b in cl]


def grid_from_range(t_min: float, t_max: float, dt: float) -> tuple[float, int]:
    """Start (fs) and size of the internal time grid covering [t_min, t_max] with step dt.

    The grid starts at the last multiple of `dt` at or before min(t_min, 0) and holds
    one point past the last snapshot (so that every snapshot has two neighbours).
    """
    start = math.floor(t_min / dt + 1e-9) * dt if math.isfinite(t_min) else 0.0
    start = min(start, 0.0)
    j_max = int(np.floor((t_max - start) / dt + 1e-9)) if math.isfinite(t_max) else 0
    return start, j_max + 2


def time_bins(time: np.ndarray, start: float, dt: float) -> tuple[np.ndarray, np.ndarray | None]:
    """Grid index of each time and its fraction towards the next point (None: all on points)."""
    pos = (time - start) / dt
    j = np.floor(pos + 1e-9).astype(np.int64)
    frac = pos - j
    frac[np.abs(frac) < 1e-9] = 0.0
    return j, (frac if np.any(frac > 0) else None)
