"""The ``ensemblelab`` command line.

Each sub-command lives in its own module ``ensemblelab/cli/_<name>.py`` that
defines ``register(subparsers)`` (adds its parser and sets ``func``); this
module discovers the ones present, in the order of :data:`COMMANDS`.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
from collections.abc import Sequence

__all__ = ["main", "build_parser", "COMMANDS"]

#: sub-commands in the order ``--help`` lists them
COMMANDS = ("info", "convert", "demo", "report", "explore")


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser with every available sub-command."""
    from .. import __version__

    parser = argparse.ArgumentParser(
        prog="ensemblelab",
        description="Analyse surface-hopping trajectory ensembles: populations, lifetimes, "
        "time-resolved photoelectron spectra, structures.",
    )
    parser.add_argument("--version", action="version", version=f"ensemblelab {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        module = f"ensemblelab.cli._{name}"
        if importlib.util.find_spec(module) is None:
            continue
        importlib.import_module(module).register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        parser.print_help()
        return 2
    from ..errors import EnsembleError

    try:
        return int(args.func(args) or 0)
    except EnsembleError as exc:  # user-facing: the message already says where and why
        print(f"ensemblelab {args.command}: error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
