"""Report sections of the further observables (time-resolved X-ray scattering and
transient absorption), used by :func:`ensemblelab.report.build_report`.

Each builder computes its map from the report's ensemble and pulses, writes a figure
(``figures/<name>.png``) and the tidy table (``tables/<name>.csv``) into the report
folder and returns the section's HTML. A builder that cannot run raises ``ValueError``
with the reason (the report then shows the section as missing, with that reason).
"""

from __future__ import annotations

import html
import math
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._csv import to_csv_text
from .errors import MissingDependencyError

if TYPE_CHECKING:
    from .data.ensemble import Ensemble

__all__ = ["scattering_section", "absorption_section", "OBSERVABLE_SECTIONS"]

#: q grid of the report's scattering map (1/Angstrom): the range of typical ultrafast
#: X-ray and electron diffraction experiments (common practice)
REPORT_Q = np.linspace(0.5, 10.0, 96)


def _write(fig: Any, table: Any, folder: Path, name: str) -> None:
    from .plotting.populations import savefig

    (folder / "figures").mkdir(parents=True, exist_ok=True)
    (folder / "tables").mkdir(parents=True, exist_ok=True)
    savefig(fig, folder / "figures" / f"{name}.png", dpi=300)
    (folder / "tables" / f"{name}.csv").write_text(to_csv_text(table), encoding="utf-8")


def _cut_delays(delays: np.ndarray, t_end: float) -> list[float]:
    inside = delays[(delays >= 0) & (delays <= t_end)]
    if inside.size == 0:
        return [float(delays[-1])]
    return sorted({float(inside[0]), float(inside[inside.size // 2]), float(inside[-1])})


def scattering_section(ens: Ensemble, folder: Path, *, probe: Any, pump: Any,
                       delays: np.ndarray) -> str:
    """Time-resolved X-ray scattering: percent-difference map and cuts."""
    from .compute.observables import compute_scattering
    from .plotting.observables import plot_observable_cuts, plot_scattering

    try:
        m = compute_scattering(ens, kind="xray", q=REPORT_Q, delays=delays, pump=pump,
                               probe=probe)  # weights "auto", as the photoelectron map
    except MissingDependencyError as exc:
        raise ValueError(str(exc)) from exc
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 2.8))
    ax1, ax2 = fig.subplots(1, 2)
    plot_scattering(m, ax=ax1)
    plot_observable_cuts(m, delays=_cut_delays(m.delays, float(m.params["t_end"])),
                         components=False, ax=ax2)
    fig.tight_layout()
    _write(fig, m.to_frame(), folder, "scattering")
    return ("<h2>Time-resolved X-ray scattering</h2><p>Independent-atom model (Debye sum, "
            "isotropic; xraydb form factors): percent difference 100 (I - I<sub>ref</sub>) / "
            "I<sub>ref</sub> against the initial conditions, q = 4&pi; sin&theta;/&lambda; "
            f"{REPORT_Q[0]:g}-{REPORT_Q[-1]:g} 1/&Aring;, excitation fraction 1 (the signal "
            f"scales with it); cross-correlation {html.escape(_cc_text(m.params))}.</p>"
            "<img src='figures/scattering.png' alt='scattering map' style='width:1050px'>"
            "<p><a href='tables/scattering.csv'>tables/scattering.csv</a></p>")


def absorption_section(ens: Ensemble, folder: Path, *, probe: Any, pump: Any,
                       delays: np.ndarray) -> str:
    """Transient absorption: map and cuts with the GSB, SE and ESA components."""
    from .compute.observables import compute_transient_absorption
    from .plotting.observables import plot_absorption, plot_observable_cuts

    if ens.transition_strengths is None:
        raise ValueError("the ensemble has no transition_strengths (oscillator strengths "
                         "between neutral states per snapshot), which transient absorption "
                         "needs.")
    gaps = np.abs(np.diff(ens.energies, axis=1))
    hi = float(np.nanmax(ens.energies.max(axis=1) - ens.energies.min(axis=1))) + 0.5
    lo = max(0.05, float(np.nanmin(gaps)) - 0.5) if gaps.size else 0.05
    energies = np.linspace(lo, max(hi, lo + 1.0), 221)
    m = compute_transient_absorption(ens, probe=probe, pump=pump, photon_energies=energies,
                                      delays=delays)  # weights "auto", as the map
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 2.8))
    ax1, ax2 = fig.subplots(1, 2)
    plot_absorption(m, ax=ax1)
    plot_observable_cuts(m, delays=_cut_delays(m.delays, float(m.params["t_end"]))[-1:],
                         ax=ax2)
    fig.tight_layout()
    _write(fig, m.to_frame(), folder, "transient_absorption")
    return ("<h2>Transient absorption</h2><p>Classical doorway-window picture: differential "
            "absorption cross section per excited molecule (&Aring;<sup>2</sup>; positive = "
            "more absorption). Components: ground-state bleach (GSB, &le; 0), stimulated "
            "emission (SE, &le; 0), excited-state absorption (ESA, &ge; 0); they sum to the "
            f"total. Window FWHM {m.params['fwhm_energy']:.3g} eV (probe spectrum); "
            f"cross-correlation {html.escape(_cc_text(m.params))}.{_strengths_note(ens)}</p>"
            "<img src='figures/transient_absorption.png' alt='transient absorption' "
            "style='width:1050px'><p><a href='tables/transient_absorption.csv'>"
            "tables/transient_absorption.csv</a></p>")


def _strengths_note(ens: Ensemble) -> str:
    """Where the transition strengths come from, when the metadata say (e.g. invented)."""
    origin = ens.metadata.get("transition_strengths")
    return f" Transition strengths: {html.escape(str(origin))}." if origin else ""


def _cc_text(params: dict[str, Any]) -> str:
    sigma = params.get("sigma_cc")
    fwhm = 2.0 * math.sqrt(2.0 * math.log(2.0)) * float(sigma or 0.0)
    return "none (pure signal)" if not sigma else f"FWHM {fwhm:.3g} fs"


#: (title, builder) of each section, in page order
OBSERVABLE_SECTIONS: list[tuple[str, Callable[..., str]]] = [
    ("Time-resolved X-ray scattering", scattering_section),
    ("Transient absorption", absorption_section),
]
