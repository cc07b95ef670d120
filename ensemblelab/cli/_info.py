"""``ensemblelab info PATH``: a readable summary of an ensemble on disk."""

from __future__ import annotations

import argparse
import sys
import warnings
from collections import Counter
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import EnsembleWarning

if TYPE_CHECKING:
    from ..data.ensemble import Ensemble

__all__ = ["register", "summarise", "add_load_options", "load_from_args", "atom_options"]


def add_load_options(p: argparse.ArgumentParser) -> None:
    """The loader options shared by ``info`` and ``convert``."""
    p.add_argument("--energy-unit", help="unit of undeclared energies (eV, hartree, ...)")
    p.add_argument("--time-unit", help="unit of undeclared times (fs, au, ps, ...)")
    p.add_argument("--length-unit", help="unit of undeclared coordinates (Angstrom, bohr, ...)")
    p.add_argument("--state-base", type=int, choices=(0, 1),
                   help="1 when the input counts states from 1")
    p.add_argument("--nonfinite", choices=("raise", "keep"), default="raise",
                   help="NaN/Inf in energies or coordinates: stop (default) or keep with a "
                        "warning")
    p.add_argument("--input-format", choices=("store", "extxyz", "table"), default=None,
                   help="format of the input, when it cannot be told from its name")
    p.add_argument("--masses", action="append", metavar="EL=AMU", default=None,
                   help="atomic mass of an element or label, e.g. --masses H=2.014 (repeatable)")
    p.add_argument("--skip-atom-columns", nargs="+", metavar="NAME", default=None,
                   help="extended-XYZ Properties= atom columns to skip, e.g. forces")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")


def atom_options(args: argparse.Namespace) -> dict[str, Any]:
    """``masses=`` and ``skip_atom_columns=`` of the loaders, from ``--masses``/``--skip-...``."""
    kw: dict[str, Any] = {}
    if getattr(args, "masses", None):
        table = {}
        for item in args.masses:
            el, sep, value = item.partition("=")
            try:
                table[el.strip()] = float(value)
            except ValueError:
                sep = ""
            if not sep or not el.strip():
                raise ValueError(f"--masses expects EL=AMU (e.g. H=2.014), got {item!r}.")
        kw["masses"] = table
    if getattr(args, "skip_atom_columns", None):
        kw["skip_atom_columns"] = list(args.skip_atom_columns)
    return kw


def load_from_args(args: argparse.Namespace) -> Ensemble:
    """Load ``args.path`` with the options of :func:`add_load_options`."""
    from ..io import detect_format, load

    path = Path(args.path)
    kw: dict[str, Any] = {}
    fmt = args.input_format or detect_format(path)
    if args.input_format:
        kw["format"] = fmt
    if fmt != "store":
        kw |= {"energy_unit": args.energy_unit, "time_unit": args.time_unit,
               "length_unit": args.length_unit, "nonfinite": args.nonfinite}
        if args.state_base is not None:
            kw["state_base"] = args.state_base
        kw |= atom_options(args)
    elif atom_options(args):
        raise ValueError("--masses and --skip-atom-columns apply to extended-XYZ and table "
                         "inputs; a native store keeps the masses it was saved with.")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", EnsembleWarning)
        ens = load(path, progress=not args.no_progress, **kw)
    for w in caught:  # a one-line note each, without the source-code line
        if issubclass(w.category, EnsembleWarning):
            print(f"ensemblelab: {w.category.__name__}: {w.message}", file=sys.stderr)
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return ens


def _counts(values: np.ndarray, labels: tuple[str, ...]) -> str:
    c = Counter(int(v) for v in values)
    return ", ".join(f"{labels[k] if 0 <= k < len(labels) else k}: {n}"
                     for k, n in sorted(c.items())) or "-"


def _ids(ids: np.ndarray, limit: int = 8) -> str:
    shown = ", ".join(str(int(i)) for i in ids[:limit])
    return shown + (f", ... ({len(ids)} in all)" if len(ids) > limit else "")


