"""The comment line of an extended-XYZ frame: key vocabulary, ``key=value`` parsing, limits.

Parsing is linear in the length of the line (see :data:`PAIR_RE`); one comment
line, one key and one value are bounded by the limits of
:mod:`ensemblelab.io.limits` (``MAX_COMMENT_CHARS``, ``MAX_VALUE_CHARS``,
``MAX_KEY_CHARS``), checked before any parsing, with a ParseError naming the file,
frame and line.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from pathlib import Path

from ..errors import ParseError
from . import _safety
from ._safety import excerpt

#: longest key of a comment line, in characters
MAX_KEY_CHARS = 128

#: per-frame keys holding a block of numbers -> (Ensemble field, energy-like)
ARRAY_KEYS: dict[str, bool] = {
    "energies": True,
    "cation_energies": True,
    "dyson": False,
    "amplitudes": False,
    "adt": False,
    "adt_cation": False,
    "overlaps": False,
    "transition_strengths": False,
}
#: keys read from the first frame of a file only
HEADER_KEYS = ("energy_unit", "time_unit", "length_unit", "state_labels", "cation_labels",
               "dyson_shape", "masses", "state_base", "Properties", "Lattice", "pbc")
#: scalar keys with a meaning of their own
SCALAR_ENERGY_KEYS = ("e_kin", "e_pot", "e_tot")
RESERVED = {"time", "active", "step", "snapshot", *ARRAY_KEYS, *HEADER_KEYS}

#: one ``key=value`` pair. The look-behind lets a key start only where a run of key
#: characters starts, so a long run without ``=`` is scanned once (linear time; the
#: former pattern rescanned it from every position, quadratic).
PAIR_RE = re.compile(r'(?<![\w.\-])([A-Za-z_][\w.\-]*)=(?:"([^"]*)"|(\S*))')
_FIRST_TOKEN_RE = re.compile(r"^[ \t]*(\S+)", re.MULTILINE)
_NOT_INT_RE = re.compile(r"[^0-9+\- \t]")
TRAJ_ID_RE = re.compile(r"(\d+)$")
SUFFIXES = (".xyz.gz", ".xyz")


def where_in_file(n_atoms: int, frame: int, offset: int = 1) -> int:
    """1-based line number of line `offset` (0 = count, 1 = comment, 2.. atoms) of a frame."""
    return frame * (n_atoms + 2) + offset + 1


def _short(keys: Sequence[str], n: int = 12) -> str:
    """A bounded list of key names for a message."""
    shown = [k if len(k) <= 40 else k[:40] + "..." for k in keys[:n]]
    return str(shown)[:-1] + (", ...]" if len(keys) > n else "]")


def check_comment_lengths(comments: Sequence[str], n_atoms: int, path: Path) -> None:
    """Refuse a comment line longer than ``MAX_COMMENT_CHARS`` (before parsing it)."""
    limit = _safety.MAX_COMMENT_CHARS
    lengths = list(map(len, comments))
    if lengths and max(lengths) > limit:
        f = next(i for i, n in enumerate(lengths) if n > limit)
        raise ParseError(
            f"the comment line holds {lengths[f]} characters, more than the limit "
            f"MAX_COMMENT_CHARS = {limit}; starts with {excerpt(comments[f])}.",
            path=path, frame=f, line=where_in_file(n_atoms, f, 1), field="comment line",
            hint="keep per-frame data short, or raise the limit in ensemblelab.io.limits.")


def check_values(keys: Sequence[str], values: dict[str, list[str]], n_atoms: int,
                 path: Path) -> None:
    """Refuse a key longer than ``MAX_KEY_CHARS`` or a value longer than ``MAX_VALUE_CHARS``."""
    for k in keys:
        if len(k) > MAX_KEY_CHARS:
            raise ParseError(f"a key of {len(k)} characters ({excerpt(k)}) is longer than the "
                             f"limit of {MAX_KEY_CHARS}.", path=path, frame=0, line=2,
                             field="key", hint="use short key names.")
    limit = _safety.MAX_VALUE_CHARS
    for k in keys:
        lengths = list(map(len, values[k]))
        if lengths and max(lengths) > limit:
            f = next(i for i, n in enumerate(lengths) if n > limit)
            raise ParseError(
                f"the value holds {lengths[f]} characters, more than the limit "
                f"MAX_VALUE_CHARS = {limit}.", path=path, frame=f,
                line=where_in_file(n_atoms, f, 1),
                field=k, hint="raise the limit in ensemblelab.io.limits if the file is genuine.")


def _fast_values(comments: Sequence[str]) -> list[tuple[str, ...]] | None:
    """Values of frames 1.. when they all share the key sequence of frame 1, else None.

    One anchored regex built from frame 1 is applied to all comment lines at
    once, so a frame with a missing, extra or re-ordered key does not match and
    the caller falls back to the frame-by-frame path (which names the frame).
    """
    if len(comments) < 2:
        return []
    parts = []
    for m in PAIR_RE.finditer(comments[1]):
        quoted = m.group(2) is not None
        parts.append(re.escape(m.group(1)) + "=" + ('"([^"\n]*)"' if quoted else r'([^\s"]*)'))
    if len(parts) < 2:
        return None
    pattern = re.compile(r"^[ \t]*" + r"[ \t]+".join(parts) + r"[ \t]*$", re.MULTILINE)
    rows = pattern.findall("\n".join(comments[1:]))
    if len(rows) != len(comments) - 1:
        return None
    return rows


def parse_comments(comments: Sequence[str], n_atoms: int, path: Path
                    ) -> tuple[dict[str, str], list[str], dict[str, list[str]]]:
    """Return (header, per-frame keys in order, key -> values of every frame)."""
    pairs0 = PAIR_RE.findall(comments[0])
    header = {k: (q or p) for k, q, p in pairs0 if k in HEADER_KEYS}
    keys = [k for k, _, _ in pairs0 if k not in HEADER_KEYS]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise ParseError(f"the key {excerpt(dup)} appears twice in the comment line.",
                         path=path, frame=0, line=2, field=dup[:MAX_KEY_CHARS],
                         hint="give each key once per frame.")
    for req in ("time", "active", "energies"):
        if req not in keys:
            raise ParseError(
                f"missing required key {req}=...; found keys {_short(keys)}.",
                path=path, frame=0, line=2, field=req,
                hint="every frame's comment line needs time=, active= and energies=\"...\" "
                     "(see the key table in ensemblelab.io.xyz); for geometry-only files use "
                     "ensemblelab.load_plain_xyz(path, states_table, time_step=...).",
            )
    values: dict[str, list[str]] = {k: [(q or p) for kk, q, p in pairs0 if kk == k][:1]
                                    for k in keys}
    keyset = set(keys)
    rows = _fast_values(comments)
    if rows is not None and len(comments) > 1:
        keys1 = [m.group(1) for m in PAIR_RE.finditer(comments[1])]
        if set(keys1) - set(HEADER_KEYS) == keyset and len(keys1) == len(set(keys1)):
            columns = list(zip(*rows, strict=True))
            for k, col in zip(keys1, columns, strict=True):
                if k in keyset:
                    values[k].extend(col)
            return header, keys, values
    for f, line in enumerate(comments[1:], start=1):
        d = {k: (q or p) for k, q, p in PAIR_RE.findall(line) if k not in HEADER_KEYS}
        if d.keys() != keyset:
            missing = sorted(keyset - d.keys())
            extra = sorted(d.keys() - keyset)
            what = (f"missing key(s) {_short(missing)}" if missing
                    else f"unexpected key(s) {_short(extra)}")
            raise ParseError(
                f"{what} compared with frame 0 (keys {_short(keys)}).", path=path, frame=f,
                line=where_in_file(n_atoms, f, 1), field=(missing or extra)[0][:MAX_KEY_CHARS],
                hint="every frame of a file must carry the same keys.",
            )
        for k in keys:
            values[k].append(d[k])
    return header, keys, values
