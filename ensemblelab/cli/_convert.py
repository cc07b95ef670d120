"""``ensemblelab convert SRC DST``: any supported input to the native store."""

from __future__ import annotations

import argparse
import sys

from ._info import add_load_options, load_from_args

__all__ = ["register"]


def _run(args: argparse.Namespace) -> int:
    args.path = args.src
    if getattr(args, "chunked", False):  # streamed into the chunked store (larger than memory)
        from ._chunked_convert import run_chunked

        return run_chunked(args)
    ens = load_from_args(args)
    if args.to == "store":
        from ..io import save

        out = save(ens, args.dst, overwrite=args.overwrite)
    else:
        from ..io import write_extxyz

        out = write_extxyz(ens, args.dst, compress=args.compress, overwrite=args.overwrite,
                           progress=not args.no_progress)
    print(f"wrote {out} ({args.to}): {ens.n_trajectories} trajectories, {ens.n_snapshots} "
          f"snapshots, {ens.n_states} states", file=sys.stdout)
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``convert`` sub-command."""
    p = subparsers.add_parser(
        "convert", help="convert any supported input to the native store",
        description="Load SRC (native store, extended-XYZ folder or file, CSV/Parquet table), "
                    "convert units to fs/eV/Angstrom, and write DST as a native store (or, "
                    "with --to extxyz, as an extended-XYZ folder). The write is atomic.")
    p.add_argument("src", help="input path")
    p.add_argument("dst", help="output folder")
    p.add_argument("--to", choices=("store", "extxyz"), default="store",
                   help="output layout (default: the native store)")
    p.add_argument("--compress", action="store_true", help="gzip the files (--to extxyz)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace DST if it is a store (never any other folder)")
    p.add_argument("--chunked", action="store_true",
                   help="write the chunked store (for ensembles larger than memory; extended-XYZ "
                        "folders are streamed file by file); open it with load(DST, lazy=True)")
    p.add_argument("--chunk-size", type=int, default=1000,
                   help="trajectories per chunk with --chunked (default 1000)")
    add_load_options(p)
    p.set_defaults(func=_run)
