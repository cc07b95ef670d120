"""``ensemblelab report [PATH] --out DIR``: the headless HTML report."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

__all__ = ["register"]


def register(subparsers: Any) -> None:
    """Add the ``report`` sub-command."""
    p = subparsers.add_parser(
        "report", help="write a headless HTML report (map, populations, flags, clusters, "
                       "representative structures)",
        description="Write an HTML page with the TRPES map and its decomposition, populations "
                    "with a kinetic fit, flagged trajectories, clusters and representative "
                    "structures (PNG figures, CSV tables, XYZ files). Default PATH: the "
                    "invented demo ensemble.")
    p.add_argument("path", nargs="?", default=None, help="ensemble (default: the demo data)")
    p.add_argument("--out", required=True, help="output folder (must not exist)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--photon-energy", type=float, default=None,
                   help="probe photon energy / eV (default: the ensemble's suggested probe)")
    p.add_argument("--probe-fwhm", type=float, default=None,
                   help="probe FWHM / fs (default: the ensemble's suggested probe)")
    p.add_argument("--pump-fwhm", type=float, default=None,
                   help="pump FWHM / fs (default: the ensemble's suggested pump)")
    p.add_argument("--clusters", type=int, default=3, help="clusters per active state")
    p.add_argument("--nonfinite", choices=("keep", "raise"), default="keep",
                   help="NaN/inf values in the data: keep (flagged) or refuse")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Write the report; prints the path of the page."""
    from .. import load
    from ..report import build_report
    from ._explore import default_data_path

    data = Path(args.path).expanduser() if args.path else default_data_path()
    ens = load(data, nonfinite=args.nonfinite, progress=True)
    if args.path is None and ens.transition_strengths is None:
        # the demo: its invented transition strengths, labelled in the metadata and the page
        from ..demo.strengths import with_demo_transition_strengths

        ens = with_demo_transition_strengths(ens)
    page = build_report(ens, args.out, photon_energy=args.photon_energy,
                        probe_fwhm=args.probe_fwhm, pump_fwhm=args.pump_fwhm,
                        n_clusters=args.clusters, source=str(data), overwrite=args.overwrite)
    print(f"report written to {page}")
    return 0
