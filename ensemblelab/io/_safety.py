"""Safety helpers shared by the loaders and writers: limits, confinement, excerpts, locks.

Nothing here is public API. The limits are module attributes so that a user with
unusually large files can raise them (``ensemblelab.io.limits`` re-exports them
with their documentation).
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import gzip
import os
import re
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

from ..errors import ParseError, StoreError

__all__ = [
    "MAX_COMMENT_CHARS",
    "MAX_VALUE_CHARS",
    "MAX_FILE_BYTES",
    "MAX_GZIP_RATIO",
    "GZIP_RATIO_FLOOR",
    "MAX_STORE_ELEMENTS",
    "MAX_MANIFEST_BYTES",
    "excerpt",
    "confined",
    "check_no_symlink_escape",
    "find_forbidden_char",
    "read_bounded",
    "writer_lock",
    "try_lock",
]

#: longest comment line of an extended-XYZ frame, in characters (4 Mi)
MAX_COMMENT_CHARS = 4 * 2**20
#: longest single value (``key=value``) of a comment line, in characters (2 Mi)
MAX_VALUE_CHARS = 2 * 2**20
#: most bytes one trajectory file may hold (after gzip decompression): 2 GiB
MAX_FILE_BYTES = 2 * 2**30
#: a ``.gz`` file may expand to at most this many times its size on disk ...
MAX_GZIP_RATIO = 100
#: ... once it is larger than this (64 MiB): small files may compress very well
GZIP_RATIO_FLOOR = 64 * 2**20
#: most elements (over all arrays) a store manifest may declare: 2**36 (512 GiB of float64)
MAX_STORE_ELEMENTS = 2**36
#: largest manifest.json read, in bytes (64 MiB)
MAX_MANIFEST_BYTES = 64 * 2**20

#: characters refused in text input: bidirectional controls (they reorder what a reader
#: sees), and line/paragraph separators other than "\n" (they split lines for some tools)
_FORBIDDEN = ("\u200e\u200f\u061c\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069"
              "\u2028\u2029\u0085\x0b\x0c\x1c\x1d\x1e")
_FORBIDDEN_RE = re.compile(f"[{re.escape(_FORBIDDEN)}]")
_NAMES = {"\u2028": "LINE SEPARATOR", "\u2029": "PARAGRAPH SEPARATOR", "\u0085": "NEXT LINE",
          "\x0b": "VERTICAL TAB", "\x0c": "FORM FEED"}


def excerpt(text: Any, limit: int = 40) -> str:
    """A short, sanitised excerpt of file content for an error message.

    At most `limit` characters of `text`, written with :func:`repr` (so control,
    bidirectional and other invisible characters appear as escapes), with
    ``...`` when cut.
    """
    if not isinstance(text, str):
        s = repr(text)
        return s[:limit] + ("..." if len(s) > limit else "")
    return repr(text[:limit]) + ("..." if len(text) > limit else "")


def find_forbidden_char(text: str) -> tuple[int, str] | None:
    """Position and description of the first refused character of `text`, or None."""
    m = _FORBIDDEN_RE.search(text)
    if m is None:
        return None
    ch = m.group(0)
    return m.start(), f"U+{ord(ch):04X}" + (f" {_NAMES[ch]}" if ch in _NAMES else
                                            " (bidirectional control)" if ch not in _NAMES and
                                            ord(ch) > 0x7F else "")


def confined(root: Path, entry: Any, *, what: str, manifest: Path | None = None) -> Path:
    """The path of manifest entry `entry` inside the store `root`, refusing any escape.

    Parameters
    ----------
    root : Path
        The store folder.
    entry : str
        A relative path from the manifest (``"v-1a2b/energies.npy"``).
    what : str
        The entry's name for the message (``"array 'energies'"``).
    manifest : Path, optional
        The manifest file named in the message (default ``root/manifest.json``).

    Raises
    ------
    StoreError
        When `entry` is not a non-empty string, is absolute, holds ``..``, or
        resolves (through symbolic links) to a place outside `root`.
    """
    where = manifest if manifest is not None else root / "manifest.json"
    if not isinstance(entry, str) or not entry or "\x00" in entry:
        raise StoreError(f"{where}: {what} names the file {excerpt(entry)}; expected a relative "
                         "path inside the store. Hint: the store is corrupt or was tampered "
                         "with; convert the original files again.")
    rel = Path(entry)
    if rel.is_absolute() or ".." in rel.parts or entry.startswith(("/", "\\")):
        raise StoreError(f"{where}: {what} names {excerpt(entry)}, which is outside the store; "
                         "refused. Hint: a store only reads files inside its own folder.")
    path = root / rel
    try:
        real_root = root.resolve(strict=True)
        real = path.resolve(strict=False)
    except (OSError, RuntimeError) as exc:  # a symlink loop
        raise StoreError(f"{where}: {what} ({excerpt(entry)}) cannot be resolved ({exc}). "
                         "Hint: remove the symbolic link.") from exc
    if real != real_root and real_root not in real.parents:
        raise StoreError(f"{where}: {what} ({excerpt(entry)}) is a symbolic link that leaves "
                         "the store; refused. Hint: a store only reads files inside its own "
                         "folder; copy the file in instead of linking it.")
    return path


def check_no_symlink_escape(folder: Path, file: Path, *, what: str = "file") -> None:
    """Raise ParseError when `file` (in `folder`) is a symbolic link leading out of `folder`."""
    if not file.is_symlink():
        return
    try:
        real = file.resolve(strict=True)
        root = folder.resolve(strict=True)
    except (OSError, RuntimeError) as exc:
        raise ParseError(f"the {what} is a broken symbolic link ({exc}).", path=file,
                         hint="replace the link by the file itself.") from exc
    if root not in real.parents:
        raise ParseError(f"the {what} is a symbolic link to a place outside the folder; "
                         "refused.", path=file,
                         hint="copy the file into the folder instead of linking it.")


def read_bounded(fh: IO[bytes] | gzip.GzipFile, *, path: Path, compressed_size: int | None,
                 limit: int | None = None, block: int = 2**22) -> bytes:
    """Read all of `fh` (a plain or gzip file) but refuse to expand past the limits.

    The limit is ``MAX_FILE_BYTES``, and for a compressed file also
    ``max(GZIP_RATIO_FLOOR, MAX_GZIP_RATIO * compressed_size)``. Reading stops
    one block after the limit, so memory stays bounded by it.

    Raises
    ------
    ParseError
        Naming the file, the limit and (from the atom count on the first line)
        the frame being read when the limit was reached.
    """
    cap = MAX_FILE_BYTES if limit is None else int(limit)
    reason = f"the file limit MAX_FILE_BYTES = {MAX_FILE_BYTES} bytes"
    if compressed_size is not None:
        ratio_cap = max(GZIP_RATIO_FLOOR, MAX_GZIP_RATIO * int(compressed_size))
        if ratio_cap < cap:
            cap = ratio_cap
            reason = (f"{MAX_GZIP_RATIO} times its compressed size of {compressed_size} bytes "
                      f"(MAX_GZIP_RATIO; a likely decompression bomb)")
    if compressed_size is None:  # a plain file: its size is known, read it in one piece
        with contextlib.suppress(OSError, AttributeError, ValueError):
            if os.fstat(fh.fileno()).st_size <= cap:
                data = fh.read(cap + 1)
                if len(data) <= cap:
                    return data
                fh.seek(0)
    parts: list[bytes] = []
    total = 0
    while True:
        data = fh.read(min(block, cap + 1 - total))
        if not data:
            break
        parts.append(data)
        total += len(data)
        if total > cap:
            head = parts[0][:64].split(b"\n", 1)[0]
            lines = sum(p.count(b"\n") for p in parts)
            del parts
            frame = None
            with contextlib.suppress(ValueError):
                n_atoms = int(head.strip())
                frame = lines // (n_atoms + 2) if n_atoms > 0 else None
            raise ParseError(
                f"the file expands to more than {cap} bytes, {reason}; reading stopped.",
                path=path, frame=frame,
                hint="split the trajectory into several files, or raise the limit in "
                     "ensemblelab.io.limits if the file is genuine.",
            )
    return b"".join(parts)


def try_lock(path: Path) -> int | None:
    """Open (creating) `path` and take an exclusive non-blocking flock; fd, or None if held."""
    fd = os.open(path, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        os.close(fd)
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            return None
        raise
    return fd


@contextlib.contextmanager
def writer_lock(lock_file: Path, *, store: Path) -> Iterator[int]:
    """Hold the exclusive writer lock of a store, or raise StoreError at once.

    The lock is an ``fcntl.flock`` on `lock_file`; the operating system releases
    it when the process ends, even by ``kill -9``, so a stale lock never blocks.
    """
    fd = try_lock(lock_file)
    if fd is None:
        raise StoreError(f"{store}: the store is being written by another process. Hint: wait "
                         "for that save to finish, or write to another path.")
    try:
        yield fd
    finally:
        os.close(fd)
