"""``ensemblelab convert SRC DST --chunked``: stream an input into the chunked store."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

__all__ = ["run_chunked"]


def run_chunked(args: argparse.Namespace) -> int:
    """Write ``args.src`` as a chunked store at ``args.dst``; extended-XYZ folders stream."""
    from ..io import detect_format
    from ..io.chunked import convert_extxyz_chunked, read_chunked_manifest, save_chunked
    from ._info import atom_options, load_from_args

    if args.to != "store":
        raise SystemExit("ensemblelab convert: --chunked writes the native store; drop --to.")
    src = Path(args.src)
    if detect_format(src) == "extxyz" and src.is_dir():
        kw = {"energy_unit": args.energy_unit, "time_unit": args.time_unit,
              "length_unit": args.length_unit, "nonfinite": args.nonfinite}
        if args.state_base is not None:
            kw["state_base"] = args.state_base
        kw |= atom_options(args)
        out = convert_extxyz_chunked(src, args.dst, chunk_size=args.chunk_size,
                                     overwrite=args.overwrite, progress=not args.no_progress,
                                     **kw)
    else:  # other inputs fit in memory by construction: load, then split
        ens = load_from_args(args)
        out = save_chunked(ens, args.dst, chunk_size=args.chunk_size, overwrite=args.overwrite)
    m = read_chunked_manifest(out)
    print(f"wrote {out} (chunked store): {m['n_trajectories']} trajectories, "
          f"{m['n_snapshots']} snapshots in {len(m['chunks'])} chunk(s)", file=sys.stdout)
    return 0
