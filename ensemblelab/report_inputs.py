"""What a report starts from: the molecule's formula and the pulses of its map.

Used by :func:`ensemblelab.report.build_report` (and re-exported there); the explorer
starts from the same pulses.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from typing import Any

from .data.ensemble import Ensemble

__all__ = ["hill_formula", "report_pulses"]


def hill_formula(symbols: Sequence[str]) -> str:
    """Chemical formula in Hill order: C first, H second, then alphabetical.

    Without carbon every element (H included) is alphabetical; counts of one are
    omitted (Hill system, common practice).

    Parameters
    ----------
    symbols : sequence of str
        Element symbols, one per atom.

    Returns
    -------
    str

    Examples
    --------
    >>> hill_formula(["C", "C", "H", "C", "O", "H", "N", "H", "H", "C", "N"])
    'C4H4N2O'
    >>> hill_formula(["O", "H", "H"])
    'H2O'
    """
    counts = Counter(str(s).strip().capitalize() for s in symbols)
    if "C" in counts:
        order = ["C"] + (["H"] if "H" in counts else []) + sorted(
            k for k in counts if k not in ("C", "H"))
    else:
        order = sorted(counts)
    return "".join(f"{el}{counts[el] if counts[el] > 1 else ''}" for el in order)


def report_pulses(ens: Ensemble, *, photon_energy: float | None = None,
                  probe_fwhm: float | None = None, pump_fwhm: float | None = None,
                  pump_photon_energy: float | None = None) -> dict[str, Any]:
    """The pulses of the report's map: given values, else the ensemble's suggested pulses.

    The same defaults as the explorer's map view: probe photon energy and FWHM from
    ``metadata["suggested_probe"]``, pump FWHM and photon energy from
    ``metadata["suggested_pump"]``; 5 eV and 30 fs when the metadata has none. A pump
    without a photon energy takes the probe's.

    Parameters
    ----------
    ens : Ensemble
    photon_energy, probe_fwhm, pump_fwhm, pump_photon_energy : float, optional
        Override (eV, fs); ``pump_fwhm=0`` means no pump.

    Returns
    -------
    dict
        ``photon_energy``, ``probe_fwhm``, ``pump_fwhm``, ``pump_photon_energy`` and
        ``source`` (which values came from where, as text).
    """
    meta = ens.metadata or {}
    probe_meta = meta.get("suggested_probe") or {}
    pump_meta = meta.get("suggested_pump") or {}
    picked: dict[str, Any] = {}
    origin: dict[str, str] = {}
    for key, given, table, field, fallback in (
            ("photon_energy", photon_energy, probe_meta, "photon_energy", 5.0),
            ("probe_fwhm", probe_fwhm, probe_meta, "fwhm", 30.0),
            ("pump_fwhm", pump_fwhm, pump_meta, "fwhm", 30.0),
            ("pump_photon_energy", pump_photon_energy, pump_meta, "photon_energy", None)):
        if given is not None:
            picked[key], origin[key] = float(given), "given"
        elif table.get(field) is not None:
            picked[key], origin[key] = float(table[field]), "suggested"
        else:
            picked[key], origin[key] = fallback, "default"
    if picked["pump_photon_energy"] is None:
        picked["pump_photon_energy"] = picked["photon_energy"]
        origin["pump_photon_energy"] = "probe's"
    kinds = set(origin.values())
    if kinds <= {"suggested"}:
        source = "the ensemble's suggested pulses (metadata suggested_probe, suggested_pump)"
    elif kinds <= {"given"}:
        source = "as given"
    else:
        source = "; ".join(f"{k.replace('_', ' ')}: {v}" for k, v in origin.items())
        source += (" (suggested = the ensemble's metadata suggested_probe/suggested_pump, "
                   "default = the package default without a suggestion)")
    picked["source"] = source
    return picked