def summarise(ens: Ensemble) -> list[tuple[str, str]]:
    """Rows (label, text) of the ``info`` table.

    Parameters
    ----------
    ens : Ensemble

    Returns
    -------
    list of (str, str)
    """
    from ..data.ensemble import SNAPSHOT_ARRAYS, TRAJECTORY_ARRAYS

    snaps, trajs = ens.snapshots, ens.trajectories
    t = snaps["time"].to_numpy()
    same = np.diff(snaps["traj"].to_numpy()) == 0
    dt = np.diff(t)[same]
    w = trajs["weight"].to_numpy()
    t_end = trajs["t_end"].to_numpy()
    t_max = float(t_end.max()) if len(t_end) else 0.0
    tol = 0.5 * float(np.median(dt)) if dt.size else 0.0
    early = trajs["traj"].to_numpy()[t_end < t_max - tol]
    rows = [
        ("trajectories", f"{ens.n_trajectories}"),
        ("snapshots", f"{ens.n_snapshots} ({trajs['n_steps'].min()}-{trajs['n_steps'].max()} "
                      "per trajectory)" if ens.n_trajectories else "0"),
        ("time span", f"{t.min():.6g} .. {t.max():.6g} fs" if t.size else "-"),
        ("time step", f"{np.median(dt):.6g} fs (median)" if dt.size else "-"),
        ("atoms", f"{ens.n_atoms} ({' '.join(ens.symbols[:20])}"
                  f"{' ...' if ens.n_atoms > 20 else ''})"),
        ("neutral states", f"{ens.n_states} ({', '.join(ens.state_labels)})"),
        ("cation states", f"{ens.n_cation} ({', '.join(ens.cation_labels)})"
         if ens.n_cation else "0"),
        ("initial states", _counts(trajs["initial_state"].to_numpy(), ens.state_labels)),
    ]
    if ens.n_trajectories:
        last = snaps.groupby("traj", sort=True)["active"].last().to_numpy()
        rows.append(("active at end", _counts(last, ens.state_labels)))
        rows.append(("hops", f"{len(ens.hops())}"))
    rows += [
        ("weights", f"{w.min():.6g} .. {w.max():.6g} (sum {w.sum():.6g})" if w.size else "-"),
        ("early-ending", f"{len(early)} trajectories end before {t_max:.6g} fs: {_ids(early)}"
         if len(early) else "none (all reach the last time)"),
        ("arrays", ", ".join(n for n in ("geometries", "energies", *SNAPSHOT_ARRAYS,
                                         *TRAJECTORY_ARRAYS) if getattr(ens, n) is not None)),
        ("snapshot columns", ", ".join(c for c in snaps.columns
                                       if c not in ("snapshot", "traj", "step", "time",
                                                    "active")) or "-"),
        ("trajectory columns", ", ".join(c for c in trajs.columns
                                         if c not in ("traj", "weight", "initial_state",
                                                      "n_steps", "t_end")) or "-"),
    ]
    from ..data.checks import nonfinite_report

    report = nonfinite_report(ens)
    flagged = report[report["nonfinite"]]
    if len(flagged):
        fields = sorted({f for row in flagged["fields"] for f in row.split(", ")})
        rows.append(("non-finite values", f"{', '.join(fields)} in {len(flagged)} "
                     f"trajector{'y' if len(flagged) == 1 else 'ies'}: "
                     f"{_ids(flagged['traj'].to_numpy())}"))
    sources = ens.metadata.get("sources", [])
    formats = Counter(str(s.get("format", "?")) for s in sources if isinstance(s, dict))
    names = [Path(str(s.get("path", "?"))).name for s in sources if isinstance(s, dict)]
    rows.append(("sources", f"{len(sources)} ("
                 + ", ".join(f"{n} {f}" for f, n in formats.items()) + ")"
                 + (f": {', '.join(names[:3])}{', ...' if len(names) > 3 else ''}"
                    if names else "")))
    other = [k for k in ens.metadata if k not in ("sources", "units", "schema_version")]
    if other:
        rows.append(("metadata", ", ".join(other)))
    return rows


def _run(args: argparse.Namespace) -> int:
    from ..io import detect_format

    ens = load_from_args(args)
    rows = summarise(ens)
    width = max(len(k) for k, _ in rows)
    print(f"{args.path}  [{getattr(args, 'input_format', None) or detect_format(args.path)}]")
    for key, value in rows:
        print(f"  {key:<{width}}  {value}")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``info`` sub-command."""
    p = subparsers.add_parser("info", help="summarise an ensemble (any supported input)",
                              description="Print a summary table of an ensemble: counts, time "
                                          "span, states, arrays, weights, early-ending "
                                          "trajectories and sources.")
    p.add_argument("path", help="native store, extended-XYZ folder/file or snapshot table")
    add_load_options(p)
    p.set_defaults(func=_run)
