"""An invented "measured" TRPES map for the demo (made from a perturbed model plus noise).

This is **not** experimental data. It is simulated with the demo scenario changed in
two ways -- every cation state 0.1 eV higher (so every vertical ionisation energy is
0.1 eV larger and the bands sit 0.1 eV lower in kinetic energy) and a 30 % stronger
constant coupling between the bright and the twisting state (a faster first decay)
-- then put on a coarser grid, shifted in time zero, and given Gaussian noise. The
comparison tools should find the energy shift, the time zero and a good but not
perfect agreement.

``demo_data/measured_map.csv`` is written by :func:`write_measured_map` with the
default arguments (``python -m ensemblelab.demo.measured``); a test regenerates it.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any

import numpy as np

from .._atomic import atomic_write_text
from ..compute.spectroscopy import compute_trpes
from ..compute.spectroscopy.pulses import GaussianPulse
from ..data.spectrum import TRPESMap
from .scenario import DEFAULT_SCENARIO

__all__ = ["MEASURED_SETTINGS", "make_measured_map", "write_measured_map",
           "measured_map_text", "DEFAULT_PATH"]

#: how the invented measurement is made (all invented)
MEASURED_SETTINGS: dict[str, Any] = {
    "n_trajectories": 60,
    "seed": 2024,
    "cation_shift": 0.1,  # eV added to every cation state
    "coupling_factor": 1.3,  # bright/twisting-state constant coupling multiplied
    "time_zero": 8.0,  # fs, the "instrument" time zero is late by this
    "noise": 0.02,  # Gaussian noise, fraction of the map maximum
    "energies": (0.0, 3.0, 61),  # eV: start, stop, count
    "delays": (-100.0, 400.0, 51),  # fs: start, stop, count
    "resolution": 0.08,  # eV instrument resolution
    "digits": 5,  # significant digits written
}

DEFAULT_PATH = Path(__file__).resolve().parents[2] / "demo_data" / "measured_map.csv"


def make_measured_map(**overrides: Any) -> TRPESMap:
    """Simulate the invented measured map (see the module docstring).

    Parameters
    ----------
    **overrides
        Replace entries of :data:`MEASURED_SETTINGS` (e.g. ``n_trajectories=20``).

    Returns
    -------
    TRPESMap
        Rounded to ``digits`` significant digits; ``params["invented"] = True``.
    """
    from . import make_ensemble

    s = {**MEASURED_SETTINGS, **overrides}
    base = DEFAULT_SCENARIO
    sc = base.perturbed(
        cation_energies=tuple(e + s["cation_shift"] for e in base.cation_energies),
        eta_eb=base.eta_eb * s["coupling_factor"],
    )
    ens = make_ensemble(int(s["n_trajectories"]), seed=int(s["seed"]), faults=False,
                        scenario=sc, velocities=False)
    probe = GaussianPulse(photon_energy=sc.probe_energy, fwhm=sc.probe_fwhm)
    pump = GaussianPulse(photon_energy=sc.pump_energy, fwhm=sc.pump_fwhm)
    energies = np.linspace(s["energies"][0], s["energies"][1], int(s["energies"][2]))
    delays = np.linspace(s["delays"][0], s["delays"][1], int(s["delays"][2]))
    m = compute_trpes(ens, probe=probe, pump=pump, kinetic_energies=energies,
                      delays=delays - s["time_zero"], resolution=s["resolution"],
                      progress=False)
    rng = np.random.default_rng(int(s["seed"]))
    inten = m.intensity + s["noise"] * float(m.intensity.max()) * rng.standard_normal(m.shape)
    inten = np.array([[float(f"{v:.{int(s['digits'])}g}") for v in row] for row in inten])
    return TRPESMap(kinetic_energies=energies, delays=delays, intensity=inten,
                    params={"invented": True, "settings": s,
                            "note": "invented measurement: perturbed demo model plus noise"})


def measured_map_text(m: TRPESMap, *, digits: int = MEASURED_SETTINGS["digits"]) -> str:
    """The CSV grid text (header comment, first row energies, first column delays)."""
    lines = [
        "# INVENTED demo data, not a measurement: simulated from the ensemblelab demo",
        "# scenario with cation states +0.1 eV and a 30 % stronger bright/twisting-state",
        "# coupling, time zero +8 fs, 0.08 eV resolution and 2 % Gaussian noise.",
        "# Made by ensemblelab.demo.measured. Rows: delay (fs); columns: kinetic energy (eV).",
        "delay_fs," + ",".join(f"{e:.6g}" for e in m.kinetic_energies),
    ]
    for d, row in zip(m.delays, m.intensity, strict=True):
        lines.append(f"{d:.6g}," + ",".join(f"{v:.{digits}g}" for v in row))
    return "\n".join(lines) + "\n"


def write_measured_map(path: str | os.PathLike[str] = DEFAULT_PATH, **overrides: Any) -> Path:
    """Write the invented measured map as a CSV grid (atomically)."""
    path = Path(path)
    text = measured_map_text(make_measured_map(**overrides))
    atomic_write_text(path, text)
    return path


if __name__ == "__main__":
    print(write_measured_map(sys.argv[1] if len(sys.argv) > 1 else DEFAULT_PATH))
