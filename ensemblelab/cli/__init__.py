"""The ``ensemblelab`` command line.

Each sub-command lives in its own module ``ensemblelab/cli/_<name>.py`` that
defines ``register(subparsers)`` (adds its parser and sets ``func``); this
module discovers the ones present, in the order of :data:`COMMANDS`.
"""

from __future__ import annotations

import argparse
import gc
import importlib
import importlib.util
import os
import sys
from collections.abc import Sequence

__all__ = ["main", "build_parser", "COMMANDS"]

#: sub-commands in the order ``--help`` lists them
COMMANDS = ("info", "convert", "demo", "report", "explore")

#: collection thresholds of the program (Python's default: 700, 10, 10): a command
#: imports millions of objects (numpy, pandas, scipy, scikit-learn, matplotlib, numba)
#: that every full collection walks again; young cycles are still collected, every
#: 10000 allocations (measured: 0.65 s of collections in a report, 0.2 s with these)
PROGRAM_GC_THRESHOLDS = (10_000, 20, 20)


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
    """Run the command line; returns the process exit status.

    Run as the program (`argv` None: ``ensemblelab ...`` or ``python -m ensemblelab``),
    the garbage collector runs less often (:data:`PROGRAM_GC_THRESHOLDS`) and is frozen
    when the command is done, so that the interpreter exits without a last walk over
    every object (about 1 s after a report; the operating system frees the memory).
    Called from Python with `argv`, the collector is left as it is.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        parser.print_help()
        return 2
    from ..errors import EnsembleError

    program = argv is None
    if program:
        gc.set_threshold(*PROGRAM_GC_THRESHOLDS)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        print(f"ensemblelab {args.command}: interrupted", file=sys.stderr)
        return 130
    except (EnsembleError, OSError, ValueError, MemoryError, RecursionError) as exc:
        # user errors (a missing path, a corrupt or hostile file, a refused write): one
        # line, never a traceback; ENSEMBLELAB_DEBUG=1 shows the traceback for developers
        if os.environ.get("ENSEMBLELAB_DEBUG"):
            raise
        print(f"ensemblelab {args.command}: error: {_message(exc)}", file=sys.stderr)
        return 1
    finally:
        if program:
            gc.freeze()  # what is left is freed at exit by the system, not walked by gc


def _message(exc: BaseException, limit: int = 2000) -> str:
    """The error text for the terminal: bounded, without control characters."""
    text = str(exc) or type(exc).__name__
    if isinstance(exc, FileNotFoundError) and exc.filename is not None:
        text = f"{exc.filename}: no such file or folder."
    elif isinstance(exc, MemoryError):
        text = "not enough memory. Hint: use a chunked store (convert --chunked)."
    text = "".join(c if c.isprintable() or c == "\n" else repr(c)[1:-1] for c in text)
    return text if len(text) <= limit else text[:limit] + " ..."


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
