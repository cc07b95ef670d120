"""``ensemblelab demo``: generate the invented demo ensemble and write it to disk."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

__all__ = ["register", "run"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``demo`` sub-command."""
    from ..demo import DEFAULT_SEED, DEMO_PRECISION

    p = subparsers.add_parser(
        "demo",
        help="generate the invented demo ensemble (surface hopping of a model chromophore)",
        description="Run the surface-hopping engine on the invented demo chromophore and write "
        "the ensemble in the open extended-XYZ folder layout (gzip) and/or the native store. "
        "Deterministic for a seed.",
    )
    p.add_argument("--out", default="ensemblelab-demo",
                   help="output folder (default: ensemblelab-demo); with --format both it gets "
                        "the sub-folders xyz/ and store/")
    p.add_argument("--n-trajectories", type=int, default=80, help="number of trajectories (80)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"seed ({DEFAULT_SEED})")
    p.add_argument("--t-max", type=float, default=500.0, help="trajectory length in fs (500)")
    p.add_argument("--faults", action=argparse.BooleanOptionalAction, default=True,
                   help="inject labelled faulty trajectories (default: on)")
    p.add_argument("--velocities", action=argparse.BooleanOptionalAction, default=True,
                   help="store Cartesian velocities (default: on)")
    p.add_argument("--format", choices=("both", "xyz", "store"), default="both",
                   help="what to write (default both)")
    p.add_argument("--precision", type=int, default=DEMO_PRECISION,
                   help=f"significant digits in the XYZ files ({DEMO_PRECISION})")
    p.add_argument("--overwrite", action="store_true", help="replace existing output")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Generate and write the demo; returns the exit status."""
    from ..demo import make_ensemble
    from ..errors import StoreError
    from ..io import save, write_extxyz

    out = Path(args.out)
    targets = {"both": [out / "xyz", out / "store"], "xyz": [out], "store": [out]}[args.format]
    existing = [t for t in targets if t.exists() and (not t.is_dir() or any(t.iterdir()))]
    if existing and not args.overwrite:
        # checked before the (long) simulation, not after it
        raise StoreError(f"{existing[0]} already exists and is not empty. Hint: choose another "
                         "--out, or pass --overwrite to replace output this tool wrote.")
    ens = make_ensemble(int(args.n_trajectories), seed=int(args.seed), faults=bool(args.faults),
                        t_max=float(args.t_max), velocities=bool(args.velocities),
                        progress=not args.no_progress)
    written = []
    if args.format in ("both", "xyz"):
        target = out / "xyz" if args.format == "both" else out
        written.append(write_extxyz(ens, target, compress=True, precision=int(args.precision),
                                    overwrite=bool(args.overwrite)))
    if args.format in ("both", "store"):
        target = out / "store" if args.format == "both" else out
        written.append(save(ens, target, overwrite=bool(args.overwrite)))
    print(f"invented demo ensemble: {ens.n_trajectories} trajectories, {ens.n_snapshots} "
          f"snapshots, seed {args.seed}, faults {'on' if args.faults else 'off'}")
    for path in written:
        print(f"wrote {path}")
    sys.stdout.flush()
    return 0
