"""Atomic file writes, shared by every layer: a temporary file beside the target, then
``os.replace``, so a reader never sees a half-written file and an interrupted write
leaves the previous file as it was.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

__all__ = ["atomic_file", "atomic_write_bytes", "atomic_write_text"]


@contextlib.contextmanager
def atomic_file(path: str | os.PathLike[str], mode: str = "w", *, overwrite: bool = True,
                **open_kwargs: Any) -> Iterator[IO[Any]]:
    """Open a temporary file beside `path`; on success it replaces `path` atomically.

    Parameters
    ----------
    path : path-like
        The file to write; its folder is created if needed.
    mode : {"w", "wb"}
        Text or binary.
    overwrite : bool
        If False, refuse (``FileExistsError``) when `path` exists.
    **open_kwargs
        Passed to :func:`open` (``encoding``, ``newline``).

    Yields
    ------
    file object
        The open temporary file. On an exception it is removed and `path` is untouched.
    """
    target = Path(path)
    if not overwrite and target.exists():
        raise FileExistsError(f"{target} exists; pass overwrite=True to replace it.")
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, mode, **open_kwargs) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())  # the data is on disk before the name points at it
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; give the file ordinary permissions
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *,
                       overwrite: bool = True) -> Path:
    """Write `data` to `path` atomically; returns the path."""
    with atomic_file(path, "wb", overwrite=overwrite) as fh:
        fh.write(data)
    return Path(path)


def atomic_write_text(path: str | os.PathLike[str], text: str, *, overwrite: bool = True,
                      encoding: str = "utf-8") -> Path:
    """Write `text` to `path` atomically (``\\n`` line endings); returns the path."""
    with atomic_file(path, "w", overwrite=overwrite, encoding=encoding, newline="\n") as fh:
        fh.write(text)
    return Path(path)
